"""Random swipes: settings drawn at random on the two target geometries, default, fast, stream.

Run from a clean checkout:  python benchmarks/bench_random.py  [--quick] [--seed N]

Cases no one chose: each swipe (stripstitch.simulate.swipe, seeded) alternates 8x192 at 4 kHz
and 16x128 at 2 kHz and draws a finger class, a speed profile (constant, human,
accelerating-decelerating), 40 to 200 mm/s, 12 to 40 dB, a skew within 8 degrees, a turn of
up to 4 degrees in one swipe of three, a stall in about 30 % and a backtrack in about 30 %.
Span, along, across and rotation errors against the simulator's truth, and every scored event
(gap, stall, backtrack: stripstitch.evaluate) reported or missed, with reports where the truth
has none; the streaming stitcher (fed frame by frame) beside the batch modes. Fingers are
12 x 10 mm (along x across) unless ``--finger-mm`` asks for others (e.g. 18 14, nearer an
adult fingertip's pad, which adds the straight, nearly parallel ridges below the core and at
the tip). Writes benchmarks/results/random[_quick].json/.md (random_finger<L>x<W>... with
``--finger-mm``). Synthetic prints; speeds are an unsourced modelling assumption
(REFERENCE-VALUES.md section 7).
"""

from __future__ import annotations

import argparse
from concurrent.futures import ProcessPoolExecutor

import numpy as np

from _common import environment, fmt, span_summary, table, write

from stripstitch import evaluate as ev
from stripstitch import simulate, stitch
from stripstitch.sweep import reconstruct

PATTERNS = ("arch", "tented_arch", "left_loop", "right_loop", "whorl", "twin_loop")
MODES = ("default", "fast", "stream")


def case(i, seed0):
    r = np.random.default_rng(seed0 + i)
    rows, cols, rate = [(8, 192, 4000.0), (16, 128, 2000.0)][i % 2]
    p = dict(n_rows=rows, n_cols=cols, frame_rate_hz=rate,
             profile=str(r.choice(["constant", "human", "accel_decel"])),
             speed_mm_s=float(r.uniform(40, 200)), snr_db=float(r.uniform(12, 40)),
             skew_deg=float(r.uniform(-8, 8)),
             rotation_deg=float(r.choice([0.0, 0.0, r.uniform(-4, 4)])))
    if r.random() < 0.3:
        p["stalls"] = ((float(r.uniform(3, 8)), float(r.uniform(0.02, 0.08))),)
    if r.random() < 0.3:
        p["backtracks"] = ((float(r.uniform(4, 9)), float(r.uniform(0.2, 0.6))),)
    return str(r.choice(PATTERNS)), p, seed0 + 500 + i, seed0 + 900 + i


def run(args):
    i, seed0, finger_mm = args
    pattern, p, finger_seed, seed = case(i, seed0)
    finger = simulate.make_finger(pattern, size_mm=finger_mm, rng=finger_seed)
    cap = simulate.swipe(pattern, finger=finger, rng=seed, **p)
    desc = (f"{pattern} {p['n_rows']}x{p['n_cols']} {p['profile']} {p['speed_mm_s']:.0f} mm/s "
            f"{p['snr_db']:.0f} dB skew {p['skew_deg']:.1f} turn {p['rotation_deg']:.1f}"
            + (" stall" if "stalls" in p else "") + (" backtrack" if "backtracks" in p else ""))
    out = []
    for mode in MODES:
        if mode == "stream":       # StreamingStitcher fed frame by frame, as the accuracy suite
            res = reconstruct(cap, "stream")
        else:
            res = stitch(cap.frames, pitch_um=float(cap.pitch_um),
                         frame_rate_hz=p["frame_rate_hz"],
                         timestamps_s=np.asarray(cap.times_s, dtype=np.float64), mode=mode)
        d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
        row = {"case": desc, "mode": mode, "turn_deg": p["rotation_deg"]}
        for k in ("span_error_pct", "along_rms_px", "across_rms_px", "rotation_rms_deg",
                  "gap_true", "gap_false", "stall_true", "stall_detected", "stall_false",
                  "backtrack_true", "backtrack_detected", "backtrack_false"):
            row[k] = d.get(k)
        out.append(row)
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="eight swipes")
    ap.add_argument("--seed", type=int, default=7000)
    ap.add_argument("--workers", type=int, default=2, help="processes (default 2)")
    ap.add_argument("--finger-mm", type=float, nargs=2, default=(12.0, 10.0),
                    metavar=("ALONG", "ACROSS"), help="finger size in mm (default 12 10)")
    args = ap.parse_args(argv)
    n = 8 if args.quick else 64
    finger_mm = tuple(float(v) for v in args.finger_mm)
    if min(finger_mm) <= 0:
        ap.error(f"--finger-mm must be two positive sizes in mm; got {args.finger_mm}")
    with ProcessPoolExecutor(args.workers) as ex:
        rows = [r for rs in ex.map(run, [(i, args.seed, finger_mm) for i in range(n)])
                for r in rs]
    summary = {}
    for mode in MODES:
        mine = [r for r in rows if r["mode"] == mode]
        turning = [r["rotation_rms_deg"] for r in mine if r["turn_deg"]]
        tot = {k: int(sum(r[k] or 0 for r in mine)) for k in
               ("stall_true", "stall_detected", "stall_false", "backtrack_true",
                "backtrack_detected", "backtrack_false", "gap_false")}
        summary[mode] = {
            **span_summary(mine),
            "median_rotation_rms_deg_turning": float(np.median(turning)) if turning else None,
            **tot}
    lines = []
    for mode, s in summary.items():
        lines.append(
            f"- {mode}: span error median {fmt(s['median_abs_span_error_pct'])} %, worst "
            f"{fmt(s['worst_abs_span_error_pct'])} % ({s['swipes_over_1pct']} of {s['swipes']} "
            f"over 1 %); along / across RMS median {fmt(s['median_along_rms_px'])} / "
            f"{fmt(s['median_across_rms_px'])} px; rotation RMS median on the turning swipes "
            f"{fmt(s['median_rotation_rms_deg_turning'])} deg; stalls {s['stall_detected']} of "
            f"{s['stall_true']}, backtracks {s['backtrack_detected']} of {s['backtrack_true']}; "
            f"reported where the truth has none: {s['stall_false']} stalls, "
            f"{s['backtrack_false']} backtracks, {s['gap_false']} gaps")
    cols = ["case", "mode", "span_error_pct", "along_rms_px", "across_rms_px", "rotation_rms_deg",
            "stall_detected", "stall_true", "backtrack_detected", "backtrack_true", "stall_false",
            "backtrack_false", "gap_false"]
    heads = ["case", "mode", "span err %", "along rms px", "across rms px", "rot rms deg",
             "stalls found", "stalls", "backtracks found", "backtracks", "false stalls",
             "false backtracks", "false gaps"]
    md = (f"# Random swipes{' (quick)' if args.quick else ''}\n\n{n} swipes with random settings "
          f"(seed {args.seed}; see case()), fingers {finger_mm[0]:g} x {finger_mm[1]:g} mm, "
          f"fast mode and the streaming stitcher ignore rotation:\n\n" + "\n".join(lines)
          + "\n\n" + table(rows, cols, heads) + "\n")
    print(md)
    name = ("random" if finger_mm == (12.0, 10.0)
            else f"random_finger{finger_mm[0]:g}x{finger_mm[1]:g}")
    paths = write(name + ("_quick" if args.quick else ""),
                  {"environment": environment(), "seed": args.seed, "finger_mm": list(finger_mm),
                   "rows": rows, "summary": summary}, md)
    print("wrote", *paths)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
