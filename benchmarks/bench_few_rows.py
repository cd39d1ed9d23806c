"""Strips of few rows over a wide envelope: random simulated swipes, 2 to 8 rows.

Run from a clean checkout:  python benchmarks/bench_few_rows.py  [--per-rows N] [--workers N]

bench_rows.py measures 2- and 3-row strips where they are at ease (8 kHz, under a quarter of
a pixel per frame). Here every row count from 2 to 5, and 6 and 8 for comparison, gets the
same wide draw: 2-8 kHz, 96-256 columns, 0.1-0.65 (R - 1) px per frame (up to two thirds of
the strip per frame), 15-40 dB, constant / human / accelerating speed, skew within 6 degrees,
a quarter of the swipes with a 40 ms stall (instant, as the simulator makes it), six pattern
classes on a 12 x 10 mm finger. The draw stresses the displacement per frame, not the speed:
at 8 kHz on 8 rows it reaches 1.8 m/s, far beyond a finger's (a second summary keeps the
swipes of at most 300 mm/s); seeds 5000 + i (parameters), 5500 + i (finger), 5900 + i
(capture). Default mode against the simulator's truth (stripstitch.evaluate), and whether
the report called the swipe usable: a swipe more than 1 % off that is called usable is a
silent failure (the report's reasons for strips of few rows are not counted as a warning
here). Writes benchmarks/results/few_rows.json/.md. Synthetic prints; the speeds are an
unsourced modelling assumption (REFERENCE-VALUES.md section 7).
"""

from __future__ import annotations

import argparse
import time
from concurrent.futures import ProcessPoolExecutor

import numpy as np

from _common import environment, fmt, table, write

from stripstitch import evaluate as ev
from stripstitch import simulate, stitch

PATTERNS = ("arch", "tented_arch", "left_loop", "right_loop", "whorl", "twin_loop")
ROW_COUNTS = (2, 3, 4, 5, 6, 8)
SEED = 5000


def draw(n_rows, i, seed0=SEED):
    """Pattern, swipe parameters and a description of swipe i with n_rows rows."""
    r = np.random.default_rng(seed0 + i)
    pattern = str(r.choice(PATTERNS))
    rate = float(r.choice([2000.0, 4000.0, 6000.0, 8000.0]))
    p = dict(n_rows=n_rows, n_cols=int(r.choice([96, 128, 192, 256])), frame_rate_hz=rate,
             speed_mm_s=float(r.uniform(0.1, 0.65) * (n_rows - 1) * rate * 0.0508),
             snr_db=float(r.uniform(15, 40)),
             profile=str(r.choice(["constant", "human", "accel_decel"])),
             skew_deg=float(r.uniform(-6, 6)))
    if r.uniform() < 0.25:
        p["stalls"] = ((4.0, 0.04),)
    desc = (f"{n_rows}x{p['n_cols']} {pattern} {rate / 1000:.0f} kHz "
            f"{p['speed_mm_s'] / 50.8e-3 / rate:.2f} px/frame {p['snr_db']:.0f} dB {p['profile']}"
            + (" stall" if "stalls" in p else ""))
    return pattern, p, desc


def run(args):
    n_rows, i = args
    pattern, p, desc = draw(n_rows, i)
    finger = simulate.make_finger(pattern, size_mm=(12.0, 10.0), rng=SEED + 500 + i)
    cap = simulate.swipe(pattern, finger=finger, rng=SEED + 900 + i, **p)
    t0 = time.perf_counter()
    res = stitch(cap.frames, pitch_um=float(cap.pitch_um), frame_rate_hz=p["frame_rate_hz"])
    secs = time.perf_counter() - t0
    d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
    return {"case": desc, "rows": n_rows, "index": i, "speed_mm_s": p["speed_mm_s"],
            "placement": res.options["placement"],
            "verdict": res.report.verdict, "span_error_pct": d["span_error_pct"],
            "along_rms_px": d["along_rms_px"], "across_rms_px": d["across_rms_px"],
            "n_frames": int(len(cap.frames)), "seconds": secs}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--per-rows", type=int, default=30, help="swipes per row count (default 30)")
    ap.add_argument("--workers", type=int, default=2, help="processes (default 2)")
    args = ap.parse_args(argv)
    keys = [(n, i) for n in ROW_COUNTS for i in range(args.per_rows)]
    with ProcessPoolExecutor(args.workers) as ex:
        rows = list(ex.map(run, keys))
    summary = {}
    for n, cap_mm_s in [(n, None) for n in ROW_COUNTS] + [(n, 300.0) for n in ROW_COUNTS]:
        part = [r for r in rows if r["rows"] == n
                and (cap_mm_s is None or r["speed_mm_s"] <= cap_mm_s)]
        if not part:
            continue
        span = np.array([abs(r["span_error_pct"]) for r in part])
        usable = np.array([r["verdict"] == "usable" for r in part])
        summary[f"{n} rows" + ("" if cap_mm_s is None else ", <= 300 mm/s")] = {
            "swipes": len(part),
            "median_abs_span_error_pct": float(np.median(span)),
            "mean_abs_span_error_pct": float(np.mean(span)),
            "worst_abs_span_error_pct": float(span.max()),
            "swipes_over_1pct": int((span > 1.0).sum()),
            "called_usable": int(usable.sum()),
            "usable_over_1pct": int((usable & (span > 1.0)).sum()),
            "median_along_rms_px": float(np.median([r["along_rms_px"] for r in part])),
            "median_across_rms_px": float(np.median([r["across_rms_px"] for r in part]))}
    lines = ["| rows | swipes | span err median % | mean % | worst % | over 1 % | called usable "
             "| usable and over 1 % | along RMS median px | across RMS median px |",
             "|---|---|---|---|---|---|---|---|---|---|"]
    for label, s in summary.items():
        lines.append(f"| {label} | {s['swipes']} | {fmt(s['median_abs_span_error_pct'])} | "
                     f"{fmt(s['mean_abs_span_error_pct'])} | {fmt(s['worst_abs_span_error_pct'])} | "
                     f"{s['swipes_over_1pct']} | {s['called_usable']} | {s['usable_over_1pct']} | "
                     f"{fmt(s['median_along_rms_px'])} | {fmt(s['median_across_rms_px'])} |")
    cols = ["case", "placement", "verdict", "span_error_pct", "along_rms_px", "across_rms_px",
            "n_frames", "seconds"]
    heads = ["case", "placement", "verdict", "span err %", "along rms px", "across rms px", "T", "s"]
    md = ("# Strips of few rows over a wide envelope\n\nDefault mode on random simulated swipes "
          "(see the module notes); errors against the simulator's truth over frames with "
          "contact >= 0.5.\n\n" + "\n".join(lines) + "\n\n" + table(rows, cols, heads) + "\n")
    print(md)
    paths = write("few_rows", {"environment": environment(), "rows": rows, "summary": summary}, md)
    print("wrote", *paths)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
