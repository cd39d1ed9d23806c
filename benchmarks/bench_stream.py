"""Streaming benchmark: per-frame latency, frames per second and real-time factor of
StreamingStitcher on the default 8 x 192 geometry; agreement with the batch stitch and the
truth on a simulated swipe; accuracy and operation count of the integer (firmware) path.

Run from a clean checkout:  python benchmarks/bench_stream.py  [--frames N] [--quick]

Latency: wall time of each ``push`` (time.perf_counter), median, p99 and max; most pushes only
copy the frame into the ring, every ``batch_frames``-th one estimates the batch (that one
sets the p99). Real-time factor = frames/s / frame rate (>= 1 keeps up) at 1, 4 and 8 kHz.
Both modes are warmed up first (300 frames each: the compiled kernels load once a process).
Frames: a band-limited ridge-like texture cycled at 1.37 px/frame (cheap to generate), then
one simulated swipe (stripstitch.simulate.swipe, 8 x 192 at 4 kHz) for the agreement figures.
Writes benchmarks/results/bench_stream.json/.md.
"""

from __future__ import annotations

import argparse
import os

# One BLAS thread, as on a driver's small machine (a multi-threaded BLAS spin-waits on a
# busy 2-CPU machine and makes the small matrix products ten times slower).
for _v in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")
import time

import numpy as np

from _common import environment, table, write

from stripstitch import firmware as fw
from stripstitch import simulate, stitch
from stripstitch.stream import StreamingStitcher
from bench_soak import band_texture


def texture_frames(t_n, r_n=8, c_n=192, speed=1.37, seed=1):
    tex = band_texture((2048, c_n + 16), seed=seed)
    out = np.empty((t_n, r_n, c_n))
    for t in range(t_n):
        p = t * speed
        k = int(p)
        f = p - k
        blk = np.take(tex, np.arange(k, k + r_n + 1) % tex.shape[0], axis=0)[:, 8:8 + c_n]
        out[t] = (1 - f) * blk[:-1] + f * blk[1:]
    return out


def latency(frames, **kw):
    s = StreamingStitcher(keep_history=False, **kw)
    lat = np.empty(len(frames))
    for t, f in enumerate(frames):
        t0 = time.perf_counter()
        s.push(f)
        lat[t] = time.perf_counter() - t0
    t0 = time.perf_counter()
    s.flush()
    flush = time.perf_counter() - t0
    fps = len(frames) / (lat.sum() + flush)
    row = {"mode": kw.get("mode", "default"), "batch": kw.get("batch_frames", 16),
           "median_us": 1e6 * np.median(lat), "p99_us": 1e6 * np.percentile(lat, 99),
           "max_ms": 1e3 * lat.max(), "fps": fps}
    for khz in (1, 4, 8):
        row[f"rtf_{khz}k"] = fps / (1000.0 * khz)
    row["window_mb"] = s.memory_layout()["bytes"] / 2 ** 20
    return row


