"""Pattern classes against skew: every finger class on both target geometries, straight and slanted.

Run from a clean checkout:  python benchmarks/bench_patterns.py  [--quick]

Each of the six finger classes (stripstitch.simulate.make_finger, two fingers each, seeded) is
swiped at a steady 90 mm/s and 30 dB over 8x192 at 4 kHz and 16x128 at 2 kHz, once straight
and once slanted by 2 and by 5 degrees (the same finger and noise each time), in default and
fast mode. Only the skew changes between the rows of a group, so what it costs each class and
strip shows on its own: loops and whorls have regions whose ridges run nearly along the swipe
(the least determined direction, the aperture problem) and cores where they turn, arches
mostly cross the swipe. Span, along and across errors against the simulator's truth over the
frames with contact >= 0.5. Writes benchmarks/results/patterns[_quick].json/.md. Synthetic
prints; the speed is an unsourced modelling assumption (REFERENCE-VALUES.md section 7).
"""

from __future__ import annotations

import argparse
from concurrent.futures import ProcessPoolExecutor

import numpy as np

from _common import environment, fmt, table, write

from stripstitch import evaluate as ev
from stripstitch import simulate, stitch

PATTERNS = ("arch", "tented_arch", "left_loop", "right_loop", "whorl", "twin_loop")
GEOMETRIES = ((8, 192, 4000.0), (16, 128, 2000.0))
SKEWS = (0.0, 2.0, 5.0)
MODES = ("default", "fast")


def run(args):
    pattern, geometry, finger_seed = args
    rows, cols, rate = geometry
    finger = simulate.make_finger(pattern, size_mm=(12.0, 10.0), rng=finger_seed)
    out = []
    for skew in SKEWS:
        cap = simulate.swipe(pattern, finger=finger, rng=finger_seed + 100, n_rows=rows,
                             n_cols=cols, frame_rate_hz=rate, speed_mm_s=90.0, snr_db=30.0,
                             skew_deg=skew)
        for mode in MODES:
            res = stitch(cap.frames, pitch_um=float(cap.pitch_um), frame_rate_hz=rate,
                         timestamps_s=np.asarray(cap.times_s, dtype=np.float64), mode=mode)
            d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
            out.append({"case": f"{pattern} {rows}x{cols} finger {finger_seed}", "pattern": pattern,
                        "rows": rows, "skew_deg": skew, "mode": mode,
                        "span_error_pct": d["span_error_pct"], "along_rms_px": d["along_rms_px"],
                        "across_rms_px": d["across_rms_px"]})
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="one finger per class, 8x192 only")
    ap.add_argument("--workers", type=int, default=2, help="processes (default 2)")
    args = ap.parse_args(argv)
    seeds = (300,) if args.quick else (300, 301)
    geoms = GEOMETRIES[:1] if args.quick else GEOMETRIES
    jobs = [(p, g, s + 10 * k) for k, p in enumerate(PATTERNS) for g in geoms for s in seeds]
    with ProcessPoolExecutor(args.workers) as ex:
        rows = [r for rs in ex.map(run, jobs) for r in rs]
    groups = []
    for mode in MODES:
        for n_rows in sorted({r["rows"] for r in rows}):
            for kind, classes in (("arches", ("arch", "tented_arch")),
                                  ("loops and whorls", PATTERNS[2:])):
                for skew in SKEWS:
                    sel = [r for r in rows if r["mode"] == mode and r["rows"] == n_rows
                           and r["pattern"] in classes and r["skew_deg"] == skew]
                    if not sel:
                        continue
                    span = np.abs([r["span_error_pct"] for r in sel])
                    groups.append({
                        "mode": mode, "rows": n_rows, "classes": kind, "skew_deg": skew,
                        "swipes": len(sel), "median_abs_span_error_pct": float(np.median(span)),
                        "worst_abs_span_error_pct": float(np.max(span)),
                        "median_along_rms_px": float(np.median([r["along_rms_px"] for r in sel])),
                        "median_across_rms_px": float(np.median([r["across_rms_px"]
                                                                 for r in sel]))})
    gcols = ["mode", "rows", "classes", "skew_deg", "swipes", "median_abs_span_error_pct",
             "worst_abs_span_error_pct", "median_along_rms_px", "median_across_rms_px"]
    gheads = ["mode", "rows", "classes", "skew deg", "swipes", "span err % (median |.|)",
              "worst span err %", "along rms px (median)", "across rms px (median)"]
    cols = ["case", "skew_deg", "mode", "span_error_pct", "along_rms_px", "across_rms_px"]
    heads = ["case", "skew deg", "mode", "span err %", "along rms px", "across rms px"]
    worst = max((g for g in groups if g["mode"] == "default"),
                key=lambda g: g["median_along_rms_px"])
    md = (f"# Pattern classes against skew{' (quick)' if args.quick else ''}\n\n"
          f"{len(jobs)} fingers ({', '.join(PATTERNS)}; seeds {seeds}), each swiped straight and "
          f"slanted by {' and '.join(f'{s:g}' for s in SKEWS[1:])} degrees at 90 mm/s, 30 dB. "
          "Default mode's weakest group: "
          f"{worst['classes']} on {worst['rows']} rows at {worst['skew_deg']:g} degrees, along RMS "
          f"median {fmt(worst['median_along_rms_px'])} px, span error median "
          f"{fmt(worst['median_abs_span_error_pct'])} % (see DEVELOPERS.md, 'Slanted narrow "
          "strips' and 'Aperture and slant').\n\n"
          + table(groups, gcols, gheads) + "\n\n## Every swipe\n\n" + table(rows, cols, heads)
          + "\n")
    print(md)
    paths = write("patterns" + ("_quick" if args.quick else ""),
                  {"environment": environment(), "rows": rows, "groups": groups}, md)
    print("wrote", *paths)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
