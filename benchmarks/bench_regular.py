"""Regular textures: perfectly regular ridges on slanted strips, a known weak spot.

Run from a clean checkout:  python benchmarks/bench_regular.py  [--quick] [--workers N]

Fingers have pores, changes of ridge width and an irregular flow; a texture without any of
them leaves the model passes of default mode with only the ridges' own curvature to place
frames across, and on a slanted strip whose rows see each finger row at across phases spread
over less than a pixel ((R - 1) tan(skew)) the passes read a shear and a turn that are not
there (DEVELOPERS.md, "Slanted narrow strips"). This benchmark measures how far that goes.
Textures, analytic and evaluated at 4 x 4 points over each plate's square (no stripstitch
code): "rings", circles of 9 px period around a core the strip passes over; "arcs", the same
circles with the core 150 px to one side (nearly straight ridges some 30 degrees off the
swipe: little along-swipe information); "grating", straight ridges of 9 px period at 30
degrees to the swipe (the placement along the ridges is not in the data at all: the report
must say so). Strips 8x192 (0.44 px per frame, 90 mm/s at 4 kHz), 12x160 and 16x128
(0.9 px per frame), slants 0, 2, 4 and 6 degrees, constant speed, no turn, Gaussian noise 3 %
of the ridge amplitude, 8-bit codes. Default, fast and streaming modes. Errors against the
generator's placement: along / across RMS (px, frame 0 taken out), span (first to last
frame, %), the turn the result holds (degrees, peak to peak), the report's verdict and the
median confidence. Writes
benchmarks/results/regular[_quick].json/.md. Synthetic textures for testing only.
"""

from __future__ import annotations

import argparse
from concurrent.futures import ProcessPoolExecutor

import numpy as np

from _common import environment, fmt, stitch_mode, table, write


GEOMETRIES = ((8, 192, 0.44), (12, 160, 0.9), (16, 128, 0.9))
TEXTURES = ("rings", "arcs", "grating")
SKEWS = (0.0, 2.0, 4.0, 6.0)
MODES = ("default", "fast", "stream")
N_FRAMES = 400
PERIOD_PX = 9.0


def texture(name, y, x, n_cols):
    """Ridge value in [-1, 1] at frame-0 pixel coordinates (y along, x across)."""
    if name == "rings":
        return np.cos(2 * np.pi * np.hypot(y - 300.0, x - 0.47 * n_cols) / PERIOD_PX)
    if name == "arcs":
        return np.cos(2 * np.pi * np.hypot(y - 300.0, x + 150.0) / PERIOD_PX)
    th = np.radians(30.0)
    return np.cos(2 * np.pi * (np.cos(th) * y + np.sin(th) * x) / PERIOD_PX)


def make(name, n_rows, n_cols, step_px, skew_deg, seed):
    t = np.arange(N_FRAMES, dtype=np.float64)
    pos = np.stack([step_px * t, step_px * np.tan(np.radians(skew_deg)) * t], axis=1)
    rr, cc = np.mgrid[0:n_rows, 0:n_cols].astype(np.float64)
    sub = (np.arange(4) + 0.5) / 4 - 0.5
    z = np.zeros((N_FRAMES, n_rows, n_cols))
    for a in sub:
        for b in sub:
            z += texture(name, pos[:, 0, None, None] + rr[None] + a,
                         pos[:, 1, None, None] + cc[None] + b, n_cols) / 16.0
    z += 0.03 * np.random.default_rng(seed).standard_normal(z.shape)
    return np.clip(np.round(100.0 + 60.0 * z), 0, 255).astype(np.uint8), pos


