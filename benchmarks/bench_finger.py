"""Benchmark of the synthetic finger: time to grow fingers of each pattern class and skin.

Run from a clean checkout:  python benchmarks/bench_finger.py [--repeat N] [--quick]
Prints a table and writes benchmarks/results/bench_finger.json (and .md). The target is a
20 mm x 14 mm finger at 12.7 um spacing (1575 x 1102 cells) in under about 2 s on one core.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import sys
import time
from pathlib import Path

# one core: keep BLAS/FFT thread pools from using more (set before numpy is imported)
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from stripstitch.simulate.finger import PATTERNS, make_finger  # noqa: E402

CASES = ([("full", p, "normal", (20.0, 14.0), 12.7) for p in PATTERNS]
         + [("full", "right_loop", s, (20.0, 14.0), 12.7) for s in ("dry", "wet")]
         + [("small", "right_loop", "normal", (8.0, 8.0), 12.7),
            ("coarse", "right_loop", "normal", (20.0, 14.0), 25.4)])


def time_case(pattern, skin, size_mm, spacing_um, repeat):
    times, cpu = [], []
    for k in range(repeat):
        t0, c0 = time.perf_counter(), time.process_time()
        f = make_finger(pattern, size_mm=size_mm, spacing_um=spacing_um, skin=skin, rng=k)
        times.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
    return f, times, cpu


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3, help="runs per case (default 3)")
    ap.add_argument("--quick", action="store_true", help="one run of the default finger only")
    args = ap.parse_args(argv)
    cases = CASES[3:4] if args.quick else CASES
    make_finger(size_mm=(3.0, 3.0), rng=0)          # warm-up (imports, FFT plans)
    rows = []
    for label, pattern, skin, size, spacing in cases:
        f, times, cpu = time_case(pattern, skin, size, spacing, 1 if args.quick else args.repeat)
        rows.append(dict(case=label, pattern=pattern, skin=skin, size_mm=list(size),
                         spacing_um=spacing, shape=list(f.shape),
                         median_s=statistics.median(times), min_s=min(times),
                         cpu_median_s=statistics.median(cpu), runs=len(times),
                         cells_per_s=f.shape[0] * f.shape[1] / statistics.median(times)))
    # wall time suffers when the machine is shared; the process CPU time (one thread) does not
    head = (f"{'case':7s} {'pattern':12s} {'skin':7s} {'shape':>12s} {'median s':>9s} "
            f"{'min s':>7s} {'cpu s':>7s}")
    lines = [head, "-" * len(head)]
    for r in rows:
        shape = f"{r['shape'][0]}x{r['shape'][1]}"
        lines.append(f"{r['case']:7s} {r['pattern']:12s} {r['skin']:7s} {shape:>12s} "
                     f"{r['median_s']:9.3f} {r['min_s']:7.3f} {r['cpu_median_s']:7.3f}")
    print("\n".join(lines))
    out = Path(__file__).resolve().parent / "results"
    out.mkdir(exist_ok=True)
    meta = dict(python=platform.python_version(), numpy=np.__version__,
                machine=platform.machine(), threads=os.environ.get("OMP_NUM_THREADS"),
                load_avg_1min=os.getloadavg()[0], cpu_count=os.cpu_count(),
                target_s=2.0, date_utc=time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()))
    (out / "bench_finger.json").write_text(json.dumps(dict(meta=meta, rows=rows), indent=2))
    (out / "bench_finger.md").write_text("```\n" + "\n".join(lines) + "\n```\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
