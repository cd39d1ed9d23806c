"""Operating-envelope sweeps: simulate and reconstruct a grid of swipes into one tidy table.

A grid (parameter -> list of values) expands into cases; each case simulates one swipe
(:mod:`stripstitch.simulate`), reconstructs it with a method (stripstitch's own or a chain of
a reference library's pairwise registration) and scores it (:mod:`stripstitch.evaluate`),
giving one row of a table (CSV, or Parquet when pyarrow is installed). Sweeps resume where
they stopped, run in local worker processes by default or on a Dask distributed cluster given
a scheduler address (optional extra ``sweep``), and the envelope functions turn a table into
answers such as "the highest swipe speed that stays true for each rows x frame-rate pair".
"""

from __future__ import annotations

import csv
import functools
import hashlib
import itertools
import json
import math
import os
import sys
import time
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any, Mapping

import numpy as np

from ._types import _plain
from ._validate import check_choice, check_int, check_positive

__all__ = [
    "DEFAULT_CASE",
    "METHODS",
    "ChainResult",
    "SweepTable",
    "Envelope",
    "reference_chain",
    "reconstruct",
    "expand_grid",
    "case_id",
    "run_case",
    "run_sweep",
    "read_table",
    "envelope",
    "min_frame_rate",
    "no_gap_frame_rate_hz",
]

#: Reconstruction methods a case may name: stripstitch's two modes, its streaming stitcher
#: (frames pushed one by one, default mode) and pairwise chains of scikit-image / OpenCV
#: phase correlation (positions = cumulative sums of pairwise shifts).
METHODS = ("default", "fast", "stream", "skimage_chain", "opencv_chain", "truth")

#: Parameters of one case and their defaults (small, cheap swipes). Speeds are an unsourced
#: modelling assumption (REFERENCE-VALUES.md section 7: 20-300 mm/s, nominal 100 mm/s).
DEFAULT_CASE = MappingProxyType({
    "method": "default",
    "pattern": "right_loop",          # finger class
    "finger_seed": 0,                 # same seed -> same finger (cached per worker)
    "finger_length_mm": 8.0,
    "finger_width_mm": 6.0,
    "finger_spacing_um": 12.7,
    "profile": "constant",            # speed profile: constant / accel_decel / human
    "speed_mm_s": 100.0,
    "length_mm": 2.0,                 # forward travel
    "skew_deg": 0.0,
    "rotation_deg": 0.0,
    "n_rows": 8,
    "n_cols": 64,
    "frame_rate_hz": 4000.0,
    "snr_db": 30.0,
    "dielectric_um": None,            # total coating thickness (None: sensor default stack)
    "seed": 0,                        # motion, front-end draws and noise
    "metrics": "image",               # "trajectory", "image" (+ NCC/SSIM/period) or "full"
})


def _positive_or_none(value, name):
    return None if value is None else check_positive(value, name=name)


# ----------------------------------------------------------------------------------------------
# Reference-library chains
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class ChainResult:
    """Trajectory (and fused image) from chaining pairwise shifts of a reference library.

    Attributes
    ----------
    positions : (T, 2) ndarray
        Cumulative sums of the pairwise shifts, library convention.
    angles : (T,) ndarray
        Zeros (the chains estimate translation only).
    shifts : (T-1, 2) ndarray
        Pairwise shifts ``positions[t+1] - positions[t]``.
    image, weight : (H, W) ndarray or None
        Image fused with :func:`stripstitch.mosaic.fuse` at those positions.
    origin_px : (2,) ndarray or None
        Image index of frame 0's plate (0, 0).
    pitch_um : (2,) ndarray
        Output pitch (the sensor pitch).
    events : tuple
        Empty: the chains report no events.
    library : str
        ``"skimage"`` or ``"opencv"``.
    """

    positions: np.ndarray
    angles: np.ndarray
    shifts: np.ndarray
    image: Any
    weight: Any
    origin_px: Any
    pitch_um: np.ndarray
    events: tuple = ()
    library: str = ""

    def __post_init__(self):
        for name in ("positions", "angles", "shifts", "image", "weight", "origin_px", "pitch_um"):
            v = getattr(self, name)
            if v is not None:
                arr = np.array(v, dtype=np.float64)
                arr.flags.writeable = False
                object.__setattr__(self, name, arr)
        object.__setattr__(self, "events", tuple(self.events))


