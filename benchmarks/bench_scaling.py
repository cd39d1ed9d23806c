"""Scaling benchmark: stitching time and memory against swipe length, columns and rows.

Run from a clean checkout:  python benchmarks/bench_scaling.py  [--quick] [--full]

Frames are cut exactly (no interpolation) from a synthetic ridge-like texture (40 plane waves,
periods 7-12 px, random directions), moving 0.5 px per frame along and 0.05 px across, with
white noise at 30 dB SNR and 8-bit quantisation; so that 100 000 frames need no finger
100 m long. Series: T = 100 ... 100 000 frames (8 x 192), C = 64 ... 512 columns (T = 1000,
8 rows), R = 2 ... 64 rows (T = 1000, 128 columns). Each point is timed once (best of 2 below
2000 frames) and its peak traced allocation measured in a second run (tracemalloc; skipped
above --max-memory-frames), and a point whose peak, extrapolated from the previous points of
its series, exceeds --memory-budget-mb (default 4000) is skipped and listed. The fitted exponent is the least-squares log-log slope. Mode
"default" stops at --max-default-frames (default 10 000; --full: 100 000); mode "fast" runs the
whole series. Writes benchmarks/results/scaling.json/.md.

``--long`` measures only the longest swipes (T = 30 000 and 100 000 frames of 8 x 192, both
modes), each in a fresh child process: wall time, and peak resident memory of that process
(``ru_maxrss``, which needs no tracing and so does not slow the run); writes
benchmarks/results/scaling_long.json/.md.
"""

from __future__ import annotations

import argparse

import numpy as np

from _common import best_time, environment, loglog_slope, peak_memory_mb, table, write

from stripstitch.sweep import reconstruct  # noqa: F401  (imports the pipeline once, untimed)


