"""Strips of 2 and 3 rows: the delay between rows against the pairs alone and the chains.

Run from a clean checkout:  python benchmarks/bench_rows.py  [--workers N]

The shortest strips the contract allows place their frames by the multi-baseline pairs, whose
one- or two-row overlaps pull small shifts towards zero; default mode takes their along steps
from the delay between neighbouring rows (stripstitch.register.row_delay). Side by side in one
run, on the same simulated swipes: default mode, default mode without the row delay (the pairs
and the model refinement alone: pipeline._DELAY_MAX_ROWS = 0), and the chains of scikit-image
``phase_cross_correlation`` and OpenCV ``phaseCorrelate`` between successive frames.

Swipes: eight drawn at random for each of 2 and 3 rows (8 kHz, 128 or 192 columns, 30-90
mm/s, 20-40 dB, constant or human speed profile; seeds 4200 + i as in the refinement's
measurements), and nine chosen ones (a stall and a backtrack, 12 dB, an 8-degree slant, a
too-fast jump, dropped frames, 150 mm/s at 4 kHz, a 3-degree turn; 3 rows with a human profile
and with a stall). Errors against the simulator's truth (stripstitch.evaluate). Writes
benchmarks/results/rows.json/.md. Synthetic prints; speeds are an unsourced modelling
assumption (REFERENCE-VALUES.md section 7).
"""

from __future__ import annotations

import argparse
import time
from concurrent.futures import ProcessPoolExecutor

import numpy as np

from _common import environment, fmt, table, write

from stripstitch import evaluate as ev
from stripstitch import pipeline, simulate
from stripstitch.sweep import reconstruct

PATTERNS = ("arch", "tented_arch", "left_loop", "right_loop", "whorl", "twin_loop")
METHODS = ("default", "pairs only", "skimage_chain", "opencv_chain")
CHOSEN = {
    "2 rows, stall and backtrack": dict(pattern="right_loop", n_rows=2, n_cols=192, frame_rate_hz=8000.0,
                                        speed_mm_s=60.0, snr_db=30.0, profile="human",
                                        stalls=((4.0, 0.05),), backtracks=((7.0, 0.4),)),
    "2 rows, 12 dB": dict(pattern="whorl", n_rows=2, n_cols=160, frame_rate_hz=8000.0,
                          speed_mm_s=70.0, snr_db=12.0),
    "2 rows, slant 8 deg": dict(pattern="left_loop", n_rows=2, n_cols=192, frame_rate_hz=8000.0,
                                speed_mm_s=60.0, snr_db=30.0, skew_deg=8.0),
    "2 rows, too fast": dict(pattern="twin_loop", n_rows=2, n_cols=192, frame_rate_hz=8000.0,
                             speed_mm_s=60.0, snr_db=30.0, too_fast=((5.0, 0.4),)),
    "2 rows, dropped frames": dict(pattern="arch", n_rows=2, n_cols=192, frame_rate_hz=8000.0,
                                   speed_mm_s=60.0, snr_db=30.0, drop_frames=tuple(range(300, 310))),
    "2 rows, 150 mm/s at 4 kHz": dict(pattern="tented_arch", n_rows=2, n_cols=128,
                                      frame_rate_hz=4000.0, speed_mm_s=150.0, snr_db=30.0),
    "2 rows, turn 3 deg": dict(pattern="right_loop", n_rows=2, n_cols=192, frame_rate_hz=8000.0,
                               speed_mm_s=60.0, snr_db=30.0, rotation_deg=3.0),
    "3 rows, human": dict(pattern="left_loop", n_rows=3, n_cols=192, frame_rate_hz=6000.0,
                          speed_mm_s=80.0, snr_db=25.0, profile="human"),
    "3 rows, stall": dict(pattern="whorl", n_rows=3, n_cols=128, frame_rate_hz=6000.0,
                          speed_mm_s=60.0, snr_db=30.0, stalls=((4.0, 0.05),)),
}