def _pair_shifts_skimage(frames, upsample_factor, normalization):
    from skimage.registration import phase_cross_correlation

    out = np.empty((frames.shape[0] - 1, 2))
    for t in range(frames.shape[0] - 1):
        # skimage returns the shift registering `moving` onto `reference`: with
        # moving(x) = reference(x + d) that is +d, the library convention.
        out[t] = phase_cross_correlation(frames[t], frames[t + 1], upsample_factor=upsample_factor,
                                         normalization=normalization)[0]
    return out


def _pair_shifts_opencv(frames):
    import cv2

    f = np.ascontiguousarray(frames, dtype=np.float64)
    if f.shape[1] >= 4:
        win = cv2.createHanningWindow((f.shape[2], f.shape[1]), cv2.CV_64F)
    else:   # a Hann window over 2-3 rows is (nearly) all zero: window across only
        win = np.ascontiguousarray(np.tile(np.hanning(f.shape[2]), (f.shape[1], 1)))
    out = np.empty((f.shape[0] - 1, 2))
    for t in range(f.shape[0] - 1):
        # cv2.phaseCorrelate(a, b) returns (dx, dy) with b(x) = a(x - (dx, dy)); our
        # convention b(x) = a(x + d) gives d = -(dy, dx) in (along, across) order.
        (dx, dy), _ = cv2.phaseCorrelate(f[t], f[t + 1], win)
        out[t] = (-dy, -dx)
    return out


#: Largest image (pixels) a reference chain is fused into; beyond it ``image`` is None.
_MAX_FUSED_PIXELS = 20_000_000


def reference_chain(frames, *, library="skimage", upsample_factor=20, normalization=None,
                    pitch_um=50.8, fuse=True):
    """Trajectory from chaining a reference library's phase correlation between successive frames.

    Parameters
    ----------
    frames : (T, R, C) array_like
        Frame stack, axis 0 of a frame along the swipe.
    library : {"skimage", "opencv"}, optional
        ``skimage.registration.phase_cross_correlation`` (upsampled DFT, [1]_) or
        ``cv2.phaseCorrelate`` (Hann window from ``cv2.createHanningWindow``; across only for
        frames under 4 rows, where it would be all zero). Default is "skimage".
    upsample_factor : int, optional
        skimage's sub-pixel factor (1/upsample_factor px). Default is 20.
    normalization : {None, "phase"}, optional
        skimage's cross-power normalisation. Default is None (plain cross-correlation): on
        strips a few rows high, whitening the spectrum ("phase", skimage's default) lets the
        frame borders dominate (measured here: a (2, 1) px shift of 40 x 80 px windows of
        smooth noise came out as (0.65, 0.25) with "phase" and (1.9, 1.0) without).
    pitch_um : float, optional
        Sensor pitch, recorded as the output pitch. Default is 50.8.
    fuse : bool, optional
        Fuse an image with :func:`stripstitch.mosaic.fuse` (skipped, ``image`` None, when the
        trajectory would need more than 20 million pixels). Default is True.

    Returns
    -------
    ChainResult

    References
    ----------
    .. [1] M. Guizar-Sicairos, S. T. Thurman and J. R. Fienup, "Efficient subpixel image
           registration algorithms", Optics Letters 33(2), 156-158 (2008).
           doi:10.1364/OL.33.000156

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> master = rng.normal(size=(60, 32))
    >>> frames = np.stack([master[2 * t: 2 * t + 8] for t in range(20)])
    >>> res = reference_chain(frames, fuse=False)
    >>> bool(np.allclose(res.positions[-1], [38.0, 0.0], atol=0.5))   # 19 steps of 2 rows
    True
    """
    from ._validate import check_frames

    arr = check_frames(frames).astype(np.float64)
    check_choice(library, ("skimage", "opencv"), name="library")
    up = check_int(upsample_factor, name="upsample_factor", lo=1)
    pitch = check_positive(pitch_um, name="pitch_um")
    if normalization not in (None, "phase"):
        raise ValueError(f"normalization must be None or 'phase'; got {normalization!r}")
    shifts = (_pair_shifts_skimage(arr, up, normalization) if library == "skimage"
              else _pair_shifts_opencv(arr))
    pos = np.vstack([np.zeros((1, 2)), np.cumsum(shifts, axis=0)])
    image = weight = origin = None
    extent = (np.ptp(pos[:, 0]) + arr.shape[1]) * (np.ptp(pos[:, 1]) + arr.shape[2])
    if fuse and extent <= _MAX_FUSED_PIXELS:     # a runaway chain gets no image, not 4 GB
        from .mosaic import fuse as _fuse

        m = _fuse(arr, pos)
        image, weight, origin = m.image, m.weight, m.origin_px
    return ChainResult(pos, np.zeros(len(pos)), shifts, image, weight, origin,
                       np.array([pitch, pitch]), (), library)


