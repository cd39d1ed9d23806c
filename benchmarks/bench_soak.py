"""Soak benchmark: push at least a million frames through one StreamingStitcher and show that
its memory does not grow.

Run from a clean checkout:  python benchmarks/bench_soak.py  [--frames N] [--rows R] [--cols C]

Frames are cut cheaply from a long periodic band-limited texture (a ridge-like ring spectrum,
period 9 px), cycled along the swipe at a speed that changes slowly (0.6..2.2 px per frame)
with a slow lateral sway, by linear interpolation between two texture rows. The stitcher
runs with ``keep_history=False`` (a driver consumes the rows it hands out). Every
``--every`` frames the script records the traced allocation (tracemalloc, current and peak
since the previous sample), the process's resident set size (/proc/self/statm) and the
frame rate. Writes benchmarks/results/bench_soak.json/.md.
"""

from __future__ import annotations

import argparse
import os

# One BLAS thread, as on a driver's small machine (a multi-threaded BLAS spin-waits on a
# busy 2-CPU machine and makes the small matrix products ten times slower).
for _v in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")
import time
import tracemalloc

import numpy as np

from _common import environment, table, write

from stripstitch.stream import StreamingStitcher


def band_texture(shape, *, period_px=9.0, rel_bandwidth=0.15, seed=0):
    """Periodic band-limited texture (same construction as tests/conftest.py)."""
    rng = np.random.default_rng(seed)
    spec = np.fft.fft2(rng.standard_normal(shape))
    f = np.hypot(np.fft.fftfreq(shape[0])[:, None], np.fft.fftfreq(shape[1])[None, :])
    ring = np.exp(-0.5 * ((f - 1.0 / period_px) / (rel_bandwidth / period_px)) ** 2)
    img = np.real(np.fft.ifft2(spec * ring))
    return (img / img.std()).astype(np.float64)


def rss_mb():
    with open("/proc/self/statm") as fh:
        pages = int(fh.read().split()[1])
    return pages * os.sysconf("SC_PAGE_SIZE") / 2 ** 20


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--frames", type=int, default=1_000_000)
    ap.add_argument("--rows", type=int, default=8)
    ap.add_argument("--cols", type=int, default=64)
    ap.add_argument("--mode", default="fast", choices=("default", "fast"))
    ap.add_argument("--batch", type=int, default=32)
    ap.add_argument("--every", type=int, default=50_000)
    ap.add_argument("--name", default="bench_soak")
    args = ap.parse_args(argv)
    r_n, c_n = args.rows, args.cols
    tex = band_texture((4096, c_n + 32), seed=11)
    h = tex.shape[0]
    s = StreamingStitcher(mode=args.mode, batch_frames=args.batch, keep_history=False)
    frame = np.empty((r_n, c_n))
    samples = []
    rows_out = 0
    events = {}
    tracemalloc.start()
    t0 = time.perf_counter()
    t_last = t0
    pos = 0.0
    for t in range(args.frames):
        # slowly varying speed and lateral sway; the texture is periodic, so it cycles
        v = 1.4 + 0.8 * np.sin(t / 997.0)
        pos += v
        lat = 16 + int(round(6.0 * np.sin(t / 3001.0)))
        k = int(pos)
        f = pos - k
        i0 = k % h
        i1 = (k + r_n + 1) % h
        if i1 > i0:
            blk = tex[i0:i1, lat:lat + c_n]
        else:
            blk = np.take(tex, np.arange(k, k + r_n + 1) % h, axis=0)[:, lat:lat + c_n]
        np.multiply(blk[:-1], 1.0 - f, out=frame)
        frame += f * blk[1:]
        u = s.push(frame)
        rows_out += len(u.rows)
        for e in u.events:
            events[e.kind] = events.get(e.kind, 0) + 1
        if (t + 1) % args.every == 0:
            cur, peak = tracemalloc.get_traced_memory()
            tracemalloc.reset_peak()
            now = time.perf_counter()
            samples.append({"frames": t + 1, "traced_mb": cur / 2 ** 20,
                            "traced_peak_mb": peak / 2 ** 20, "rss_mb": rss_mb(),
                            "fps": args.every / (now - t_last), "rows_out": rows_out,
                            "elapsed_s": now - t0})
            t_last = now
            print(table([samples[-1]], list(samples[-1].keys())).splitlines()[-1], flush=True)
    tracemalloc.stop()
    total = time.perf_counter() - t0
    layout = s.memory_layout()
    first, last = samples[0], samples[-1]
    summary = {"frames": args.frames, "geometry": [r_n, c_n], "mode": args.mode,
               "batch_frames": args.batch, "elapsed_s": total, "fps": args.frames / total,
               "rows_out": rows_out, "events": events, "memory_layout": layout,
               "traced_growth_mb": last["traced_mb"] - first["traced_mb"],
               "rss_growth_mb": last["rss_mb"] - first["rss_mb"],
               "traced_peak_max_mb": max(x["traced_peak_mb"] for x in samples)}
    cols = ["frames", "traced_mb", "traced_peak_mb", "rss_mb", "fps", "rows_out"]
    md = [f"# Soak: {args.frames} frames of {r_n} x {c_n}, mode {args.mode}, batch {args.batch}",
          "", table(samples, cols), "",
          f"Window buffers: {layout['bytes'] / 2 ** 20:.2f} MB "
          f"({layout['window_frames']} frames, accumulator {layout['accumulator_rows']} x "
          f"{layout['accumulator_cols']}, {layout['max_pairs']} pairs).",
          f"Traced memory growth from the first to the last sample: "
          f"{summary['traced_growth_mb']:+.3f} MB; RSS growth {summary['rss_growth_mb']:+.2f} MB.",
          f"Overall {summary['fps']:.0f} frames/s over {total:.0f} s; {rows_out} rows handed out.",
          f"Events: {events}"]
    print("\n".join(md))
    write(args.name, {"environment": environment(), "summary": summary, "samples": samples},
          "\n".join(md))


if __name__ == "__main__":
    main()
