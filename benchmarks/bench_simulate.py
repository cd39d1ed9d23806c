"""Simulation throughput: frames/s of stripstitch.simulate.capture for a few geometries.

Run from a clean checkout:  python benchmarks/bench_simulate.py [--repeat N]
Prints a table and writes benchmarks/results/bench_simulate.json and .md.

The finger is generated once per case (its time is reported separately): the capture of a
swipe, not the synthetic finger, is measured here. Timings are wall-clock, best of N repeats on
one process; they are machine-dependent and never asserted in tests.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from stripstitch.simulate import Sensor, capture, make_finger, make_motion  # noqa: E402

# (name, rows, cols, frame rate Hz, speed mm/s, swipe length mm, exposure steps)
CASES = [
    ("8x192 @ 4 kHz, 0.15 s", 8, 192, 4000.0, 100.0, 15.0, 4),
    ("8x192 @ 4 kHz, 1 exposure step", 8, 192, 4000.0, 100.0, 15.0, 1),
    ("16x128 @ 2 kHz", 16, 128, 2000.0, 100.0, 15.0, 4),
    ("8x64 @ 2 kHz (sweep-sized)", 8, 64, 2000.0, 100.0, 6.0, 4),
    ("32x256 @ 1 kHz", 32, 256, 1000.0, 100.0, 15.0, 4),
]


def best_of(fn, repeat):
    times = []
    out = None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3, help="repeats per case (best is reported); default 3")
    ap.add_argument("--out", default=str(Path(__file__).resolve().parent / "results"),
                    help="output folder; default benchmarks/results")
    args = ap.parse_args(argv)

    finger_s, finger = best_of(lambda: make_finger("right_loop", size_mm=(20.0, 14.0), rng=0), args.repeat)
    rows = []
    for name, n_rows, n_cols, fr, speed, length, steps in CASES:
        sensor = Sensor(n_rows=n_rows, n_cols=n_cols)
        motion = make_motion(frame_rate_hz=fr, speed_mm_s=speed, length_mm=length,
                             start_um=(2500.0, 7000.0), n_rows=n_rows, rng=0)
        sec, cap = best_of(lambda: capture(finger, sensor, motion, snr_db=30.0, exposure_steps=steps, rng=0),
                           args.repeat)
        rows.append({"case": name, "n_rows": n_rows, "n_cols": n_cols, "frame_rate_hz": fr,
                     "exposure_steps": steps, "n_frames": cap.n_frames, "capture_s": sec,
                     "frames_per_s": cap.n_frames / sec, "plates_per_s": cap.frames.size / sec,
                     "real_time_factor": cap.n_frames / sec / fr})

    header = (f"{'case':34s} {'frames':>7s} {'capture s':>10s} {'frames/s':>10s} {'Mplates/s':>10s} "
              f"{'x real time':>12s}")
    lines = [header, "-" * len(header)]
    for r in rows:
        lines.append(f"{r['case']:34s} {r['n_frames']:7d} {r['capture_s']:10.3f} {r['frames_per_s']:10.0f} "
                     f"{r['plates_per_s'] / 1e6:10.2f} {r['real_time_factor']:12.2f}")
    lines.append(f"finger generation (20 x 14 mm at 12.7 um, 1575 x 1102 cells): {finger_s:.3f} s")
    print("\n".join(lines))

    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    meta = {"python": platform.python_version(), "numpy": np.__version__, "machine": platform.machine(),
            "cpu_count": os.cpu_count(), "repeat": args.repeat, "finger_generation_s": finger_s}
    (out / "bench_simulate.json").write_text(json.dumps({"meta": meta, "rows": rows}, indent=2) + "\n")
    md = ["# Simulation throughput (benchmarks/bench_simulate.py)", "",
          f"Best of {args.repeat}; Python {meta['python']}, numpy {meta['numpy']}, {meta['cpu_count']} cores. "
          f"Finger generation (not included below): {finger_s:.3f} s.", "",
          "| case | frames | capture s | frames/s | Mplates/s | x real time |", "|---|---|---|---|---|---|"]
    for r in rows:
        md.append(f"| {r['case']} | {r['n_frames']} | {r['capture_s']:.3f} | {r['frames_per_s']:.0f} | "
                  f"{r['plates_per_s'] / 1e6:.2f} | {r['real_time_factor']:.2f} |")
    (out / "bench_simulate.md").write_text("\n".join(md) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
