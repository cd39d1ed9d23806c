"""Input checks shared by the public entry points (each check names the argument, what was
expected and what came)."""

from __future__ import annotations

import numbers

import numpy as np

__all__ = [
    "check_frames",
    "check_frame",
    "check_positive",
    "check_real",
    "check_in_range",
    "check_int",
    "check_choice",
    "check_array",
]


def check_frames(frames, *, name="frames", min_frames=2, min_rows=2, max_rows=None,
                 min_cols=2):
    """Return ``frames`` as an ndarray of shape (T, R, C) after checking it.

    Raises ``ValueError`` for a bad shape or non-finite values and ``TypeError`` for a
    non-numeric dtype. The caller's array is not copied unless it must be.
    """
    arr = np.asarray(frames)
    if arr.dtype.kind not in "uif":
        raise TypeError(f"{name} must be real numeric (uint, int or float); got dtype {arr.dtype}")
    if arr.ndim != 3:
        raise ValueError(
            f"{name} must have shape (n_frames, n_rows, n_cols) with rows along the swipe; "
            f"got an array of {arr.ndim} dimension(s), shape {arr.shape}")
    t, r, c = arr.shape
    if t < min_frames:
        raise ValueError(f"{name} must hold at least {min_frames} frames; got {t} (shape {arr.shape})")
    if r < min_rows:
        raise ValueError(f"{name} must have at least {min_rows} rows per frame; got {r} (shape {arr.shape})")
    if max_rows is not None and r > max_rows:
        raise ValueError(f"{name} must have at most {max_rows} rows per frame; got {r} (shape {arr.shape})")
    if c < min_cols:
        raise ValueError(f"{name} must have at least {min_cols} columns per frame; got {c} (shape {arr.shape})")
    # A sum is finite exactly when no NaN or inf went in, unless it overflowed: only then
    # (or with a NaN/inf) is the elementwise check needed (no frame-sized temporary).
    if arr.dtype.kind == "f":
        with np.errstate(over="ignore", invalid="ignore"):
            total_ok = bool(np.isfinite(arr.sum()))
    if arr.dtype.kind == "f" and not total_ok and not np.isfinite(arr).all():
        n_bad = int(np.size(arr) - np.count_nonzero(np.isfinite(arr)))
        raise ValueError(f"{name} contains {n_bad} NaN or inf value(s); replace or mask them before stitching "
                         "(e.g. stripstitch.calibrate repairs dead plates)")
    return arr


def check_frame(frame, *, shape=None, name="frame"):
    """Return one (R, C) frame as an ndarray after checking it (and its shape against ``shape``)."""
    arr = np.asarray(frame)
    if arr.dtype.kind not in "uif":
        raise TypeError(f"{name} must be real numeric; got dtype {arr.dtype}")
    if arr.ndim != 2:
        raise ValueError(f"{name} must have shape (n_rows, n_cols); got shape {arr.shape}")
    if shape is not None and arr.shape != tuple(shape):
        raise ValueError(f"{name} must have the shape of the first frame {tuple(shape)}; got {arr.shape}")
    # A sum is finite exactly when no NaN or inf went in, unless it overflowed: only then
    # (or with a NaN/inf) is the elementwise check needed (no frame-sized temporary).
    if arr.dtype.kind == "f":
        with np.errstate(over="ignore", invalid="ignore"):
            total_ok = bool(np.isfinite(arr.sum()))
    if arr.dtype.kind == "f" and not total_ok and not np.isfinite(arr).all():
        raise ValueError(f"{name} contains NaN or inf values")
    return arr


def check_positive(value, *, name, allow_zero=False, allow_none=False):
    """Return ``value`` as float after checking it is a finite number > 0 (or >= 0)."""
    if value is None and allow_none:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TypeError(f"{name} must be a real number; got {type(value).__name__} {value!r}")
    v = float(value)
    ok = np.isfinite(v) and (v >= 0 if allow_zero else v > 0)
    if not ok:
        bound = ">= 0" if allow_zero else "> 0"
        raise ValueError(f"{name} must be a finite number {bound}; got {value!r}")
    return v


def check_real(value, *, name):
    """Return ``value`` as float after checking it is a finite real number (any sign)."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TypeError(f"{name} must be a real number; got {type(value).__name__} {value!r}")
    v = float(value)
    if not np.isfinite(v):
        raise ValueError(f"{name} must be a finite number; got {value!r}")
    return v


def check_in_range(value, lo, hi, *, name, allow_none=False):
    """Return ``value`` as float after checking lo <= value <= hi."""
    if value is None and allow_none:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TypeError(f"{name} must be a real number; got {type(value).__name__} {value!r}")
    v = float(value)
    if not (np.isfinite(v) and lo <= v <= hi):
        raise ValueError(f"{name} must be in [{lo}, {hi}]; got {value!r}")
    return v


def check_int(value, *, name, lo=None, hi=None, allow_none=False):
    """Return ``value`` as int after checking it is an integer in [lo, hi]."""
    if value is None and allow_none:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise TypeError(f"{name} must be an integer; got {type(value).__name__} {value!r}")
    v = int(value)
    if (lo is not None and v < lo) or (hi is not None and v > hi):
        lo_s = "-inf" if lo is None else lo
        hi_s = "inf" if hi is None else hi
        raise ValueError(f"{name} must be an integer in [{lo_s}, {hi_s}]; got {value!r}")
    return v


def check_choice(value, choices, *, name):
    """Return ``value`` after checking it is one of ``choices``."""
    if value not in choices:
        raise ValueError(f"{name} must be one of {sorted(choices)}; got {value!r}")
    return value


def check_array(value, *, name, shape=None, dtype=np.float64, finite=True):
    """Return ``value`` as an ndarray of ``dtype``; ``shape`` may use None for any length."""
    try:
        arr = np.asarray(value, dtype=dtype)
    except (TypeError, ValueError) as exc:
        raise TypeError(f"{name} must be array_like of numbers; got {type(value).__name__}") from exc
    if shape is not None:
        ok = arr.ndim == len(shape) and all(s is None or s == n for s, n in zip(shape, arr.shape))
        if not ok:
            want = "(" + ", ".join("n" if s is None else str(s) for s in shape) + ")"
            raise ValueError(f"{name} must have shape {want}; got {arr.shape}")
    if finite and arr.dtype.kind == "f" and not np.isfinite(arr).all():
        raise ValueError(f"{name} contains NaN or inf values")
    return arr