def _capture(key):
    kind, arg = key
    if kind == "chosen":
        p = dict(CHOSEN[arg])
        pattern = p.pop("pattern")
        finger = simulate.make_finger(pattern, size_mm=(12.0, 10.0), rng=77)
        return arg, simulate.swipe(pattern, finger=finger, rng=5, **p)
    rows, i = arg
    r = np.random.default_rng(4200 + i)
    pattern = str(r.choice(PATTERNS))
    p = dict(n_rows=rows, n_cols=int(r.choice([128, 192])), frame_rate_hz=8000.0,
             speed_mm_s=float(r.uniform(30, 90)), snr_db=float(r.uniform(20, 40)),
             profile=str(r.choice(["constant", "human"])))
    finger = simulate.make_finger(pattern, size_mm=(12.0, 10.0), rng=4300 + i)
    desc = (f"{rows} rows, random {i}: {pattern} x{p['n_cols']} {p['speed_mm_s']:.0f} mm/s "
            f"{p['snr_db']:.0f} dB {p['profile']}")
    return desc, simulate.swipe(pattern, finger=finger, rng=4400 + i, **p)


def run(key):
    desc, cap = _capture(key)
    out = []
    for method in METHODS:
        t0 = time.perf_counter()
        if method == "pairs only":
            keep = pipeline._DELAY_MAX_ROWS
            pipeline._DELAY_MAX_ROWS = 0
            try:
                res = reconstruct(cap, "default")
            finally:
                pipeline._DELAY_MAX_ROWS = keep
        else:
            res = reconstruct(cap, method)
        secs = time.perf_counter() - t0
        d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
        row = {"case": desc, "method": method, "n_frames": int(len(cap.frames)), "seconds": secs}
        for k in ("span_error_pct", "along_rms_px", "across_rms_px", "rotation_rms_deg",
                  "gap_true", "gap_detected", "gap_false", "stall_detected", "backtrack_detected"):
            row[k] = d.get(k)
        out.append(row)
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--workers", type=int, default=2, help="processes (default 2)")
    args = ap.parse_args(argv)
    keys = ([("random", (rows, i)) for rows in (2, 3) for i in range(8)]
            + [("chosen", name) for name in CHOSEN])
    with ProcessPoolExecutor(args.workers) as ex:
        rows = [r for rs in ex.map(run, keys) for r in rs]
    summary = {}
    for method in METHODS:
        mine = [r for r in rows if r["method"] == method]
        for label, sel in (("random 2 rows", lambda r: r["case"].startswith("2 rows, random")),
                           ("random 3 rows", lambda r: r["case"].startswith("3 rows, random")),
                           ("chosen", lambda r: "random" not in r["case"])):
            part = [r for r in mine if sel(r)]
            span = np.array([abs(r["span_error_pct"]) for r in part])
            summary.setdefault(label, {})[method] = {
                "median_abs_span_error_pct": float(np.median(span)),
                "worst_abs_span_error_pct": float(span.max()),
                "median_along_rms_px": float(np.median([r["along_rms_px"] for r in part])),
                "median_across_rms_px": float(np.median([r["across_rms_px"] for r in part]))}
    lines = ["| swipes | method | span err median % | span err worst % | along RMS median px "
             "| across RMS median px |", "|---|---|---|---|---|---|"]
    for label, per in summary.items():
        for method, s in per.items():
            lines.append(f"| {label} | {method} | {fmt(s['median_abs_span_error_pct'])} | "
                         f"{fmt(s['worst_abs_span_error_pct'])} | {fmt(s['median_along_rms_px'])} | "
                         f"{fmt(s['median_across_rms_px'])} |")
    cols = ["case", "method", "span_error_pct", "along_rms_px", "across_rms_px", "rotation_rms_deg",
            "gap_true", "gap_detected", "gap_false", "stall_detected", "backtrack_detected",
            "n_frames", "seconds"]
    heads = ["case", "method", "span err %", "along rms px", "across rms px", "rot rms deg",
             "gaps", "gaps found", "false gaps", "stalls found", "backtracks found", "T", "s"]
    md = ("# Strips of 2 and 3 rows\n\nDefault mode (along steps from the delay between rows), "
          "default mode without it (pairs only), and the skimage / OpenCV chains, on the same "
          "swipes (see the module notes). Errors over frames with contact >= 0.5.\n\n"
          + "\n".join(lines) + "\n\n" + table(rows, cols, heads) + "\n")
    print(md)
    paths = write("rows", {"environment": environment(), "rows": rows, "summary": summary}, md)
    print("wrote", *paths)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