def run(args):
    name, (n_rows, n_cols, step), skew, seed = args
    frames, truth = make(name, n_rows, n_cols, step, skew, seed)
    rate = 4000.0 if n_rows == 8 else 2000.0
    desc = f"{name} {n_rows}x{n_cols} {step:.2f} px/frame skew {skew:.0f}"
    out = []
    for mode in MODES:
        res = stitch_mode(frames, rate, mode)
        e = res.positions - truth
        e -= e[0]
        span = 100.0 * ((res.positions[-1, 0] - res.positions[0, 0]) / (truth[-1, 0] - truth[0, 0]) - 1)
        out.append({"case": desc, "texture": name, "rows": n_rows, "skew_deg": skew, "mode": mode,
                    "spread_px": float((n_rows - 1) * np.tan(np.radians(skew))),
                    "span_error_pct": float(span),
                    "along_rms_px": float(np.sqrt(np.mean(e[:, 0] ** 2))),
                    "across_rms_px": float(np.sqrt(np.mean(e[:, 1] ** 2))),
                    "turn_read_deg": float(np.ptp(res.angles)),
                    "verdict": res.report.verdict,
                    "median_confidence": float(np.median(res.confidence))})
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="the 8x192 rings only")
    ap.add_argument("--workers", type=int, default=2, help="processes (default 2)")
    args = ap.parse_args(argv)
    cases = [(name, g, skew, 100 * i + j) for i, name in enumerate(TEXTURES)
             for j, (g, skew) in enumerate((g, s) for g in GEOMETRIES for s in SKEWS)]
    if args.quick:
        cases = [c for c in cases if c[0] == "rings" and c[1][0] == 8]
    with ProcessPoolExecutor(args.workers) as ex:
        rows = [r for rs in ex.map(run, cases) for r in rs]
    summary, lines = {}, []
    for mode in MODES:
        mine = [r for r in rows if r["mode"] == mode and r["texture"] != "grating"]
        grating = [r for r in rows if r["mode"] == mode and r["texture"] == "grating"]
        acr = np.array([r["across_rms_px"] for r in mine])
        slanted_narrow = np.array([r["across_rms_px"] for r in mine
                                   if 0.0 < r["spread_px"] < 1.0])
        silent = [r for r in mine if r["verdict"] == "usable"
                  and max(r["across_rms_px"], r["along_rms_px"]) > 0.5]
        s = summary[mode] = {
            "swipes": len(mine),
            "median_across_rms_px": float(np.median(acr)),
            "worst_across_rms_px": float(acr.max()),
            "swipes_across_over_0p5px": int((acr > 0.5).sum()),
            "median_across_rms_px_spread_under_1px": (float(np.median(slanted_narrow))
                                                      if slanted_narrow.size else None),
            "median_abs_span_error_pct": float(np.median([abs(r["span_error_pct"]) for r in mine])),
            "median_along_rms_px": float(np.median([r["along_rms_px"] for r in mine])),
            "swipes_turned_over_0p5deg": int(sum(r["turn_read_deg"] > 0.5 for r in mine)),
            "usable_but_over_0p5px": len(silent),
            "gratings_unusable": int(sum(r["verdict"] != "usable" for r in grating)),
            "gratings": len(grating)}
        lines.append(f"- {mode}: across RMS median {fmt(s['median_across_rms_px'])} px, worst "
                     f"{fmt(s['worst_across_rms_px'])} px, {s['swipes_across_over_0p5px']} of "
                     f"{s['swipes']} over 0.5 px; median "
                     f"{fmt(s['median_across_rms_px_spread_under_1px'])} px where the rows span "
                     f"under a pixel across (slanted); along RMS median "
                     f"{fmt(s['median_along_rms_px'])} px, span error median "
                     f"{fmt(s['median_abs_span_error_pct'])} %; a turn of over 0.5 deg read on "
                     f"{s['swipes_turned_over_0p5deg']} (none turns); called usable yet over "
                     f"0.5 px off: {s['usable_but_over_0p5px']}; gratings called unusable: "
                     f"{s['gratings_unusable']} of {s['gratings']}")
    cols = ["case", "mode", "spread_px", "span_error_pct", "along_rms_px", "across_rms_px",
            "turn_read_deg", "verdict", "median_confidence"]
    heads = ["case", "mode", "phase spread px", "span err %", "along rms px", "across rms px",
             "turn read deg", "verdict", "median confidence"]
    md = (f"# Regular textures on slanted strips{' (quick)' if args.quick else ''}\n\n"
          f"{len(cases)} swipes (see the module notes); nothing turns, so any turn read is "
          "false. Figures over the rings and arcs (the gratings' placement along their ridges "
          "is not in the data; only their verdict counts):\n\n" + "\n".join(lines) + "\n\n"
          + table(rows, cols, heads) + "\n")
    print(md)
    paths = write("regular_quick" if args.quick else "regular",
                  {"environment": environment(), "rows": rows, "summary": summary}, md)
    print("wrote", *paths)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
