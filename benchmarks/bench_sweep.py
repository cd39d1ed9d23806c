"""Operating-envelope sweep: >= 2000 small simulated swipes, locally and on a Dask cluster.

Run from a clean checkout:  python benchmarks/bench_sweep.py  [--quick] [--workers N]
                            [--scheduler tcp://host:8786]

Runs the grid (rows x frame rate x speed x finger class x seeds; 8 x 64-ish strips, 3 mm
swipes, small fingers reused per class) with stripstitch.sweep.run_sweep twice: in local
worker processes (results/sweep_local.csv) and on a Dask distributed cluster
(results/sweep_dask.parquet; a LocalCluster unless --scheduler is given), checks both give the
same rows, then derives the envelope (highest speed with |span error| < 1 % and no false gap
per rows x frame rate; lowest frame rate for 100 mm/s per rows) beside the analytic no-gap
bound f >= v / (R p) and writes results/sweep.json/.md and results/envelope.png.
Both runs resume from their output files; delete them to start over.
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np

from _common import RESULTS, environment, table, write

from stripstitch import sweep

GRID = {
    "n_rows": [4, 8, 16],
    "frame_rate_hz": [500.0, 1000.0, 2000.0, 4000.0],
    "speed_mm_s": [25.0, 50.0, 100.0, 200.0, 300.0, 400.0],
    "pattern": ["right_loop", "whorl"],
    "seed": list(range(14)),
}
FIXED = {"method": "default", "n_cols": 64, "length_mm": 3.0, "finger_length_mm": 8.0,
         "finger_width_mm": 6.0, "snr_db": 30.0, "metrics": "trajectory"}
QUICK_GRID = dict(GRID, seed=[0], pattern=["right_loop"])


def _compare(a, b):
    ka = {r["case_id"]: dict(r) for r in a.rows}
    kb = {r["case_id"]: dict(r) for r in b.rows}
    mismatched, max_diff = 0, 0.0
    for k, ra in ka.items():
        rb = kb.get(k)
        if rb is None:
            mismatched += 1
            continue
        same = True
        for col, va in ra.items():
            vb = rb.get(col)
            if isinstance(va, float) and isinstance(vb, float):
                if not (va == vb or (np.isnan(va) and np.isnan(vb))):
                    same = False
                    max_diff = max(max_diff, abs(va - vb))
            elif va != vb:
                same = False
        mismatched += not same
    return {"rows_local": len(ka), "rows_dask": len(kb), "rows_differing": mismatched,
            "max_abs_difference": max_diff, "same_case_ids": set(ka) == set(kb)}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="one seed, one finger class (72 swipes)")
    ap.add_argument("--workers", type=int, default=None, help="local worker processes")
    ap.add_argument("--scheduler", default=None, help="Dask scheduler address (default: LocalCluster)")
    args = ap.parse_args(argv)
    grid = QUICK_GRID if args.quick else GRID
    tag = "_quick" if args.quick else ""
    os.makedirs(RESULTS, exist_ok=True)
    local_path = os.path.join(RESULTS, f"sweep_local{tag}.csv")
    dask_path = os.path.join(RESULTS, f"sweep_dask{tag}.parquet")
    n_cases = len(sweep.expand_grid(grid, **FIXED))
    print(f"{n_cases} swipes per run", flush=True)

    t0 = time.perf_counter()
    local = sweep.run_sweep(grid, local_path, fixed=FIXED, workers=args.workers)
    t_local = time.perf_counter() - t0
    print(f"local processes: {len(local)} rows in {t_local:.1f} s", flush=True)

    from dask.distributed import Client, LocalCluster

    t0 = time.perf_counter()
    if args.scheduler:
        dask_tab = sweep.run_sweep(grid, dask_path, fixed=FIXED, scheduler=args.scheduler)
        where = args.scheduler
    else:
        n = args.workers or os.cpu_count() or 1
        with LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                          dashboard_address=None) as cluster, Client(cluster) as client:
            dask_tab = sweep.run_sweep(grid, dask_path, fixed=FIXED, scheduler=client)
        where = f"LocalCluster({n} worker processes)"
    t_dask = time.perf_counter() - t0
    print(f"dask ({where}): {len(dask_tab)} rows in {t_dask:.1f} s", flush=True)
    agreement = _compare(local, sweep.read_table(dask_path))
    print("agreement:", agreement, flush=True)

    errors = sum(1 for r in local.rows if r.get("error"))
    env = sweep.envelope(local)
    env_rows = []
    for (r, f), lim, frac in zip(env.groups, env.limit, env.pass_fraction):
        env_rows.append({"n_rows": r, "frame_rate_hz": f, "max_true_speed_mm_s": lim,
                         "no_gap_bound_mm_s": f * r * 50.8 / 1000.0,
                         "pass_fraction_by_speed": " ".join(f"{v:.2f}" for v in frac)})
    mfr = sweep.min_frame_rate(local, speed_mm_s=100.0)
    mfr_rows = [{"n_rows": g[0], "min_frame_rate_hz": lim,
                 "no_gap_bound_hz": sweep.no_gap_frame_rate_hz(100.0, g[0]),
                 "bound_50pct_overlap_hz": sweep.no_gap_frame_rate_hz(100.0, g[0], overlap_rows=g[0] / 2)}
                for g, lim in zip(mfr.groups, mfr.limit)]
    t_env = table(env_rows, ["n_rows", "frame_rate_hz", "max_true_speed_mm_s", "no_gap_bound_mm_s",
                             "pass_fraction_by_speed"])
    # The same per finger class (one finger per class, reused over seeds).
    per_class, per_class_md = {}, []
    for pattern in grid["pattern"]:
        e = sweep.envelope(local, where={"pattern": pattern})
        m = sweep.min_frame_rate(local.select(pattern=pattern), speed_mm_s=100.0)
        prow = [{"n_rows": g[0], "frame_rate_hz": g[1], "max_true_speed_mm_s": lim,
                 "no_gap_bound_mm_s": g[1] * g[0] * 50.8 / 1000.0,
                 "pass_fraction_by_speed": " ".join(f"{v:.2f}" for v in frac)}
                for g, lim, frac in zip(e.groups, e.limit, e.pass_fraction)]
        mrow = [{"n_rows": g[0], "min_frame_rate_hz": lim,
                 "no_gap_bound_hz": sweep.no_gap_frame_rate_hz(100.0, g[0])}
                for g, lim in zip(m.groups, m.limit)]
        per_class[pattern] = {"envelope": e.to_dict(), "envelope_rows": prow, "min_frame_rate_100mm_s": mrow}
        per_class_md.append(f"### Finger class {pattern}\n\n"
                            + table(prow, ["n_rows", "frame_rate_hz", "max_true_speed_mm_s",
                                           "no_gap_bound_mm_s", "pass_fraction_by_speed"])
                            + "\n\nLowest frame rate for 100 mm/s:\n\n"
                            + table(mrow, ["n_rows", "min_frame_rate_hz", "no_gap_bound_hz"]) + "\n")
        try:
            from stripstitch.plots import plot_envelope

            plot_envelope(e).savefig(os.path.join(RESULTS, f"envelope{tag}_{pattern}.png"), dpi=100)
        except ImportError:
            pass
    t_mfr = table(mfr_rows, ["n_rows", "min_frame_rate_hz", "no_gap_bound_hz", "bound_50pct_overlap_hz"])
    speeds = " ".join(f"{v:g}" for v in env.x_values)
    md = (f"# Operating-envelope sweep{' (quick)' if args.quick else ''}\n\n"
          f"{n_cases} simulated swipes per run (grid {dict(grid)}; fixed {FIXED}); "
          f"stitch mode {FIXED['method']!r}. A swipe passes when |span error| < 1 % and no gap "
          f"is reported that matches no true gap. Cases failing with an exception: {errors}.\n\n"
          f"Local processes: {t_local:.1f} s; Dask {where}: {t_dask:.1f} s (wall times on a shared "
          f"machine; 0 s means every row was resumed from the output file). Agreement: {agreement}.\n\n"
          f"## Highest true speed per rows x frame rate (speeds swept: {speeds} mm/s)\n\n{t_env}\n\n"
          f"## Lowest frame rate for 100 mm/s\n\n{t_mfr}\n\n"
          "## Per finger class\n\n" + "\n".join(per_class_md) + "\n"
          "Analytic bound: per-frame travel v / f <= (R - overlap) p (REFERENCE-VALUES.md, no-gap "
          "frame rate). Speeds are an unsourced modelling assumption (section 7).\n")
    print(md)
    try:
        from stripstitch.plots import plot_envelope

        plot_envelope(env).savefig(os.path.join(RESULTS, f"envelope{tag}.png"), dpi=100)
    except ImportError:
        pass
    paths = write(f"sweep{tag}", {"environment": environment(), "n_cases": n_cases, "grid": grid,
                                  "fixed": FIXED, "seconds_local": t_local, "seconds_dask": t_dask,
                                  "dask": where, "agreement": agreement, "errors": errors,
                                  "envelope": env.to_dict(), "envelope_rows": env_rows,
                                  "min_frame_rate_100mm_s": mfr_rows, "per_class": per_class}, md)
    print("wrote", *paths)
    return 0 if agreement["rows_differing"] == 0 else 1


if __name__ == "__main__":
    raise SystemExit(main())
