"""Shared helpers of the benchmark scripts: result files, tables, timing, memory."""

from __future__ import annotations

import json
import os
import platform
import sys
import time
import tracemalloc

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
RESULTS = os.path.join(HERE, "results")
sys.path.insert(0, os.path.dirname(HERE))        # run from a clean checkout without installing


def environment():
    import cv2
    import scipy
    import skimage

    commit = os.environ.get("STRIPSTITCH_COMMIT")
    if not commit:
        import subprocess

        try:
            commit = subprocess.run(["git", "-C", HERE, "rev-parse", "--short", "HEAD"], capture_output=True,
                                    text=True, timeout=10).stdout.strip() or None
        except (OSError, subprocess.SubprocessError):
            commit = None
    return {"commit": commit, "python": platform.python_version(), "numpy": np.__version__, "scipy": scipy.__version__,
            "scikit-image": skimage.__version__, "opencv": cv2.__version__,
            "machine": platform.machine(), "cpu_count": os.cpu_count(),
            "date_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())}


def fmt(v, nd=3):
    if v is None:
        return "-"
    if isinstance(v, (bool, np.bool_)):
        return str(bool(v))
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        if not np.isfinite(v):
            return "nan"
        if v != 0 and (abs(v) >= 1e5 or abs(v) < 1e-3):
            return f"{v:.{nd}g}"
        return f"{v:.{nd}f}"
    return str(v)


def span_summary(rows):
    """Span error over the gap-free swipes (median, worst, count over 1 %) and median along /
    across RMS over all of them, from rows of stripstitch.evaluate figures."""
    gap_free = np.array([abs(r["span_error_pct"]) for r in rows if not r["gap_true"]])
    return {"swipes": len(rows),
            "median_abs_span_error_pct": float(np.median(gap_free)) if gap_free.size else None,
            "worst_abs_span_error_pct": float(gap_free.max()) if gap_free.size else None,
            "swipes_over_1pct": int((gap_free > 1.0).sum()),
            "median_along_rms_px": float(np.median([r["along_rms_px"] for r in rows])),
            "median_across_rms_px": float(np.median([r["across_rms_px"] for r in rows]))}


def table(rows, columns, headers=None):
    """Markdown table (also readable as plain text)."""
    headers = headers or columns
    body = [[fmt(r.get(c)) for c in columns] for r in rows]
    widths = [max(len(h), *(len(b[i]) for b in body)) if body else len(h) for i, h in enumerate(headers)]
    line = lambda cells: "| " + " | ".join(c.ljust(w) for c, w in zip(cells, widths)) + " |"
    out = [line(headers), "|" + "|".join("-" * (w + 2) for w in widths) + "|"]
    out += [line(b) for b in body]
    return "\n".join(out)


def write(name, payload, markdown):
    """Write results/<name>.json and results/<name>.md; return the paths."""
    os.makedirs(RESULTS, exist_ok=True)
    from stripstitch._types import _plain

    jp = os.path.join(RESULTS, f"{name}.json")
    mp = os.path.join(RESULTS, f"{name}.md")
    with open(jp, "w") as fh:
        json.dump(_plain(payload), fh, indent=1)
    with open(mp, "w") as fh:
        fh.write(markdown.rstrip() + "\n")
    return jp, mp


def stitch_mode(frames, frame_rate_hz, mode):
    """Reconstruction of raw frames in one mode: stripstitch.stitch for "default" and "fast",
    the StreamingStitcher fed frame by frame (as a capture driver would) for "stream"."""
    from stripstitch import stitch
    from stripstitch.stream import StreamingStitcher

    if mode == "stream":
        st = StreamingStitcher(frame_rate_hz=frame_rate_hz)
        for f in frames:
            st.push(f)
        return st.finish()
    return stitch(frames, frame_rate_hz=frame_rate_hz, mode=mode)


def best_time(fn, *, repeat=3, min_time=0.0):
    """Best wall time of ``repeat`` calls (seconds) and the last result."""
    best, out = np.inf, None
    for _ in range(max(1, repeat)):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
        if best > 30.0:
            break
    return best, out


def peak_memory_mb(fn):
    """Peak Python-heap allocation (tracemalloc; numpy arrays included) of one call, in MB."""
    tracemalloc.start()
    try:
        fn()
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return peak / 2 ** 20


def loglog_slope(x, y):
    """Least-squares slope of log y against log x (the fitted scaling exponent)."""
    x = np.log(np.asarray(x, float))
    y = np.log(np.asarray(y, float))
    ok = np.isfinite(x) & np.isfinite(y)
    return float(np.polyfit(x[ok], y[ok], 1)[0]) if ok.sum() >= 2 else float("nan")