def agreement(seed=3):
    cap = simulate.swipe(n_rows=8, n_cols=192, frame_rate_hz=4000.0, speed_mm_s=100.0,
                         finger_size_mm=(14.0, 12.0), rng=seed)
    frames = cap.frames
    ok = cap.contact >= 0.5          # as evaluate's default min_contact
    t0 = time.perf_counter()
    batch = stitch(frames, frame_rate_hz=4000.0)
    tb = time.perf_counter() - t0
    s = StreamingStitcher(frame_rate_hz=4000.0)
    t0 = time.perf_counter()
    for f in frames:
        s.push(f)
    res = s.finish()
    ts = time.perf_counter() - t0
    truth = cap.positions - cap.positions[0]
    ref = int(np.flatnonzero(ok)[0])

    def err(p):
        e = (p - p[ref]) - (truth - truth[ref])
        return np.abs(e[ok]).max(axis=0)

    u8 = frames if frames.dtype == np.uint8 else fw.to_uint8(frames)
    # The device's calibration: integer mean of the finger-absent frames (offset codes).
    blank = cap.contact == 0
    offset = (u8[blank].sum(axis=0, dtype=np.int64) // max(1, int(blank.sum()))).astype(np.int16)
    t0 = time.perf_counter()
    ires = fw.stitch_int(u8, frame_rate_hz=4000.0, offset=offset)
    ti = time.perf_counter() - t0
    span_true = np.ptp(truth[ok, 0])
    def rel(p):
        return p - p[ref]

    out = {"frames": len(frames), "contact_frames": int(ok.sum()),
           "batch_s": tb, "stream_s": ts, "int_s": ti,
           "stream_vs_batch_max_px": np.abs(rel(res.positions) - rel(batch.positions))[ok].max(axis=0),
           "stream_vs_truth_max_px": err(res.positions),
           "batch_vs_truth_max_px": err(batch.positions),
           "int_vs_truth_max_px": err(ires.positions),
           "span_error_pct": {k: 100 * (np.ptp(p[ok, 0]) / span_true - 1) for k, p in
                              (("stream", res.positions), ("batch", batch.positions),
                               ("int", ires.positions))},
           "stream_events": [e.kind for e in res.events],
           "batch_events": [e.kind for e in batch.events]}
    # Image agreement where both cover (absolute grid position from origin_px).
    # Both images put frame ``ref``'s plate (0, 0) at origin_px + positions[ref].
    oa = np.round(res.origin_px + res.positions[ref]).astype(int)
    ob = np.round(batch.origin_px + batch.positions[ref]).astype(int)
    lo = np.maximum(-oa, -ob)
    hi = np.minimum(np.array(res.image.shape) - oa, np.array(batch.image.shape) - ob)
    ia = res.image[lo[0] + oa[0]:hi[0] + oa[0], lo[1] + oa[1]:hi[1] + oa[1]]
    ib = batch.image[lo[0] + ob[0]:hi[0] + ob[0], lo[1] + ob[1]:hi[1] + ob[1]]
    m = np.isfinite(ia) & np.isfinite(ib)
    out["image_ncc_stream_batch"] = float(np.corrcoef(ia[m], ib[m])[0, 1])
    return out


def firmware_vs_reference(t_n=600):
    """The integer path's image measured against the float batch image with compare()."""
    from stripstitch.compare import compare
    frames = texture_frames(t_n, speed=1.37)
    u8 = fw.to_uint8(frames)
    img = fw.stitch_int(u8).image
    ref = stitch(u8).image
    c = compare(img, ref)
    keys = ("scale_along_pct", "shear_deg", "missing_rows", "duplicated_rows",
            "distortion_rms_px", "ncc", "ssim", "matched_fraction")
    return {k: getattr(c, k) for k in keys}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--frames", type=int, default=4000)
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args(argv)
    t_n = 1000 if args.quick else args.frames
    frames = texture_frames(t_n)
    # Warm-up: the first stitcher of a process loads the compiled kernels (0.3-1 s, which
    # landed in the first mode's max latency and frames/s); a capture driver pays it once.
    for mode in ("default", "fast"):
        latency(frames[:300], mode=mode)
    rows = [latency(frames, mode="default"), latency(frames, mode="fast"),
            latency(frames, mode="fast", batch_frames=32)]
    cols = ["mode", "batch", "median_us", "p99_us", "max_ms", "fps", "rtf_1k", "rtf_4k",
            "rtf_8k", "window_mb"]
    ops = fw.operation_count(8, 192)
    u8 = fw.to_uint8(frames[:1000])
    t0 = time.perf_counter()
    fw.estimate_shifts_int(u8)
    int_fps = len(u8) / (time.perf_counter() - t0)
    agree = None if args.quick else agreement()
    fvr = firmware_vs_reference(300 if args.quick else 600)
    load = os.getloadavg()
    md = [f"# Streaming, 8 x 192, {t_n} texture frames at 1.37 px/frame", "",
          table(rows, cols), "",
          f"Load average during the run: {load[0]:.1f} on {os.cpu_count()} CPUs (shared "
          "machine; figures are upper bounds on the cost).",
          f"Integer path: {ops['total']} integer operations per frame "
          f"({ops['candidates']} candidates), {int_fps:.0f} frames/s vectorised in numpy."]
    md += ["", "## Integer-path image vs the float batch image (stripstitch.compare), "
           "texture swipe at 1.37 px/frame", ""] + [f"- {k}: {v}" for k, v in fvr.items()]
    if agree:
        md += ["", "## Simulated swipe (8 x 192, 4 kHz, 100 mm/s)", ""]
        md += [f"- {k}: {v}" for k, v in agree.items()]
    print("\n".join(md))
    write("bench_stream", {"environment": environment(), "latency": rows, "ops": ops,
                           "int_fps": int_fps, "agreement": agree, "firmware_vs_reference": fvr,
                           "load": load},
          "\n".join(md))


if __name__ == "__main__":
    main()