def reconstruct(capture, method="default"):
    """Reconstruct a simulated capture with one of :data:`METHODS`.

    ``"truth"`` returns the true trajectory and image (a stand-in for testing the metrics and
    the sweep machinery); the chains use :func:`reference_chain`.
    """
    check_choice(method, METHODS, name="method")
    if method in ("default", "fast"):
        try:
            from . import stitch            # the lead's public entry point
        except ImportError:                 # not re-exported yet
            from .pipeline import stitch

        # A capture comes with its frame times (dumps carry counters or timestamps), which
        # tell the stitcher about dropped frames.
        return stitch(capture.frames, pitch_um=float(capture.pitch_um),
                      frame_rate_hz=float(capture.frame_rate_hz),
                      timestamps_s=np.asarray(capture.times_s, dtype=np.float64), mode=method)
    if method == "stream":
        from .stream import StreamingStitcher

        st = StreamingStitcher(pitch_um=float(capture.pitch_um),
                               frame_rate_hz=float(capture.frame_rate_hz))
        for frame, t in zip(capture.frames, np.asarray(capture.times_s, dtype=np.float64)):
            st.push(frame, timestamp_s=float(t))
        return st.finish()
    if method == "truth":
        p = float(capture.pitch_um)
        return ChainResult(capture.positions, capture.angles, np.diff(capture.positions, axis=0),
                           capture.true_image, np.ones_like(capture.true_image),
                           capture.true_origin_px, np.array([p, p]), capture.events, "truth")
    return reference_chain(capture.frames, library=method.split("_")[0],
                           pitch_um=float(capture.pitch_um))


# ----------------------------------------------------------------------------------------------
# Cases
# ----------------------------------------------------------------------------------------------

def _scalar(value, name):
    if isinstance(value, np.generic):
        value = value.item()
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    raise TypeError(f"grid value of {name!r} must be a scalar (bool, int, float, str or None); "
                    f"got {type(value).__name__} {value!r}")


def expand_grid(grid, **fixed):
    """Expand a parameter grid into a list of case dicts (cartesian product, in grid order).

    Parameters
    ----------
    grid : Mapping[str, sequence]
        Parameter name -> values; names from :data:`DEFAULT_CASE`.
    **fixed
        Parameters held at one value for every case.

    Returns
    -------
    list of dict
        Complete cases (defaults filled in), each with its ``case_id``.

    Examples
    --------
    >>> cases = expand_grid({"speed_mm_s": [50.0, 100.0], "seed": [0, 1]}, n_rows=16)
    >>> len(cases), cases[1]["seed"], cases[3]["n_rows"]
    (4, 1, 16)
    """
    if not isinstance(grid, Mapping):
        raise TypeError(f"grid must be a mapping of parameter -> list of values; got {type(grid).__name__}")
    unknown = sorted((set(grid) | set(fixed)) - set(DEFAULT_CASE))
    if unknown:
        raise ValueError(f"unknown sweep parameter(s) {unknown}; expected names from {sorted(DEFAULT_CASE)}")
    names = list(grid)
    values = []
    for n in names:
        v = grid[n]
        if isinstance(v, (str, bytes)) or not hasattr(v, "__iter__"):
            raise TypeError(f"grid[{n!r}] must be a list of values; got {type(v).__name__} {v!r}")
        v = [_scalar(x, n) for x in v]
        if not v:
            raise ValueError(f"grid[{n!r}] must hold at least one value; got an empty list")
        values.append(v)
    base = dict(DEFAULT_CASE)
    base.update({k: _scalar(v, k) for k, v in fixed.items()})
    cases = []
    for combo in itertools.product(*values):
        c = dict(base)
        c.update(zip(names, combo))
        c["case_id"] = case_id(c)
        cases.append(c)
    return cases


def case_id(case):
    """Stable id of a case: "c" + 16 hex digits of a hash of its parameters (without
    ``case_id``); the letter keeps CSV readers from taking it for a number."""
    body = {k: case[k] for k in sorted(case) if k != "case_id"}
    return "c" + hashlib.sha1(json.dumps(body, sort_keys=True).encode()).hexdigest()[:16]