def synthetic_frames(n_frames, n_rows, n_cols, *, step=(0.5, 0.05), snr_db=30.0, seed=0):
    """(T, R, C) uint8 frames of a moving plane-wave texture; frame t sees
    texture(r + step_0 t, c + step_1 t), so positions[t] = t * step exactly."""
    rng = np.random.default_rng(seed)
    k = 40
    period = rng.uniform(7.0, 12.0, k)
    theta = rng.uniform(0.0, np.pi, k)
    phase = rng.uniform(0.0, 2 * np.pi, k)
    k0 = 2 * np.pi * np.cos(theta) / period
    k1 = 2 * np.pi * np.sin(theta) / period
    t = np.arange(n_frames, dtype=np.float64)
    amp = 60.0 / np.sqrt(k / 2)                        # signal std ~ 60 codes
    noise = 60.0 / 10 ** (snr_db / 20)
    out = np.empty((n_frames, n_rows, n_cols), np.uint8)
    cols = np.exp(1j * (np.arange(n_cols)[None, :] * k1[:, None] + phase[:, None]))    # (k, C)
    rows = np.arange(n_rows, dtype=np.float64)
    chunk = max(1, 200000 // max(n_rows, 1))
    for s in range(0, n_frames, chunk):
        tt = t[s:s + chunk]
        # cos(k0 (r + a t) + k1 (c + b t) + phi) = Re[e^{i k0 (r + a t) + i k1 b t} e^{i (k1 c + phi)}]
        arg = (k0[None, None, :] * (rows[None, :, None] + step[0] * tt[:, None, None])
               + (k1 * step[1])[None, None, :] * tt[:, None, None])
        v = (np.exp(1j * arg).reshape(-1, k) @ cols).real.reshape(len(tt), n_rows, n_cols)
        v = 128.0 + amp * v + rng.normal(scale=noise, size=v.shape)
        out[s:s + chunk] = np.clip(np.rint(v), 0, 255)
    return out


def _stitch(frames, mode):
    try:
        from stripstitch import stitch
    except ImportError:
        from stripstitch.pipeline import stitch
    return stitch(frames, frame_rate_hz=4000.0, mode=mode)


def _long_point(n_frames, mode):
    """Child process body: stitch one long swipe, print a JSON line with time and peak RSS."""
    import json
    import resource
    import time

    frames = synthetic_frames(n_frames, 8, 192)
    base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    t0 = time.perf_counter()
    res = _stitch(frames, mode)
    secs = time.perf_counter() - t0
    peak_kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss       # kilobytes on Linux
    truth = np.arange(n_frames)[:, None] * np.array([0.5, 0.05])
    err = float(np.sqrt(np.mean((np.asarray(res.positions) - truth) ** 2)))
    print(json.dumps({"mode": mode, "T": n_frames, "R": 8, "C": 192, "seconds": secs,
                      "frames_per_s": n_frames / secs, "peak_rss_mb": peak_kb / 1024.0,
                      "rss_before_stitch_mb": base / 1024.0, "frames_mb": frames.nbytes / 2 ** 20,
                      "image_mpx": float(np.size(res.image)) / 1e6, "position_rms_px": err}))


def _long(series=(30000, 100000), modes=("fast", "default"), name="scaling_long"):
    import json
    import subprocess
    import sys

    rows = []
    for mode in modes:
        for n in series:
            out = subprocess.run([sys.executable, __file__, "--long-child", f"{n}:{mode}"],
                                 capture_output=True, text=True, check=True)
            row = json.loads(out.stdout.strip().splitlines()[-1])
            rows.append(row)
            print(f"{mode:8s} T={n:<7d} {row['seconds']:9.1f} s  {row['frames_per_s']:7.0f} frames/s  "
                  f"peak RSS {row['peak_rss_mb']:.0f} MB  pos rms {row['position_rms_px']:.3f} px", flush=True)
    fits = []
    for mode in modes:
        pts = [r for r in rows if r["mode"] == mode]
        if len(pts) < 2:
            continue
        fits.append({"mode": mode, "range": f"{pts[0]['T']}-{pts[-1]['T']}",
                     "time_exponent": loglog_slope([r["T"] for r in pts], [r["seconds"] for r in pts]),
                     "rss_exponent": loglog_slope([r["T"] for r in pts], [r["peak_rss_mb"] for r in pts])})
    md = ("# Scaling, longest swipes\n\nstripstitch.stitch on the synthetic moving-texture frames of "
          "bench_scaling.py (8 x 192, 0.5 px/frame along, 0.05 across), each point in a fresh child "
          "process: wall time and peak resident memory (ru_maxrss, the whole process including "
          "the frames and the interpreter). The image is the bounding box of what the swipe "
          "covered: these frames drift 0.05 px sideways per frame, so 100 000 of them cover a band "
          "5 000 px wide and 50 000 long, and the image's planes (image_mpx million pixels each, "
          "8 bytes a pixel) make most of the peak; a real swipe (under a second: 4 000 frames at "
          "4 kHz) stays within a few hundred pixels each way.\n\n"
          + table(rows, ["mode", "T", "seconds", "frames_per_s", "peak_rss_mb", "rss_before_stitch_mb",
                         "image_mpx", "position_rms_px"])
          + "\n\n## Exponents between the lengths\n\n"
          + (table(fits, ["mode", "range", "time_exponent", "rss_exponent"]) if fits else "one length only")
          + "\n")
    print()
    print(md)
    print("wrote", *write(name, {"environment": environment(), "rows": rows, "fits": fits}, md))
    return 0


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="short series (T up to 3000)")
    ap.add_argument("--full", action="store_true", help="mode 'default' up to 100 000 frames too")
    ap.add_argument("--max-default-frames", type=int, default=10000)
    ap.add_argument("--max-memory-frames", type=int, default=30000)
    ap.add_argument("--memory-budget-mb", type=float, default=4000.0,
                    help="skip points whose peak memory, extrapolated from the previous points of "
                         "the series, exceeds this")
    ap.add_argument("--long", action="store_true",
                    help="only T = 30 000 and 100 000 (both modes), peak RSS of a child process each")
    ap.add_argument("--long-modes", default="fast,default",
                    help="modes measured by --long, comma-separated (default: fast,default)")
    ap.add_argument("--long-lengths", default="30000,100000",
                    help="swipe lengths measured by --long, comma-separated (default: 30000,100000)")
    ap.add_argument("--long-name", default="scaling_long",
                    help="results file name (benchmarks/results/NAME.json/.md) of --long")
    ap.add_argument("--long-child", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.long_child:
        n, mode = args.long_child.split(":")
        _long_point(int(n), mode)
        return 0
    if args.long:
        return _long(series=tuple(int(v) for v in args.long_lengths.split(",") if v.strip()),
                     modes=tuple(m.strip() for m in args.long_modes.split(",") if m.strip()),
                     name=args.long_name)
    max_default = 100000 if args.full else args.max_default_frames
    if args.quick:
        t_series, c_series, r_series = [100, 300, 1000, 3000], [64, 128, 256], [2, 8, 32]
    else:
        t_series = [100, 300, 1000, 3000, 10000, 30000, 100000]
        c_series = [64, 128, 256, 512]
        r_series = [2, 4, 8, 16, 32, 64]
    series = ([("T", n, (n, 8, 192)) for n in t_series]
              + [("C", c, (1000, 8, c)) for c in c_series]
              + [("R", r, (1000, r, 128)) for r in r_series])
    rows, skipped = [], []
    for mode in ("fast", "default"):
        for axis, value, shape in series:
            if mode == "default" and shape[0] > max_default:
                continue
            prev = [r for r in rows if r["mode"] == mode and r["axis"] == axis and r["peak_traced_mb"]]
            if prev:
                last = prev[-1]
                expo = max(1.0, loglog_slope([r["value"] for r in prev], [r["peak_traced_mb"] for r in prev])
                           if len(prev) >= 2 else 1.0)
                predicted = last["peak_traced_mb"] * (value / last["value"]) ** expo
                if predicted > args.memory_budget_mb:
                    skipped.append({"mode": mode, "axis": axis, "value": value,
                                    "predicted_peak_mb": predicted})
                    print(f"{mode:8s} {axis}={value:<7d} skipped: predicted peak {predicted:.0f} MB "
                          f"> budget {args.memory_budget_mb:.0f} MB", flush=True)
                    continue
            frames = synthetic_frames(*shape)
            secs, res = best_time(lambda: _stitch(frames, mode), repeat=2 if shape[0] < 2000 else 1)
            truth = np.arange(shape[0])[:, None] * np.array([0.5, 0.05])
            err = float(np.sqrt(np.mean((np.asarray(res.positions) - truth) ** 2)))
            mem = peak_memory_mb(lambda: _stitch(frames, mode)) if shape[0] <= args.max_memory_frames else None
            rows.append({"mode": mode, "axis": axis, "value": value, "T": shape[0], "R": shape[1],
                         "C": shape[2], "seconds": secs, "frames_per_s": shape[0] / secs,
                         "peak_traced_mb": mem, "position_rms_px": err})
            print(f"{mode:8s} {axis}={value:<7d} {secs:9.3f} s  {shape[0] / secs:9.0f} frames/s  "
                  f"mem {mem if mem is None else round(mem, 1)} MB  pos rms {err:.3f} px", flush=True)
    fits = []
    for mode in ("fast", "default"):
        for axis in ("T", "C", "R"):
            pts = [r for r in rows if r["mode"] == mode and r["axis"] == axis]
            if len(pts) < 2:
                continue
            mem_pts = [r for r in pts if r["peak_traced_mb"] is not None]
            fits.append({"mode": mode, "axis": axis,
                         "range": f"{pts[0]['value']}-{pts[-1]['value']}",
                         "time_exponent": loglog_slope([r["value"] for r in pts], [r["seconds"] for r in pts]),
                         "memory_exponent": loglog_slope([r["value"] for r in mem_pts],
                                                         [r["peak_traced_mb"] for r in mem_pts])})
    t1 = table(rows, ["mode", "axis", "T", "R", "C", "seconds", "frames_per_s", "peak_traced_mb",
                      "position_rms_px"])
    t2 = table(fits, ["mode", "axis", "range", "time_exponent", "memory_exponent"])
    t3 = table(skipped, ["mode", "axis", "value", "predicted_peak_mb"]) if skipped else "none"
    md = (f"# Scaling{' (quick)' if args.quick else ''}\n\nstripstitch.stitch on synthetic moving-texture "
          "frames (0.5 px/frame along, 0.05 across, 30 dB). Exponent = log-log slope of time "
          "(or peak traced memory) against the swept size; 1 = linear.\n\n" + t1
          + "\n\n## Fitted exponents\n\n" + t2
          + f"\n\n## Skipped (extrapolated peak memory over the {args.memory_budget_mb:.0f} MB budget)\n\n"
          + t3 + "\n")
    print()
    print(md)
    paths = write("scaling_quick" if args.quick else "scaling",
                  {"environment": environment(), "rows": rows, "fits": fits, "skipped": skipped,
                   "memory_budget_mb": args.memory_budget_mb}, md)
    print("wrote", *paths)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
