"""Firmware-like integer path: shifts from 8-bit frames with integer arithmetic only.

What a microcontroller without a floating-point unit would run for each new frame:

1. subtract a per-plate integer offset (the fixed pattern) from each 8-bit sample (int16);
2. for every candidate shift (d, e) against the key frame (or the previous frame), the sum
   of absolute differences (SAD) over the overlap, normalised to a per-sample cost in fixed
   point, ``(SAD << 8) // n_overlap``;
3. the smallest cost, refined per axis by an equiangular (V-shaped) line fit through the
   three costs around it, in fixed point with ``frac_bits`` fractional bits;
4. positions as the running sum of the fixed-point shifts.

``estimate_shifts_int`` runs steps 1-3 over a stack (vectorised with numpy integer dtypes
only), ``operation_count`` gives the per-frame operation count, and ``stitch_int`` turns the
integer shifts into a :class:`~stripstitch.Reconstruction` (fusion and report in floating
point, off the device) so that it can be compared with the reference path.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import mosaic as _mosaic
from . import report as _report
from ._types import Reconstruction, ReconstructionError, _frozen_array
from ._validate import check_frames, check_int, check_positive

__all__ = ["IntShifts", "to_uint8", "estimate_shifts_int", "operation_count", "stitch_int"]

COST_BITS = 8          # fractional bits of the normalised per-sample cost


@dataclass(frozen=True, eq=False)
class IntShifts:
    """Integer shift estimates between successive frames.

    Attributes
    ----------
    shift_q : (T-1, 2) ndarray of int32
        Shift (along, across) of frame t+1 relative to frame t in fixed point:
        ``shift_px = shift_q / 2**frac_bits`` (library sign convention).
    cost : (T-1,) ndarray of int32
        Smallest normalised SAD per sample, in units of 2**-8 code.
    cost_zero : (T-1,) ndarray of int32
        The largest normalised cost over the candidates (a texture-contrast figure: a
        flat frame has min and max close together).
    frac_bits : int
    offset : (R, C) ndarray of int16
        The per-plate offset subtracted.
    """

    shift_q: np.ndarray
    cost: np.ndarray
    cost_zero: np.ndarray
    frac_bits: int
    offset: np.ndarray

    def __post_init__(self):
        object.__setattr__(self, "shift_q", _frozen_array(self.shift_q, dtype=np.int32))
        object.__setattr__(self, "cost", _frozen_array(self.cost, dtype=np.int32))
        object.__setattr__(self, "cost_zero", _frozen_array(self.cost_zero, dtype=np.int32))
        object.__setattr__(self, "offset", _frozen_array(self.offset, dtype=np.int16))
        object.__setattr__(self, "frac_bits", int(self.frac_bits))

    @property
    def shift_px(self):
        """Shifts in pixels (float64; conversion off the device)."""
        return self.shift_q.astype(np.float64) / (1 << self.frac_bits)

    def positions_q(self):
        """Frame positions in fixed point (running sum of shifts), (T, 2) int64."""
        out = np.zeros((self.shift_q.shape[0] + 1, 2), dtype=np.int64)
        np.cumsum(self.shift_q.astype(np.int64), axis=0, out=out[1:])
        return out


def to_uint8(frames, *, low=None, high=None):
    """Quantise frames to 8-bit codes as an 8-bit ADC would (off the device, float ok).

    Parameters
    ----------
    frames : (T, R, C) array_like
    low, high : float, optional
        Input values mapped to codes 0 and 255. Default None: the 0.1th and 99.9th
        percentiles.

    Returns
    -------
    (T, R, C) ndarray of uint8
    """
    x = check_frames(frames, min_frames=1, min_rows=1, min_cols=1).astype(np.float64)
    lo = float(np.percentile(x, 0.1)) if low is None else float(low)
    hi = float(np.percentile(x, 99.9)) if high is None else float(high)
    if not hi > lo:
        raise ValueError(f"high must be greater than low; got low={lo!r}, high={hi!r}")
    return np.clip(np.round((x - lo) / (hi - lo) * 255.0), 0, 255).astype(np.uint8)


def _check_uint8(frames):
    arr = np.asarray(frames)
    if arr.dtype != np.uint8:
        raise TypeError(f"frames_uint8 must have dtype uint8 (8-bit samples); got {arr.dtype}; "
                        "quantise with stripstitch.firmware.to_uint8")
    return check_frames(arr, min_frames=2, min_rows=3, min_cols=4, name="frames_uint8")


def _candidates(r_n, c_n, max_along, max_across):
    d = np.arange(-max_along, max_along + 1)
    e = np.arange(-max_across, max_across + 1)
    return d, e


def _sad_costs(a, b, d_range, e_range):
    """Normalised SAD for every candidate (integer only).

    ``a``, ``b``: (P, R, C) int16 (frame t and frame t+1, offset removed). Returns
    (P, nd, ne) int32 costs ``(SAD << COST_BITS) // n_overlap`` with
    ``SAD(d, e) = sum |a[r + d, c + e] - b[r, c]|`` over the overlap.
    """
    p_n, r_n, c_n = a.shape
    out = np.empty((p_n, len(d_range), len(e_range)), dtype=np.int32)
    diff = np.empty_like(a)
    for k, d in enumerate(d_range):
        d = int(d)
        ra = slice(max(d, 0), r_n + min(d, 0))
        rb = slice(max(-d, 0), r_n + min(-d, 0))
        for m, e in enumerate(e_range):
            e = int(e)
            ca = slice(max(e, 0), c_n + min(e, 0))
            cb = slice(max(-e, 0), c_n + min(-e, 0))
            n_ov = (r_n - abs(d)) * (c_n - abs(e))
            view = diff[:, :r_n - abs(d), :c_n - abs(e)]
            np.subtract(a[:, ra, ca], b[:, rb, cb], out=view)
            np.abs(view, out=view)
            sad = view.sum(axis=(1, 2), dtype=np.int64)
            out[:, k, m] = (np.left_shift(sad, COST_BITS) // n_ov).astype(np.int32)
    return out


def _equiangular_q(cm, c0, cp, frac_bits):
    """Sub-pixel offset of a V-shaped minimum from three integer costs, fixed point.

    Equiangular line fit: a line through the higher neighbour and the centre, its mirror
    through the lower neighbour; they cross at ``(cm - cp) / (2 (max(cm, cp) - c0))``
    (in [-1/2, 1/2]). All int64; the division rounds towards zero.
    """
    cm = cm.astype(np.int64)
    c0 = c0.astype(np.int64)
    cp = cp.astype(np.int64)
    num = np.left_shift(cm - cp, frac_bits)
    den = 2 * (np.maximum(cm, cp) - c0)
    safe = np.where(den > 0, den, 1)
    q = np.where(den > 0, num // safe, 0)
    neg = (num < 0) & (den > 0) & (num % safe != 0)
    q = q + neg.astype(np.int64)                  # floor -> round towards zero
    half = 1 << (frac_bits - 1)
    return np.clip(q, -half, half)


def _best_q(costs, d_rng, e_rng, frac_bits):
    """Integer argmin of (P, nd, ne) costs plus the equiangular fraction per axis (Q format)."""
    p_n, nd, ne = costs.shape
    flat = costs.reshape(p_n, -1)
    k = np.argmin(flat, axis=1)
    kd, ke = np.divmod(k, ne)
    idx = np.arange(p_n)
    cmin = flat[idx, k]
    shift_q = np.zeros((p_n, 2), dtype=np.int64)
    for axis, kk, n in ((0, kd, nd), (1, ke, ne)):
        inner = (kk > 0) & (kk < n - 1)
        km = np.clip(kk - 1, 0, n - 1)
        kp = np.clip(kk + 1, 0, n - 1)
        if axis == 0:
            cm, cp = costs[idx, km, ke], costs[idx, kp, ke]
        else:
            cm, cp = costs[idx, kd, km], costs[idx, kd, kp]
        frac = np.where(inner, _equiangular_q(cm, cmin, cp, frac_bits), 0)
        base = (d_rng if axis == 0 else e_rng)[kk].astype(np.int64)
        shift_q[:, axis] = np.left_shift(base, frac_bits) + frac
    return shift_q, cmin, flat.max(axis=1)


def estimate_shifts_int(frames_uint8, *, max_along=None, max_across=3, frac_bits=8,
                        offset=None, reference="keyframe"):
    """Shifts between successive 8-bit frames with integer arithmetic only.

    Parameters
    ----------
    frames_uint8 : (T, R, C) uint8 array
        Raw 8-bit frames.
    max_along : int, optional
        Largest along-swipe shift searched, either direction. Default None: R - 3 (at
        least three rows of overlap).
    max_across : int, optional
        Largest lateral shift searched. Default 3.
    frac_bits : int, optional
        Fractional bits of the fixed-point shifts (1/256 px for 8). Default 8.
    offset : (R, C) integer array, optional
        Per-plate offset (fixed pattern) in codes, e.g. from a calibration. Default None:
        the per-plate integer mean over the frames, ``sum // T``.
    reference : {"keyframe", "previous"}, optional
        Match each frame against a key frame, kept while the next frame is expected
        within ``min(max_along - 1, R // 2 - 1)`` px of it (over half the strip
        overlapping), or always against the previous frame. Default "keyframe" (fewer
        step errors add up along the swipe; the same work per frame).

    Returns
    -------
    IntShifts

    Notes
    -----
    Sum of absolute differences block matching with an equiangular sub-pixel fit [1]_;
    the equiangular fit suits the V-shaped SAD minimum better than a parabola [1]_. Every
    array in the hot path is int16 (samples), int32 (costs) or int64 (sums); see
    :func:`operation_count` for the work per frame.

    References
    ----------
    .. [1] M. Shimizu and M. Okutomi, "Significance and attributes of subpixel estimation
           on area-based matching", Systems and Computers in Japan 34(12), 1-10 (2003).
           doi:10.1002/scj.10506 (from memory)

    Examples
    --------
    >>> import numpy as np
    >>> from scipy import ndimage
    >>> tex = ndimage.gaussian_filter(np.random.default_rng(0).standard_normal((300, 64)), 2.0)
    >>> frames = to_uint8(np.stack([tex[2 * t: 2 * t + 8] for t in range(40)]))
    >>> est = estimate_shifts_int(frames)
    >>> est.shift_q.dtype, bool(np.abs(est.shift_px[:, 0] - 2.0).max() < 0.1)
    (dtype('int32'), True)
    """
    x = _check_uint8(frames_uint8)
    t_n, r_n, c_n = x.shape
    if max_along is None:
        max_along = r_n - 3
    max_along = check_int(max_along, name="max_along", lo=0, hi=r_n - 1)
    max_across = check_int(max_across, name="max_across", lo=0, hi=c_n - 1)
    frac_bits = check_int(frac_bits, name="frac_bits", lo=1, hi=16)
    if offset is None:
        off = (x.sum(axis=0, dtype=np.int64) // t_n).astype(np.int16)
    else:
        off = np.asarray(offset)
        if off.dtype.kind not in "ui":
            raise TypeError(f"offset must be an integer array (codes); got dtype {off.dtype}")
        if off.shape != (r_n, c_n):
            raise ValueError(f"offset must have shape {(r_n, c_n)}; got {off.shape}")
        off = off.astype(np.int16)
    z = x.astype(np.int16) - off[None]                 # int16, |z| <= 255
    if reference not in ("keyframe", "previous"):
        raise ValueError(f"reference must be one of ['keyframe', 'previous']; got {reference!r}")
    d_rng, e_rng = _candidates(r_n, c_n, max_along, max_across)
    if reference == "previous":
        costs = _sad_costs(z[:-1], z[1:], d_rng, e_rng)    # (T-1, nd, ne) int32
        shift_q, cmin, cmax = _best_q(costs, d_rng, e_rng, frac_bits)
    else:
        # Each frame against a key frame, kept while the next frame is still expected
        # within the search range; each step's error then enters the positions once per
        # key frame instead of once per frame.
        one = 1 << frac_bits
        limit = min(max_along - 1, r_n // 2 - 1) * one
        shift_q = np.zeros((t_n - 1, 2), dtype=np.int64)
        cmin = np.zeros(t_n - 1, dtype=np.int32)
        cmax = np.zeros(t_n - 1, dtype=np.int32)
        key = 0
        d_key = np.zeros(2, dtype=np.int64)          # displacement of frame t-1 from the key
        last = np.zeros(2, dtype=np.int64)
        far = np.int32(np.iinfo(np.int32).max // 2)
        for t in range(1, t_n):
            c = _sad_costs(z[key:key + 1], z[t:t + 1], d_rng, e_rng)
            cx_ = c.reshape(1, -1).max(axis=1)
            if t > 1:
                # Search within 2 px (along) of the displacement predicted from the last
                # step: small overlaps far from it match by chance.
                pred = np.right_shift(d_key[0] + last[0], frac_bits)
                c[0, np.abs(d_rng - pred) > 2, :] = far
            q, cm_, _ = _best_q(c, d_rng, e_rng, frac_bits)
            shift_q[t - 1] = q[0] - d_key
            last = shift_q[t - 1]
            cmin[t - 1], cmax[t - 1] = cm_[0], cx_[0]
            step = np.abs(shift_q[t - 1, 0])
            if np.abs(q[0, 0]) + step > limit:
                key, d_key = t, np.zeros(2, dtype=np.int64)
            else:
                d_key = q[0]
    return IntShifts(shift_q=shift_q.astype(np.int32), cost=cmin, cost_zero=cmax,
                     frac_bits=frac_bits, offset=off)


def operation_count(n_rows, n_cols, *, max_along=None, max_across=3):
    """Integer operations per frame of :func:`estimate_shifts_int`.

    Per candidate (d, e) with overlap N = (R - |d|)(C - |e|): N subtractions, N absolute
    values, N additions, then one shift and one division (normalisation) and one
    comparison (running minimum). Per frame: R*C subtractions for the offset; the
    equiangular fit costs 2 x (3 subtractions, 1 comparison, 1 shift, 1 division).

    Parameters
    ----------
    n_rows, n_cols : int
    max_along, max_across : int, optional
        As :func:`estimate_shifts_int` (default R - 3 and 3).

    Returns
    -------
    dict
        Counts per frame: ``candidates``, ``sub``, ``abs``, ``add``, ``shift``, ``div``,
        ``cmp``, ``total``, and ``bytes_per_frame`` (the frame kept for the next pair).

    Examples
    --------
    >>> operation_count(8, 192)["candidates"]
    77
    """
    r_n = check_int(n_rows, name="n_rows", lo=3)
    c_n = check_int(n_cols, name="n_cols", lo=4)
    if max_along is None:
        max_along = r_n - 3
    max_along = check_int(max_along, name="max_along", lo=0, hi=r_n - 1)
    max_across = check_int(max_across, name="max_across", lo=0, hi=c_n - 1)
    d, e = _candidates(r_n, c_n, max_along, max_across)
    n_ov = int(np.sum((r_n - np.abs(d))[:, None] * (c_n - np.abs(e))[None, :]))
    n_c = len(d) * len(e)
    ops = {"candidates": n_c,
           "sub": n_ov + r_n * c_n + 2 * 3,
           "abs": n_ov,
           "add": n_ov,
           "shift": n_c + 2,
           "div": n_c + 2,
           "cmp": n_c + 2}
    ops["total"] = sum(v for k, v in ops.items() if k != "candidates")
    ops["bytes_per_frame"] = r_n * c_n
    return ops


def stitch_int(frames_uint8, *, pitch_um=50.8, frame_rate_hz=None, max_along=None,
               max_across=3, frac_bits=8, offset=None, max_cost_ratio=0.8):
    """Reconstruct with the integer shift path (fusion and report as the batch path).

    Parameters
    ----------
    frames_uint8 : (T, R, C) uint8 array
    pitch_um : float, optional
        Plate pitch. Default 50.8.
    frame_rate_hz : float, optional
        Nominal frame rate. Default None.
    max_along, max_across, frac_bits, offset
        As :func:`estimate_shifts_int`.
    max_cost_ratio : float, optional
        A link fails (gap) when its best cost exceeds this fraction of the worst
        candidate's (no distinct minimum). Default 0.8.

    Returns
    -------
    Reconstruction
        Angles are 0; confidence is 1 for frames placed by a good link, 0 otherwise.
    """
    est = estimate_shifts_int(frames_uint8, max_along=max_along, max_across=max_across,
                              frac_bits=frac_bits, offset=offset)
    pitch_um = check_positive(pitch_um, name="pitch_um")
    frame_rate_hz = check_positive(frame_rate_hz, name="frame_rate_hz", allow_none=True)
    x = np.asarray(frames_uint8)
    t_n, r_n, c_n = x.shape
    # Off the device from here: floating point for the fused image and the report.
    link_ok = est.cost.astype(np.int64) * 1000 < int(max_cost_ratio * 1000) * \
        est.cost_zero.astype(np.int64)
    contrast = np.abs(x.astype(np.int16) - est.offset[None]).mean(axis=(1, 2))
    contact = contrast > 0.25 * float(np.percentile(contrast, 90))
    if contact.sum() < 2:
        raise ReconstructionError("no finger found: fewer than two frames show texture")
    positions = est.positions_q().astype(np.float64) / (1 << est.frac_bits)
    conf = np.ones(t_n)
    conf[1:][~link_ok] = 0.0
    conf[~contact] = 0.0
    values = x.astype(np.float64) - est.offset[None].astype(np.float64) + \
        float(est.offset.mean())
    w = np.broadcast_to((contact.astype(float))[:, None, None], x.shape)
    mos = _mosaic.fuse(values, positions, None, weights=w)
    times = np.arange(t_n) / frame_rate_hz if frame_rate_hz else np.arange(t_n, dtype=float)
    link_failed = ~link_ok & contact[1:] & contact[:-1]
    angles = np.zeros(t_n)
    events = _report.find_events(positions=positions, angles_deg=angles, confidence=conf,
                                 contact=contact, link_failed=link_failed,
                                 link_dt_frames=np.ones(t_n - 1), times_s=times,
                                 frame_rate_hz=frame_rate_hz, n_rows=r_n, pitch_um=pitch_um)
    rep = _report.make_report(events=events, positions=positions, angles_deg=angles,
                              confidence=conf, contact=contact, times_s=times,
                              frame_rate_hz=frame_rate_hz, n_rows=r_n, pitch_um=pitch_um,
                              image=mos.image)
    ops = operation_count(r_n, c_n, max_along=max_along, max_across=max_across)
    options = {"pitch_um": pitch_um, "frame_rate_hz": frame_rate_hz, "mode": "integer",
               "max_along": r_n - 3 if max_along is None else max_along,
               "max_across": max_across, "frac_bits": est.frac_bits,
               "ops_per_frame": ops["total"]}
    return Reconstruction(image=mos.image, positions=positions, angles=angles, confidence=conf,
                          events=events, report=rep, weight=mos.weight, origin_px=mos.origin_px,
                          pitch_um=np.array([pitch_um, pitch_um]), sensor_pitch_um=pitch_um,
                          frame_rate_hz=frame_rate_hz if frame_rate_hz else float("nan"),
                          options=options)