@functools.lru_cache(maxsize=16)
def _finger(pattern, seed, length_mm, width_mm, spacing_um):
    from .simulate import make_finger

    return make_finger(pattern, size_mm=(length_mm, width_mm), spacing_um=spacing_um, rng=seed)


def _sensor(n_rows, n_cols, dielectric_um):
    from dataclasses import replace

    from .simulate import Sensor

    s = Sensor(n_rows=n_rows, n_cols=n_cols)
    if dielectric_um is not None:
        total = sum(layer.thickness_um for layer in s.layers)
        s = replace(s, layers=tuple(replace(layer, thickness_um=layer.thickness_um * dielectric_um / total)
                                    for layer in s.layers))
    return s


def simulate_case(case):
    """Simulate the swipe of one case (finger reused across cases with the same finger keys)."""
    from .simulate import capture, make_motion

    c = dict(DEFAULT_CASE)
    c.update(case)
    finger = _finger(c["pattern"], int(c["finger_seed"]), float(c["finger_length_mm"]),
                     float(c["finger_width_mm"]), float(c["finger_spacing_um"]))
    sensor = _sensor(int(c["n_rows"]), int(c["n_cols"]), c["dielectric_um"])
    seed = int(c["seed"])
    ss = np.random.SeedSequence([seed, 7])
    r_motion, r_capture = (np.random.default_rng(s) for s in ss.spawn(2))
    length_um = float(c["length_mm"]) * 1000.0
    start = (float(c["finger_length_mm"]) * 500.0 - length_um / 2.0, float(c["finger_width_mm"]) * 500.0)
    motion = make_motion(c["profile"], frame_rate_hz=float(c["frame_rate_hz"]),
                         speed_mm_s=float(c["speed_mm_s"]), length_mm=float(c["length_mm"]),
                         start_um=start, skew_deg=float(c["skew_deg"]),
                         rotation_deg=float(c["rotation_deg"]), n_rows=int(c["n_rows"]),
                         pitch_um=sensor.pitch_um, rng=r_motion)
    return capture(finger, sensor, motion, snr_db=c["snr_db"], rng=r_capture)


def run_case(case):
    """Simulate, reconstruct and score one case; returns one table row (dict of scalars).

    The row holds the case parameters, ``case_id``, the scalar metrics of
    :meth:`stripstitch.evaluate.Evaluation.to_dict`, ``verdict`` (stripstitch methods),
    ``n_events`` and ``error`` (empty, or the exception text when the case failed). Rows are
    deterministic functions of the case (no timings), so runs on different executors agree.
    """
    from .evaluate import evaluate

    c = dict(DEFAULT_CASE)
    c.update(case)
    c["case_id"] = case.get("case_id") or case_id(c)
    row = dict(c)
    try:
        cap = simulate_case(c)
        res = reconstruct(cap, c["method"])
        level = c["metrics"]
        e = evaluate(res, cap, crb=True, image=level != "trajectory", distortion=level == "full")
        row.update(e.to_dict())
        rep = getattr(res, "report", None)
        row["verdict"] = getattr(rep, "verdict", "")
        row["n_events"] = len(getattr(res, "events", ()))
        row["achieved_snr_db"] = float(cap.snr_db)
        row["error"] = ""
    except Exception as exc:                     # a failed case stays in the table
        row["error"] = f"{type(exc).__name__}: {exc}"
    return _plain(row)


def _run_chunk(case_fn, cases):
    return [case_fn(c) for c in cases]


