"""Gap benchmark: too-fast swipes with random settings on the two target geometries, and
whether each injected gap is reported (and nothing else).

Run from a clean checkout:  python benchmarks/bench_gaps.py  [--quick]

Each swipe (stripstitch.simulate.swipe, seeded) holds one too-fast stretch (0.6 to 1.5 mm at a
random place), a human or constant speed profile of 60 to 150 mm/s, 12 to 40 dB, and a stall in
about half of them. The simulator's truth has a gap where one frame step exceeds the strip's
rows; a reported gap is matched to a true one within two frames (stripstitch.evaluate).
Default mode (fast mode shares the gap logic). Writes benchmarks/results/gaps.json/.md.
"""

from __future__ import annotations

import argparse

import numpy as np

from _common import environment, fmt, table, write

from stripstitch import evaluate as ev
from stripstitch import simulate, stitch

PATTERNS = ("arch", "tented_arch", "left_loop", "right_loop", "whorl", "twin_loop")


def case(i):
    r = np.random.default_rng(9900 + i)
    rows, cols, rate = [(8, 192, 4000.0), (16, 128, 2000.0)][i % 2]
    where = float(r.uniform(2.0, 10.0))
    p = dict(n_rows=rows, n_cols=cols, frame_rate_hz=rate,
             profile=str(r.choice(["constant", "human"])),
             speed_mm_s=float(r.uniform(60, 150)), snr_db=float(r.uniform(12, 40)),
             too_fast=((where, float(r.uniform(0.6, 1.5))),))
    if r.random() < 0.5:
        p["stalls"] = ((float(r.uniform(2, 10)), float(r.uniform(0.02, 0.06))),)
    return str(r.choice(PATTERNS)), p, 9950 + i, 9970 + i


def run(i):
    pattern, p, finger_seed, seed = case(i)
    finger = simulate.make_finger(pattern, size_mm=(12.0, 10.0), rng=finger_seed)
    cap = simulate.swipe(pattern, finger=finger, rng=seed, **p)
    res = stitch(cap.frames, pitch_um=float(cap.pitch_um), frame_rate_hz=p["frame_rate_hz"],
                 timestamps_s=np.asarray(cap.times_s, dtype=np.float64))
    d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
    step = np.diff(cap.positions[:, 0])
    k = int(np.argmax(step))
    return {"case": f"{pattern} {p['n_rows']}x{p['n_cols']} {p['profile']} "
                    f"{p['speed_mm_s']:.0f} mm/s {p['snr_db']:.0f} dB"
                    + (" stall" if "stalls" in p else ""),
            "largest_step_rows": float(step[k]), "contact_at_jump": float(cap.contact[k]),
            "gap_true": int(d["gap_true"]), "gap_found": int(d["gap_detected"]),
            "gap_false": int(d["gap_false"]), "span_error_pct": d["span_error_pct"]}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="eight swipes")
    args = ap.parse_args(argv)
    rows = []
    for i in range(8 if args.quick else 30):
        r = run(i)
        rows.append(r)
        print(f"{r['case']:52s} step {r['largest_step_rows']:6.2f} rows  gaps {r['gap_found']}/"
              f"{r['gap_true']}  false {r['gap_false']}", flush=True)
    n_true = sum(r["gap_true"] for r in rows)
    n_found = sum(r["gap_found"] for r in rows)
    n_false = sum(r["gap_false"] for r in rows)
    summary = {"swipes": len(rows), "gaps_true": n_true, "gaps_found": n_found,
               "gaps_false": n_false}
    cols = ["case", "largest_step_rows", "contact_at_jump", "gap_true", "gap_found", "gap_false",
            "span_error_pct"]
    heads = ["case", "largest step (rows)", "contact at jump", "gaps", "found", "false",
             "span err %"]
    md = (f"# Gaps{' (quick)' if args.quick else ''}\n\n"
          f"{len(rows)} too-fast swipes with random settings, default mode: {n_found} of {n_true} "
          f"injected gaps reported, {n_false} reported where the truth has none (largest step "
          "under the strip's rows, so a sliver of motion-blurred overlap remained).\n\n"
          + table(rows, cols, heads) + "\n")
    print()
    print(md)
    paths = write("gaps_quick" if args.quick else "gaps",
                  {"environment": environment(), "rows": rows, "summary": summary}, md)
    print("wrote", *paths)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
