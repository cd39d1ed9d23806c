"""Calibration of an uncalibrated strip sensor: fixed-pattern offset and gain, dead/stuck/noisy
plates, and finger presence. Raw frames in, a :class:`Calibration` (or a :class:`Presence`) out.

The per-plate offset is the mean code over finger-absent ("blank") frames, which may come from
the start of a dump, a separate file, or frames classified as empty; the per-plate gain needs a
second reference level (frames of a uniform target, e.g. a flat grounded conductor pressed on the
sensor). Bad plates are found with robust (median / MAD) thresholds and repaired by linear
interpolation across the row.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Mapping

import numpy as np

from ._validate import check_frames, check_positive

__all__ = [
    "BAD_KINDS",
    "BadPlates",
    "Calibration",
    "CalibrationError",
    "Presence",
    "estimate_calibration",
    "calibrate_from_frames",
    "find_bad_plates",
    "finger_presence",
    "empty_frames",
    "repair_plates",
]

#: Kinds of bad plates: ``dead`` (constant at the lowest code: no output), ``stuck`` (constant
#: at another code while its neighbours vary), ``noisy`` (temporal noise far above the others
#: over blanks), ``weak`` (response far below the others over finger frames or between the two
#: reference levels).
BAD_KINDS = ("dead", "stuck", "noisy", "weak")

#: Normal-consistency factor of the median absolute deviation: sigma = 1.4826 * MAD for
#: Gaussian data (common practice; Rousseeuw & Croux, JASA 88(424):1273-1283, 1993).
MAD_TO_SIGMA = 1.4826

CALIBRATION_FORMAT = "stripstitch-calibration"
CALIBRATION_VERSION = 1


class CalibrationError(ValueError):
    """Frames or files unfit for calibration (e.g. no blank frames, mismatched geometry)."""


def _frozen(a, dtype=np.float64):
    a = np.array(a, dtype=dtype)
    a.flags.writeable = False
    return a


def _robust_sigma(x):
    """(median, MAD-based sigma) of the finite values of ``x``."""
    x = np.asarray(x, dtype=np.float64)
    x = x[np.isfinite(x)]
    if x.size == 0:
        return 0.0, 0.0
    med = float(np.median(x))
    return med, MAD_TO_SIGMA * float(np.median(np.abs(x - med)))


# ----------------------------------------------------------------------------------------------
# bad plates
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class BadPlates:
    """Plates (and columns) that do not work, and why.

    Attributes
    ----------
    bad : (R, C) ndarray of bool
        True for every plate to repair.
    kind : (R, C) ndarray of str
        ``""`` for good plates, else one of :data:`BAD_KINDS`.
    columns : tuple of int
        Columns in which at least half the plates are bad (a broken column line).
    thresholds : Mapping
        The thresholds used (plain numbers), for the report.
    """

    bad: np.ndarray
    kind: np.ndarray
    columns: tuple = ()
    thresholds: Mapping = field(default_factory=dict)

    def __post_init__(self):
        object.__setattr__(self, "bad", _frozen(self.bad, bool))
        object.__setattr__(self, "kind", _frozen(self.kind, "<U5"))
        object.__setattr__(self, "columns", tuple(int(c) for c in self.columns))
        object.__setattr__(self, "thresholds", MappingProxyType(dict(self.thresholds)))

    @property
    def n_bad(self):
        return int(self.bad.sum())

    def listing(self):
        """Bad plates as a list of ``{"row", "column", "kind"}`` dictionaries (row-major order)."""
        rr, cc = np.nonzero(self.bad)
        return [{"row": int(r), "column": int(c), "kind": str(self.kind[r, c])}
                for r, c in zip(rr, cc)]

    def counts(self):
        """Number of bad plates of each kind."""
        return {k: int(np.count_nonzero(self.kind == k)) for k in BAD_KINDS}


def find_bad_plates(frames, *, blank_frames=None, reference_frames=None, mad_threshold=6.0,
                    weak_fraction=0.2):
    """Find dead, stuck, noisy and weak plates.

    Parameters
    ----------
    frames : (T, R, C) array_like or None
        Frames with the finger moving over the sensor (T >= 2), used for dead/stuck/weak.
        May be None when ``blank_frames`` (and ideally ``reference_frames``) are given.
    blank_frames : (N, R, C) array_like, optional
        Finger-absent frames, used for noisy plates (and dead/stuck when they differ from
        the reference level). Default is None.
    reference_frames : (M, R, C) array_like, optional
        Frames of a uniform second level (see :func:`estimate_calibration`). Default is None.
    mad_threshold : float, optional
        How many robust standard deviations (1.4826 x MAD) from the median count as "far".
        Default is 6.0.
    weak_fraction : float, optional
        A plate responding with less than this fraction of the median response is ``weak``.
        Default is 0.2.

    Returns
    -------
    BadPlates

    Notes
    -----
    Over the finger frames, each plate's temporal standard deviation ``s`` measures its
    response to passing ridges. A plate whose code never changes (``max == min``) while the
    median plate varies is ``dead`` if that code is the lowest code in the data (the
    front end's bottom code) and ``stuck`` otherwise. A varying plate with ``s`` below
    ``median(s) - mad_threshold * sigma_MAD`` and below ``weak_fraction * median(s)`` is
    ``weak``. Over blanks, a plate whose temporal standard deviation exceeds
    ``median + mad_threshold * sigma_MAD`` (and twice the median) is ``noisy``. With a
    reference level, a plate whose mean step from blank to reference is below
    ``weak_fraction`` of the median step is ``dead``/``stuck`` (constant) or ``weak``.
    The robust scale is the median absolute deviation with its Gaussian consistency factor
    1.4826 (Rousseeuw & Croux 1993, doi:10.1080/01621459.1993.10476408), floored at 5 % of
    the median so that a quiet, well-matched array does not flag its ordinary plates. A
    noisy plate must also show a high robust noise of successive differences
    (1.4826 MAD / sqrt(2)), so that a finger touching a few plates of a "blank" is not noise.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> frames = rng.integers(20, 200, size=(50, 4, 16))
    >>> frames[:, 1, 5] = 0           # dead plate (bottom code)
    >>> frames[:, 2, 9] = 77          # stuck plate
    >>> bp = find_bad_plates(frames)
    >>> bp.listing()
    [{'row': 1, 'column': 5, 'kind': 'dead'}, {'row': 2, 'column': 9, 'kind': 'stuck'}]
    """
    k = check_positive(mad_threshold, name="mad_threshold")
    wf = check_positive(weak_fraction, name="weak_fraction")
    if frames is None and blank_frames is None:
        raise ValueError("find_bad_plates needs frames or blank_frames; got neither")
    shape = None
    arrays = {}
    for name, arr in (("frames", frames), ("blank_frames", blank_frames),
                      ("reference_frames", reference_frames)):
        if arr is None:
            continue
        a = check_frames(arr, name=name, min_frames=2 if name == "frames" else 1)
        if shape is not None and a.shape[1:] != shape:
            raise ValueError(f"{name} must have frames of shape {shape} like the others; got "
                             f"{a.shape[1:]}")
        shape = a.shape[1:]
        arrays[name] = a
    kind = np.full(shape, "", dtype="<U5")
    thresholds = {"mad_threshold": k, "weak_fraction": wf}
    lowest = min(float(np.min(a)) for a in arrays.values())

    def floor(med, sig):
        # relative, so the thresholds hold in any unit (an absolute 1e-12 hid every weak
        # plate of frames read in farads); the smallest normal float only where both are 0
        return max(sig, 0.05 * abs(med)) or np.finfo(np.float64).tiny

    if "frames" in arrays:
        a = arrays["frames"].astype(np.float64)
        s = a.std(axis=0)
        constant = a.max(axis=0) == a.min(axis=0)
        med, sig = _robust_sigma(s[~constant])
        sig = floor(med, sig)
        if med > 0:
            first = a[0]
            kind[constant & (first <= lowest)] = "dead"
            kind[constant & (first > lowest)] = "stuck"
            weak = (~constant) & (s < med - k * sig) & (s < wf * med)
            kind[weak & (kind == "")] = "weak"
        thresholds["finger_std_median"] = med
    if "blank_frames" in arrays and arrays["blank_frames"].shape[0] >= 2:
        b = arrays["blank_frames"].astype(np.float64)
        s = b.std(axis=0)
        med, sig = _robust_sigma(s)
        sig = floor(med, sig)
        noisy = (s > med + k * sig) & (s > 2 * med)
        if b.shape[0] >= 3:
            # A finger arriving on a few plates is a step, not noise: also ask the robust
            # noise of successive differences (MAD / sqrt(2)) to be high.
            d = np.diff(b, axis=0)
            rs = MAD_TO_SIGMA * np.median(np.abs(d - np.median(d, axis=0)), axis=0) / np.sqrt(2)
            rmed = float(np.median(rs))
            noisy &= rs > 2 * max(rmed, 0.5 * med)
        kind[noisy & (kind == "")] = "noisy"
        thresholds["blank_std_median"] = med
        thresholds["blank_std_limit"] = med + k * sig
    if "blank_frames" in arrays and "reference_frames" in arrays:
        step = arrays["reference_frames"].mean(axis=0) - arrays["blank_frames"].mean(axis=0)
        med = float(np.median(step))
        if med != 0:
            rel = step / med
            ref = arrays["reference_frames"]
            const = ref.max(axis=0) == ref.min(axis=0)
            low = rel < wf
            kind[low & const & (ref[0] <= lowest) & (kind == "")] = "dead"
            kind[low & const & (kind == "")] = "stuck"
            kind[low & (kind == "")] = "weak"
            thresholds["reference_step_median"] = med
    bad = kind != ""
    columns = tuple(np.flatnonzero(bad.mean(axis=0) >= 0.5)) if shape[0] >= 2 else ()
    return BadPlates(bad=bad, kind=kind, columns=columns, thresholds=thresholds)


def _repair_plan(bad):
    """Per bad plate: row, column, left/right good neighbour in the row and weight."""
    r_n, c_n = bad.shape
    good = ~bad
    cols = np.arange(c_n)
    # nearest good column to the left / right of every plate (-1 / c_n when none)
    left = np.where(good, cols, -1)
    left = np.maximum.accumulate(left, axis=1)
    right = np.where(good, cols, c_n)
    right = np.minimum.accumulate(right[:, ::-1], axis=1)[:, ::-1]
    rr, cc = np.nonzero(bad)
    lf, rt = left[rr, cc], right[rr, cc]
    has_l, has_r = lf >= 0, rt < c_n
    lf = np.where(has_l, lf, rt)
    rt = np.where(has_r, rt, lf)
    with np.errstate(invalid="ignore", divide="ignore"):
        w = np.where((rt != lf), (cc - lf) / np.maximum(rt - lf, 1), 0.0)
    row_ok = has_l | has_r
    return rr, cc, lf, rt, w, row_ok


def repair_plates(frames, bad):
    """Replace bad plates by linear interpolation between the nearest good plates of the row.

    Parameters
    ----------
    frames : (..., R, C) array_like
        Frames (a single frame or a stack).
    bad : (R, C) array_like of bool
        Plates to replace.

    Returns
    -------
    ndarray of float64
        A repaired copy. Plates at a row's end take the nearest good plate; in a row with no
        good plate, the mean of the rows' interpolated values above and below is used.

    Examples
    --------
    >>> f = np.array([[1.0, 9.0, 3.0, 4.0]])
    >>> repair_plates(f, [[False, True, False, True]]).tolist()
    [[1.0, 2.0, 3.0, 3.0]]
    """
    out = np.array(frames, dtype=np.float64)
    bad = np.asarray(bad, dtype=bool)
    if out.ndim < 2 or out.shape[-2:] != bad.shape:
        raise ValueError(f"frames must end in the plate shape {bad.shape} of bad; got {out.shape}")
    if not bad.any():
        return out
    if bad.all():
        raise ValueError("bad marks every plate; nothing is left to interpolate from")
    rr, cc, lf, rt, w, row_ok = _repair_plan(bad)
    ok = row_ok
    out[..., rr[ok], cc[ok]] = ((1 - w[ok]) * out[..., rr[ok], lf[ok]]
                                + w[ok] * out[..., rr[ok], rt[ok]])
    if not ok.all():
        good_rows = np.flatnonzero(~bad.all(axis=1))
        for r in np.unique(rr[~ok]):            # loop over (rare) fully dead rows only
            above = good_rows[good_rows < r]
            below = good_rows[good_rows > r]
            src = [x[-1] for x in (above,) if x.size] + [x[0] for x in (below,) if x.size]
            out[..., r, :] = np.mean([out[..., s, :] for s in src], axis=0)
    return out


# ----------------------------------------------------------------------------------------------
# calibration
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class Calibration:
    """Fixed-pattern correction of one sensor: ``(code - offset) / gain``, bad plates repaired.

    Attributes
    ----------
    offset : (R, C) ndarray of float64
        Mean code per plate with no finger (blank level).
    gain : (R, C) ndarray of float64
        Relative gain per plate (median over good plates = 1); all ones without a reference
        level.
    bad : (R, C) ndarray of bool
        Plates replaced by interpolation across the row.
    kind : (R, C) ndarray of str
        Why each bad plate is bad (:data:`BAD_KINDS`), ``""`` for good ones.
    noise : (R, C) ndarray of float64
        Temporal standard deviation per plate over the blanks (codes); NaN with one blank.
    n_blank_frames : int
        Blank frames averaged (the offset's standard error is noise / sqrt(n_blank_frames)).
    n_reference_frames : int
        Reference frames averaged (0: no gain estimate).
    bad_columns : tuple of int
        Columns with at least half of their plates bad.
    notes : Mapping
        Free-form provenance (source files, blank frame range, ...).
    """

    offset: np.ndarray
    gain: np.ndarray
    bad: np.ndarray
    kind: np.ndarray
    noise: np.ndarray
    n_blank_frames: int
    n_reference_frames: int = 0
    bad_columns: tuple = ()
    notes: Mapping = field(default_factory=dict)

    def __post_init__(self):
        for name in ("offset", "gain", "noise"):
            object.__setattr__(self, name, _frozen(getattr(self, name)))
        object.__setattr__(self, "bad", _frozen(self.bad, bool))
        object.__setattr__(self, "kind", _frozen(self.kind, "<U5"))
        object.__setattr__(self, "bad_columns", tuple(int(c) for c in self.bad_columns))
        object.__setattr__(self, "n_blank_frames", int(self.n_blank_frames))
        object.__setattr__(self, "n_reference_frames", int(self.n_reference_frames))
        object.__setattr__(self, "notes", MappingProxyType(dict(self.notes)))
        shape = self.offset.shape
        if self.offset.ndim != 2:
            raise ValueError(f"offset must have shape (n_rows, n_cols); got {shape}")
        for name in ("gain", "bad", "kind", "noise"):
            if getattr(self, name).shape != shape:
                raise ValueError(f"{name} must have the shape {shape} of offset; got "
                                 f"{getattr(self, name).shape}")
        if not np.isfinite(self.offset).all():
            raise ValueError("offset must be finite")
        g = self.gain
        if not (np.isfinite(g).all() and (g > 0).all()):
            raise ValueError("gain must be finite and > 0 on every plate")

    @property
    def shape(self):
        return self.offset.shape

    def bad_plates(self):
        """The bad plates as a :class:`BadPlates`."""
        return BadPlates(bad=self.bad, kind=self.kind, columns=self.bad_columns)

    def apply(self, frames):
        """Correct frames: ``(frames - offset) / gain``, bad plates interpolated across rows.

        Parameters
        ----------
        frames : (T, R, C) or (R, C) array_like
            Raw codes of the sensor this calibration belongs to.

        Returns
        -------
        ndarray of float64
            Same shape; finger signal above the blank level in units of a median plate's codes.
        """
        arr = np.asarray(frames)
        if arr.dtype.kind not in "uif":
            raise TypeError(f"frames must be real numeric; got dtype {arr.dtype}")
        if arr.ndim not in (2, 3) or arr.shape[-2:] != self.shape:
            raise ValueError(f"frames must have shape (T, {self.shape[0]}, {self.shape[1]}) to "
                             f"match the calibration; got {arr.shape}")
        out = (arr.astype(np.float64) - self.offset) / self.gain
        return repair_plates(out, self.bad) if self.bad.any() else out

    def summary(self):
        """JSON-ready summary (counts, noise, bad plates)."""
        kinds = {k: int(np.count_nonzero(self.kind == k)) for k in BAD_KINDS}
        rr, cc = np.nonzero(self.bad)
        noise = self.noise[np.isfinite(self.noise)]
        return {"shape": list(self.shape), "n_blank_frames": self.n_blank_frames,
                "n_reference_frames": self.n_reference_frames,
                "offset_median": float(np.median(self.offset)),
                "offset_spread": float(np.std(self.offset)),
                "gain_spread": float(np.std(self.gain)),
                "noise_median": float(np.median(noise)) if noise.size else None,
                "bad_counts": kinds, "bad_columns": list(self.bad_columns),
                "bad_plates": [{"row": int(r), "column": int(c), "kind": str(self.kind[r, c])}
                               for r, c in zip(rr, cc)],
                "notes": dict(self.notes)}

    def save(self, path, *, overwrite=False):
        """Save as ``.npz``: arrays plus a JSON ``header`` string (no pickle)."""
        from .io import atomic_output, _plain
        header = {"format": CALIBRATION_FORMAT, "version": CALIBRATION_VERSION,
                  "shape": list(self.shape), "n_blank_frames": self.n_blank_frames,
                  "n_reference_frames": self.n_reference_frames,
                  "bad_columns": list(self.bad_columns), "notes": _plain(dict(self.notes))}
        with atomic_output(path, overwrite=overwrite) as fh:
            np.savez_compressed(fh, offset=self.offset, gain=self.gain, bad=self.bad,
                                kind=self.kind, noise=self.noise,
                                header=np.array(json.dumps(header)))

    @classmethod
    def load(cls, path):
        """Load a calibration written by :meth:`save` (``allow_pickle=False``)."""
        path = Path(path)
        try:
            with open(path, "rb") as fh, np.load(fh, allow_pickle=False) as npz:
                arrays = {k: npz[k] for k in npz.files}
        except FileNotFoundError:
            raise
        except Exception as exc:     # zipfile/numpy raise many kinds on damaged files
            raise CalibrationError(f"calibration {str(path)!r} is not a readable .npz: "
                                   f"{exc}") from None
        missing = [k for k in ("offset", "gain", "bad", "kind", "noise", "header")
                   if k not in arrays]
        if missing:
            raise CalibrationError(f"calibration {str(path)!r} lacks array(s) {missing}")
        try:
            header = json.loads(str(arrays["header"][()]))
        except (ValueError, TypeError, IndexError) as exc:
            raise CalibrationError(f"calibration {str(path)!r}: header is not JSON: {exc}") from None
        if not isinstance(header, dict) or header.get("format") != CALIBRATION_FORMAT:
            raise CalibrationError(f"calibration {str(path)!r}: header field 'format' must be "
                                   f"{CALIBRATION_FORMAT!r}")
        if header.get("version") != CALIBRATION_VERSION:
            raise CalibrationError(f"calibration {str(path)!r}: header field 'version' is "
                                   f"{header.get('version')!r}; this reader understands "
                                   f"{CALIBRATION_VERSION}")
        try:
            return cls(offset=arrays["offset"], gain=arrays["gain"], bad=arrays["bad"],
                       kind=arrays["kind"], noise=arrays["noise"],
                       n_blank_frames=int(header.get("n_blank_frames", 0)),
                       n_reference_frames=int(header.get("n_reference_frames", 0)),
                       bad_columns=tuple(header.get("bad_columns", ())),
                       notes=header.get("notes") or {})
        except (ValueError, TypeError) as exc:
            raise CalibrationError(f"calibration {str(path)!r}: {exc}") from None


def estimate_calibration(blank_frames, *, reference_frames=None, frames=None, mad_threshold=6.0,
                         notes=None):
    """Estimate a sensor's fixed pattern from finger-absent frames.

    Parameters
    ----------
    blank_frames : (N, R, C) array_like
        Frames with no finger on the sensor (N >= 1; more averages the noise down).
    reference_frames : (M, R, C) array_like, optional
        Frames at a second, uniform level (e.g. a flat grounded conductor covering the
        sensor); when given, the per-plate gain is estimated. Default is None (gain 1).
    frames : (T, R, C) array_like, optional
        Finger frames, used to find stuck, dead and weak plates. Default is None.
    mad_threshold : float, optional
        Passed to :func:`find_bad_plates`. Default is 6.0.
    notes : dict, optional
        Provenance to keep with the calibration. Default is None.

    Returns
    -------
    Calibration

    Notes
    -----
    ``offset = mean over blanks``; its error on each plate is the standard error of the mean,
    ``sigma / sqrt(N)`` for temporal noise ``sigma`` (e.g. J. R. Taylor, *An Introduction to
    Error Analysis*, 2nd ed., 1997, section 4.4). ``gain = (mean(reference) - offset)``
    divided by its median over good plates (two-point, "flat-field" correction: common
    practice in imaging sensors).

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> offset = rng.normal(20, 3, size=(4, 8))
    >>> blanks = offset + rng.normal(0, 1, size=(400, 4, 8))
    >>> cal = estimate_calibration(blanks)
    >>> bool(np.abs(cal.offset - offset).max() < 0.25), cal.n_blank_frames
    (True, 400)
    """
    b = check_frames(blank_frames, name="blank_frames", min_frames=1)
    ref = None
    if reference_frames is not None:
        ref = check_frames(reference_frames, name="reference_frames", min_frames=1)
        if ref.shape[1:] != b.shape[1:]:
            raise ValueError(f"reference_frames must have frames of shape {b.shape[1:]} like "
                             f"blank_frames; got {ref.shape[1:]}")
    if frames is not None:
        f = check_frames(frames, name="frames")
        if f.shape[1:] != b.shape[1:]:
            raise ValueError(f"frames must have frames of shape {b.shape[1:]} like "
                             f"blank_frames; got {f.shape[1:]}")
    bf = b.astype(np.float64)
    offset = bf.mean(axis=0)
    noise = bf.std(axis=0, ddof=1) if b.shape[0] >= 2 else np.full(offset.shape, np.nan)
    bp = find_bad_plates(frames, blank_frames=b, reference_frames=ref,
                         mad_threshold=mad_threshold)
    gain = np.ones_like(offset)
    if ref is not None:
        step = ref.astype(np.float64).mean(axis=0) - offset
        good = ~bp.bad & (step > 0)
        if not good.any():
            raise CalibrationError("reference_frames are not above blank_frames on any good "
                                   "plate; a gain cannot be estimated (swap them?)")
        g = step / np.median(step[good])
        gain = np.where(good, g, 1.0)
    n = dict(notes or {})
    return Calibration(offset=offset, gain=gain, bad=bp.bad, kind=bp.kind, noise=noise,
                       n_blank_frames=b.shape[0], n_reference_frames=0 if ref is None else
                       ref.shape[0], bad_columns=bp.columns, notes=n)


def calibrate_from_frames(frames, *, n_blank=None, reference_frames=None, mad_threshold=6.0,
                          guard_frames=5):
    """Calibrate from a swipe itself: blanks are its first ``n_blank`` frames, or else the
    frames :func:`finger_presence` scores as empty (score <= 0.02) that lie more than
    ``guard_frames`` (default 5) frames from any frame with a trace of the finger.

    Raises
    ------
    CalibrationError
        No blank frames found (then record blanks separately, or pass ``n_blank``).

    Notes
    -----
    Frames before the finger arrives are not quite blank: the skin curving away from the
    sensor beyond the pad still adds a little capacitance (a fraction of a code on a typical
    front end), which ends up in the offset. A separate finger-absent capture avoids it.
    The indices of the frames used are kept in ``notes["blank_frame_indices"]``.
    """
    f = check_frames(frames)
    if n_blank is not None:
        if isinstance(n_blank, bool) or not isinstance(n_blank, (int, np.integer)) or not (
                1 <= n_blank < f.shape[0]):
            raise ValueError(f"n_blank must be an integer in [1, {f.shape[0] - 1}]; got {n_blank!r}")
        blank_idx = np.arange(int(n_blank))
        source = f"first {int(n_blank)} frames"
    else:
        # Empty frames, keeping a guard of a few frames away from any frame with a trace of
        # the finger (its arrival starts below the presence threshold).
        p = finger_presence(f)
        touched = np.flatnonzero(p.score > 0)
        empty = p.score <= 0.02
        if touched.size:
            near = np.abs(np.arange(f.shape[0])[:, None] - touched[None, :]).min(axis=1)
            empty &= near > int(guard_frames)
        blank_idx = np.flatnonzero(empty)
        if blank_idx.size == 0:
            raise CalibrationError("no finger-absent frames found in the swipe to calibrate "
                                   "from; record blank frames (no finger) separately or pass "
                                   "n_blank")
        source = f"{blank_idx.size} frames classified as empty"
    finger = np.setdiff1d(np.arange(f.shape[0]), blank_idx)
    return estimate_calibration(f[blank_idx], reference_frames=reference_frames,
                                frames=f[finger] if finger.size >= 2 else None,
                                mad_threshold=mad_threshold,
                                notes={"blank_source": source,
                                       "blank_frames": [int(blank_idx[0]), int(blank_idx[-1])],
                                       "blank_frame_indices": [int(i) for i in blank_idx]})


# ----------------------------------------------------------------------------------------------
# finger presence
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class Presence:
    """Where the finger is on the sensor.

    Attributes
    ----------
    score : (T,) ndarray of float64
        Fraction of the strip under the finger in each frame, in [0, 1] (an estimate of the
        contact fraction).
    present : (T,) ndarray of bool
        ``score >= threshold``.
    first, last : int or None
        First and last frame with the finger present (None when it never is).
    threshold : float
        Score threshold used for ``present``.
    level : float
        Code step above the blank level that counts as ridge contact.
    noise : float
        Noise estimate (codes) behind ``level``.
    """

    score: np.ndarray
    present: np.ndarray
    first: int | None
    last: int | None
    threshold: float
    level: float
    noise: float

    def __post_init__(self):
        object.__setattr__(self, "score", _frozen(self.score))
        object.__setattr__(self, "present", _frozen(self.present, bool))

    @property
    def any(self):
        """True when the finger is present in at least one frame."""
        return self.first is not None

    @property
    def n_present(self):
        return int(self.present.sum())

    def span(self):
        """(first, last) frame with the finger, or None."""
        return None if self.first is None else (self.first, self.last)

    def partial(self, *, full=0.9):
        """Frames with the finger present but covering less than ``full`` of the strip
        (arrival and lift-off)."""
        return self.present & (self.score < full)


def finger_presence(frames, *, calibration=None, threshold=0.1, window_px=9, level=None):
    """Find the frames with the finger on the sensor.

    Parameters
    ----------
    frames : (T, R, C) array_like
        Raw codes (or calibrated frames if ``calibration`` is None and the blank level is 0).
    calibration : Calibration, optional
        Gives the blank level and noise per plate. Default is None: the blank level is each
        plate's 5th percentile over time (valleys and blanks both sit near it, since the
        valley capacitance is about 1 % of the ridge's: REFERENCE-VALUES.md Ex. 2) and the
        noise is estimated from the quietest frames.
    threshold : float, optional
        Score at or above which the finger counts as present. Default is 0.1.
    window_px : int, optional
        Width (columns) of the neighbourhood in which one ridge contact marks the skin as
        touching; about one ridge period (9.84 px at 500 ppi, REFERENCE-VALUES.md section 3).
        Default is 9.
    level : float, optional
        Code step above the blank level that marks ridge contact. Default is None: the larger
        of 5 noise sigma and 10 % of the 99.5th percentile of the signal.

    Returns
    -------
    Presence

    Notes
    -----
    A plate touches a ridge when its signal exceeds ``level``. Valleys between ridges read
    about as low as a blank, so a plate counts as under the finger when any plate within
    ``window_px`` columns (all rows) touches a ridge: a maximum filter (scipy.ndimage)
    over the contact map. ``score`` is the fraction of plates under the finger. If the
    99.5th percentile of the signal stays below 10 noise sigma, no frame holds a finger.

    Examples
    --------
    >>> rng = np.random.default_rng(2)
    >>> frames = rng.normal(10, 1, size=(30, 8, 64))
    >>> cols = np.arange(64)
    >>> frames[10:20] += 100 * (np.cos(2 * np.pi * cols / 9.84) > 0)   # finger in 10..19
    >>> p = finger_presence(frames)
    >>> p.first, p.last, p.n_present
    (10, 19, 10)
    """
    from scipy import ndimage

    f = check_frames(frames).astype(np.float64)
    thr = check_positive(threshold, name="threshold")
    if thr > 1:
        raise ValueError(f"threshold must be in (0, 1]; got {threshold!r}")
    if isinstance(window_px, bool) or not isinstance(window_px, (int, np.integer)) or window_px < 1:
        raise ValueError(f"window_px must be an integer >= 1; got {window_px!r}")
    if calibration is not None:
        v = calibration.apply(f)
        sig = calibration.noise[np.isfinite(calibration.noise) & ~calibration.bad]
        noise = float(np.median(sig)) if sig.size else np.nan
    else:
        v = f - np.percentile(f, 5, axis=0)
        noise = np.nan
    if not np.isfinite(noise) or noise <= 0:
        energy = np.percentile(v.reshape(v.shape[0], -1), 90, axis=1)
        quiet = energy <= np.percentile(energy, 20)
        _, noise = _robust_sigma(v[quiet])
        if noise <= 0:
            # quantised, noise-free data: one code step (or the data's own resolution)
            noise = 0.5
    top = float(np.percentile(v, 99.5))
    if level is None:
        lev = max(5.0 * noise, 0.1 * top)
    else:
        lev = check_positive(level, name="level")
    if level is None and top < 10.0 * noise:
        score = np.zeros(f.shape[0])
    else:
        touch = v > lev
        under = ndimage.maximum_filter(touch, size=(1, touch.shape[1], int(window_px)),
                                       mode="nearest")
        score = under.mean(axis=(1, 2))
    present = score >= thr
    idx = np.flatnonzero(present)
    first = int(idx[0]) if idx.size else None
    last = int(idx[-1]) if idx.size else None
    return Presence(score=score, present=present, first=first, last=last, threshold=thr,
                    level=float(lev), noise=float(noise))


def empty_frames(frames, *, calibration=None, max_score=0.02):
    """Boolean mask of frames with no finger (score at most ``max_score``).

    Parameters
    ----------
    frames : (T, R, C) array_like
    calibration : Calibration, optional
        Default is None.
    max_score : float, optional
        Largest presence score (fraction of the strip under the finger) of an empty frame.
        Default is 0.02.

    Returns
    -------
    (T,) ndarray of bool
    """
    ms = check_positive(max_score, name="max_score", allow_zero=True)
    p = finger_presence(frames, calibration=calibration)
    return p.score <= ms