# ----------------------------------------------------------------------------------------------
# Table
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class SweepTable:
    """A tidy table: one row per case (dict of plain scalars), in case order.

    Attributes
    ----------
    rows : tuple of Mapping
        The rows.
    columns : tuple of str
        Column names (union over rows, first-seen order).
    """

    rows: tuple
    columns: tuple = field(default=())

    def __post_init__(self):
        rows = tuple(MappingProxyType(dict(r)) for r in self.rows)
        object.__setattr__(self, "rows", rows)
        cols = list(self.columns)
        seen = set(cols)
        for r in rows:
            for k in r:
                if k not in seen:
                    seen.add(k)
                    cols.append(k)
        object.__setattr__(self, "columns", tuple(cols))

    def __len__(self):
        return len(self.rows)

    def column(self, name):
        """Values of one column as an ndarray (float where numeric, NaN for missing)."""
        if name not in self.columns:
            raise ValueError(f"name must be one of the table's columns {list(self.columns)}; got {name!r}")
        vals = [r.get(name) for r in self.rows]
        if all(v is None or (isinstance(v, (int, float)) and not isinstance(v, bool)) for v in vals):
            return np.array([np.nan if v is None else v for v in vals], dtype=np.float64)
        return np.array(vals, dtype=object)

    def select(self, **equal):
        """Rows whose columns equal the given values."""
        return SweepTable(tuple(r for r in self.rows if all(r.get(k) == v for k, v in equal.items())),
                          self.columns)

    def to_dict(self):
        return [dict(r) for r in self.rows]

    def write(self, path):
        """Write as CSV, or Parquet when the path ends in ``.parquet`` (needs pyarrow)."""
        path = os.fspath(path)
        tmp = path + ".tmp"
        if path.endswith(".parquet"):
            import pyarrow as pa
            import pyarrow.parquet as pq

            data = {c: [r.get(c) for r in self.rows] for c in self.columns}
            pq.write_table(pa.table(data), tmp)
        else:
            with open(tmp, "w", newline="") as fh:
                w = csv.DictWriter(fh, fieldnames=list(self.columns))
                w.writeheader()
                for r in self.rows:
                    w.writerow({k: "None" if r.get(k) is None else r.get(k) for k in self.columns})
        os.replace(tmp, path)
        return path


def _parse(text):
    # CSV cells: "None" is a missing value (NaN and inf are stored as missing), "" an empty string.
    if text == "None":
        return None
    if text == "":
        return ""
    if text in ("True", "False"):
        return text == "True"
    try:
        return int(text)
    except ValueError:
        pass
    try:
        return float(text)
    except ValueError:
        return text


def read_table(path):
    """Read a table written by :meth:`SweepTable.write` (CSV or Parquet)."""
    path = os.fspath(path)
    if path.endswith(".parquet"):
        import pyarrow.parquet as pq

        t = pq.read_table(path)
        return SweepTable(tuple(t.to_pylist()), tuple(t.column_names))
    with open(path, newline="") as fh:
        r = csv.DictReader(fh)
        rows = tuple({k: (v if k == "case_id" else _parse(v)) for k, v in row.items()} for row in r)
        return SweepTable(rows, tuple(r.fieldnames or ()))


def _journal_path(output):
    return os.fspath(output) + ".partial.jsonl"


def _load_done(output):
    done = {}
    if output is None:
        return done
    if os.path.exists(output):
        for r in read_table(output).rows:
            if r.get("case_id"):
                done[str(r["case_id"])] = dict(r)
    jp = _journal_path(output)
    if os.path.exists(jp):
        with open(jp) as fh:
            for line in fh:
                line = line.strip()
                if not line:
                    continue
                try:
                    r = json.loads(line)
                except json.JSONDecodeError:      # a line cut by an interrupted write
                    continue
                done[str(r["case_id"])] = r
    return done


class _Progress:
    def __init__(self, total, enabled):
        self.total, self.n, self.enabled = total, 0, enabled
        self.t0 = time.monotonic()

    def update(self, k):
        self.n += k
        if not self.enabled:
            return
        frac = self.n / self.total if self.total else 1.0
        bar = "#" * int(30 * frac)
        rate = self.n / max(time.monotonic() - self.t0, 1e-9)
        sys.stderr.write(f"\rsweep [{bar:<30}] {self.n}/{self.total} cases {rate:6.1f}/s")
        sys.stderr.flush()

    def close(self):
        if self.enabled:
            sys.stderr.write("\n")
            sys.stderr.flush()


def run_sweep(grid, output=None, *, case=run_case, fixed=None, workers=None, scheduler=None,
              progress=None, chunk_size=None):
    """Run every case of a grid and collect one tidy table.

    Parameters
    ----------
    grid : Mapping[str, sequence] or sequence of dict
        Parameter grid for :func:`expand_grid`, or an explicit list of cases.
    output : path-like, optional
        Table file (``.csv``, or ``.parquet`` with pyarrow). Rows already in it (or in its
        ``.partial.jsonl`` journal, written as cases finish) are skipped, so an interrupted
        sweep resumes where it stopped. Default is None (nothing written, nothing resumed).
    case : callable, optional
        ``case(dict) -> dict`` run per case; must be importable (picklable) for worker
        processes and deterministic for resuming. Default is :func:`run_case`.
    fixed : Mapping, optional
        Parameters held fixed (passed to :func:`expand_grid`). Default is None.
    workers : int, optional
        Local worker processes (``concurrent.futures.ProcessPoolExecutor``, spawn context,
        single-threaded BLAS/OpenMP like Dask's workers, so that both give identical rows);
        0 runs in this process (as it is threaded). Default is None (``os.cpu_count()``).
        Ignored with ``scheduler``.
    scheduler : str or dask.distributed.Client, optional
        Run on a Dask distributed cluster: a scheduler address (``"tcp://host:8786"``) or a
        client. Default is None (local processes).
    progress : bool, optional
        Show a progress bar on stderr. Default is None (only when stderr is a terminal).
    chunk_size : int, optional
        Cases per task. Default is None (about 8 tasks per worker, at most 50 cases each).

    Returns
    -------
    SweepTable
        Rows in case order (resumed rows included).

    Examples
    --------
    >>> t = run_sweep({"speed_mm_s": [50.0, 100.0]}, case=dict, workers=0)
    >>> len(t), t.rows[1]["speed_mm_s"]
    (2, 100.0)
    """
    if isinstance(grid, Mapping):
        cases = expand_grid(grid, **dict(fixed or {}))
    else:
        cases = []
        for c in grid:
            if not isinstance(c, Mapping):
                raise TypeError(f"grid must be a mapping or a sequence of case dicts; got an item "
                                f"of type {type(c).__name__}")
            c = dict(c)
            c.setdefault("case_id", case_id(c))
            cases.append(c)
    if not callable(case):
        raise TypeError(f"case must be callable (case dict -> row dict); got {type(case).__name__}")
    if output is not None:
        output = os.fspath(output)
        if not output.endswith((".csv", ".parquet")):
            raise ValueError(f"output must end in .csv or .parquet; got {output!r}")
    done = _load_done(output)
    todo = [c for c in cases if c["case_id"] not in done]
    # Group cases sharing a finger so that each task reuses its worker's cached finger.
    key = lambda c: tuple(str(c.get(k)) for k in ("pattern", "finger_seed", "finger_length_mm",
                                                   "finger_width_mm", "finger_spacing_um"))
    todo.sort(key=key)
    n_workers = (os.cpu_count() or 1) if workers is None else check_int(workers, name="workers", lo=0)
    if chunk_size is None:
        chunk = max(1, min(50, math.ceil(len(todo) / max(1, 8 * max(n_workers, 1)))))
    else:
        chunk = check_int(chunk_size, name="chunk_size", lo=1)
    chunks = [todo[i:i + chunk] for i in range(0, len(todo), chunk)]
    show = sys.stderr.isatty() if progress is None else bool(progress)
    bar = _Progress(len(todo), show)
    journal = open(_journal_path(output), "a") if output is not None else None
    new = {}

    def collect(rows):
        for r in rows:
            new[str(r["case_id"])] = r
            if journal is not None:
                journal.write(json.dumps(_plain(r)) + "\n")
        if journal is not None:
            journal.flush()
        bar.update(len(rows))

    try:
        if scheduler is not None:
            _run_dask(scheduler, case, chunks, collect)
        elif n_workers == 0 or len(chunks) <= 1:
            for ch in chunks:
                collect(_run_chunk(case, ch))
        else:
            import multiprocessing
            from concurrent.futures import ProcessPoolExecutor, as_completed

            ctx = multiprocessing.get_context("spawn")
            with _single_threaded_env(), ProcessPoolExecutor(max_workers=n_workers, mp_context=ctx) as pool:
                futs = [pool.submit(_run_chunk, case, ch) for ch in chunks]
                for f in as_completed(futs):
                    collect(f.result())
    finally:
        bar.close()
        if journal is not None:
            journal.close()
    rows = []
    for c in cases:
        r = new.get(c["case_id"]) or done.get(c["case_id"])
        rows.append(r)
    table = SweepTable(tuple(rows))
    if output is not None:
        table.write(output)
        os.remove(_journal_path(output))
    return table


#: Environment of local worker processes: single-threaded BLAS/OpenMP, as Dask's nanny sets for
#: its workers (distributed config ``nanny.pre-spawn-environ``). Multi-threaded BLAS sums in
#: another order, which moved results by ~1e-4 px between the two executors in a measured run.
_WORKER_ENV = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}


class _single_threaded_env:
    def __enter__(self):
        self.saved = {k: os.environ.get(k) for k in _WORKER_ENV}
        os.environ.update(_WORKER_ENV)
        return self

    def __exit__(self, *exc):
        for k, v in self.saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
        return False


def _run_dask(scheduler, case, chunks, collect):
    try:
        from dask.distributed import Client, as_completed
    except ImportError as exc:                       # optional extra "sweep"
        raise ImportError("scheduler needs dask.distributed: pip install 'stripstitch[sweep]'") from exc
    own = not isinstance(scheduler, Client)
    if own and not isinstance(scheduler, str):
        raise TypeError(f"scheduler must be an address string or a dask.distributed.Client; "
                        f"got {type(scheduler).__name__}")
    client = Client(scheduler) if own else scheduler
    try:
        futs = [client.submit(_run_chunk, case, ch, pure=False) for ch in chunks]
        for f in as_completed(futs):
            collect(f.result())
    finally:
        if own:
            client.close()


# ----------------------------------------------------------------------------------------------
# Envelope
# ----------------------------------------------------------------------------------------------

def no_gap_frame_rate_hz(speed_mm_s, n_rows, *, overlap_rows=0.0, pitch_um=50.8):
    """Lowest frame rate at which successive frames still touch: f >= v / ((R - overlap) p).

    Parameters
    ----------
    speed_mm_s : float or array_like
        Swipe speed.
    n_rows : int or array_like
        Sensor rows along the swipe.
    overlap_rows : float, optional
        Rows two successive frames must share (0: frames just touch). Default is 0.
    pitch_um : float, optional
        Plate pitch. Default is 50.8 (500 ppi).

    Returns
    -------
    float or ndarray
        Frames per second.

    Notes
    -----
    Geometry (REFERENCE-VALUES.md "no-gap frame rate" row, computed there): per-frame travel
    v / f must not exceed the (R - overlap) rows of pitch p.

    Examples
    --------
    >>> [round(no_gap_frame_rate_hz(v, 8)) for v in (20.0, 100.0, 300.0)]
    [49, 246, 738]
    """
    v = np.asarray(speed_mm_s, dtype=np.float64)
    r = np.asarray(n_rows, dtype=np.float64)
    eff = r - float(overlap_rows)
    if np.any(eff <= 0):
        raise ValueError(f"overlap_rows must be smaller than n_rows; got overlap_rows={overlap_rows!r}, "
                         f"n_rows={n_rows!r}")
    f = v * 1000.0 / (eff * float(pitch_um))
    return float(f) if f.ndim == 0 else f


@dataclass(frozen=True, eq=False)
class Envelope:
    """Largest passing value of a swept parameter per group.

    Attributes
    ----------
    by : tuple of str
        Grouping columns.
    x : str
        The swept column (e.g. ``speed_mm_s``).
    groups : tuple of tuple
        Group keys in sorted order.
    x_values : (n_x,) ndarray
        Sorted distinct values of ``x``.
    pass_fraction : (n_groups, n_x) ndarray
        Fraction of rows passing at each (group, x); NaN where no rows.
    limit : (n_groups,) ndarray
        Per group: the highest x such that every row at it and at all smaller x passes
        (lowest, for ``direction="min"``); NaN if none.
    criteria : Mapping
        The pass criteria used.
    """

    by: tuple
    x: str
    groups: tuple
    x_values: np.ndarray
    pass_fraction: np.ndarray
    limit: np.ndarray
    criteria: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self):
        for name in ("x_values", "pass_fraction", "limit"):
            arr = np.array(getattr(self, name), dtype=np.float64)
            arr.flags.writeable = False
            object.__setattr__(self, name, arr)
        object.__setattr__(self, "groups", tuple(tuple(g) for g in self.groups))
        object.__setattr__(self, "criteria", MappingProxyType(dict(self.criteria)))

    def to_dict(self):
        return _plain({"by": list(self.by), "x": self.x,
                       "limits": [dict(zip(self.by, g), limit=l) for g, l in zip(self.groups, self.limit)],
                       "criteria": dict(self.criteria)})


def _passes(row, max_span_error_pct, max_false_gaps):
    if row.get("error"):
        return False
    span = row.get("span_error_pct")
    if span is None or not np.isfinite(span) or abs(span) >= max_span_error_pct:
        return False
    false_gaps = row.get("gap_false") or 0
    return false_gaps <= max_false_gaps


def envelope(table, *, x="speed_mm_s", by=("n_rows", "frame_rate_hz"), max_span_error_pct=1.0,
             max_false_gaps=0, direction="max", where=None):
    """Per group, the largest (or smallest) value of ``x`` up to which reconstructions stay true.

    Parameters
    ----------
    table : SweepTable
        Sweep output (rows need ``span_error_pct`` and ``gap_false``).
    x : str, optional
        Column swept. Default is "speed_mm_s".
    by : tuple of str, optional
        Grouping columns. Default is ("n_rows", "frame_rate_hz").
    max_span_error_pct : float, optional
        A row passes when \\|span error\\| < this. Default is 1.0.
    max_false_gaps : int, optional
        ... and it reports at most this many gaps that match no true gap. Default is 0.
    direction : {"max", "min"}, optional
        "max": highest x with all rows passing at every x up to it (e.g. speed); "min": lowest
        x with all rows passing at every x from it upwards (e.g. frame rate). Default is "max".
    where : Mapping, optional
        Only rows whose columns equal these values. Default is None.

    Returns
    -------
    Envelope

    Examples
    --------
    >>> rows = [{"n_rows": 8, "speed_mm_s": v, "span_error_pct": e, "gap_false": 0}
    ...         for v, e in [(50, 0.1), (100, 0.5), (200, 3.0)]]
    >>> envelope(SweepTable(tuple(rows)), by=("n_rows",)).limit.tolist()
    [100.0]
    """
    if not isinstance(table, SweepTable):
        raise TypeError(f"table must be a SweepTable; got {type(table).__name__}")
    check_choice(direction, ("max", "min"), name="direction")
    thr = check_positive(max_span_error_pct, name="max_span_error_pct")
    mfg = check_int(max_false_gaps, name="max_false_gaps", lo=0)
    by = tuple(by)
    for name in by + (x,):
        if name not in table.columns:
            raise ValueError(f"column {name!r} not in the table; columns are {list(table.columns)}")
    rows = table.select(**dict(where or {})).rows
    groups = sorted({tuple(r.get(b) for b in by) for r in rows},
                    key=lambda g: tuple((0, v, "") if isinstance(v, (int, float)) else (1, 0, str(v))
                                        for v in g))
    xs = np.array(sorted({float(r[x]) for r in rows}), dtype=np.float64)
    frac = np.full((len(groups), len(xs)), np.nan)
    gi = {g: i for i, g in enumerate(groups)}
    xi = {v: j for j, v in enumerate(xs)}
    num = np.zeros_like(frac)
    den = np.zeros_like(frac)
    for r in rows:
        i, j = gi[tuple(r.get(b) for b in by)], xi[float(r[x])]
        den[i, j] += 1
        num[i, j] += _passes(r, thr, mfg)
    ok = den > 0
    frac[ok] = num[ok] / den[ok]
    limit = np.full(len(groups), np.nan)
    for i in range(len(groups)):
        order = range(len(xs)) if direction == "max" else range(len(xs) - 1, -1, -1)
        for j in order:
            if not ok[i, j]:
                continue
            if frac[i, j] < 1.0:
                break
            limit[i] = xs[j]
    crit = {"max_span_error_pct": thr, "max_false_gaps": mfg, "direction": direction}
    return Envelope(by, x, groups, xs, frac, limit, crit)


def min_frame_rate(table, *, speed_mm_s, by=("n_rows",), max_span_error_pct=1.0, max_false_gaps=0):
    """Lowest frame rate at which swipes at ``speed_mm_s`` stay true, per group.

    Returns an :class:`Envelope` over ``frame_rate_hz`` (``direction="min"``) restricted to
    rows at that speed.

    Examples
    --------
    >>> rows = [{"n_rows": 8, "speed_mm_s": 100.0, "frame_rate_hz": f, "span_error_pct": e,
    ...          "gap_false": 0} for f, e in [(250.0, 5.0), (500.0, 0.4), (1000.0, 0.2)]]
    >>> min_frame_rate(SweepTable(tuple(rows)), speed_mm_s=100.0).limit.tolist()
    [500.0]
    """
    check_positive(speed_mm_s, name="speed_mm_s")
    return envelope(table, x="frame_rate_hz", by=by, max_span_error_pct=max_span_error_pct,
                    max_false_gaps=max_false_gaps, direction="min",
                    where={"speed_mm_s": speed_mm_s})
