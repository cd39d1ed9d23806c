"""Resampling stage: place every frame's pixels at their positions on one uniform grid and fuse.

In: frames (T, R, C), positions (T, 2), angles (T,), optional per-pixel weights. Out: the fused
image, its weight map and where frame 0 sits in it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np

from ._jit import JIT
from ._validate import check_array, check_frames, check_positive

__all__ = ["Mosaic", "fuse"]


@dataclass(frozen=True, eq=False)
class Mosaic:
    """A fused image.

    Attributes
    ----------
    image : (H, W) float64
        Weighted mean of all observations; NaN where the weight is below the threshold.
    weight : (H, W) float64
        Sum of fusion weights.
    origin_px : (2,) float64
        Image index of frame 0's plate (0, 0).
    pitch_px : (2,) float64
        Output pixel pitch in sensor pixels (along, across).
    """

    image: np.ndarray
    weight: np.ndarray
    origin_px: np.ndarray
    pitch_px: np.ndarray

    def __post_init__(self):
        for name in ("image", "weight", "origin_px", "pitch_px"):
            arr = np.array(getattr(self, name), dtype=np.float64)
            arr.flags.writeable = False
            object.__setattr__(self, name, arr)


def plate_coordinates(shape, positions, angles_rad, rows=None, cols=None):
    """Frame-0 pixel coordinates (q0, q1), each (T, R', C'), of plates of every frame.

    Plate (r, c) of frame t sees ``c_f + positions[t] + Rot(angles[t]) (u)`` with
    ``u = (r, c) - c_f`` (library convention). ``rows`` and ``cols`` pick plates (default
    all), e.g. ``[0, R - 1]`` and ``[0, C - 1]`` for the corners.
    """
    t_n, r_n, c_n = shape
    cf = np.array([(r_n - 1) / 2.0, (c_n - 1) / 2.0])
    rr = np.arange(r_n) if rows is None else np.asarray(rows)
    cc = np.arange(c_n) if cols is None else np.asarray(cols)
    u0 = (rr - cf[0])[:, None]
    u1 = (cc - cf[1])[None, :]
    th = np.asarray(angles_rad, dtype=np.float64)
    c, s = np.cos(th)[:, None, None], np.sin(th)[:, None, None]
    q0 = cf[0] + positions[:, 0, None, None] + c * u0 - s * u1
    q1 = cf[1] + positions[:, 1, None, None] + s * u0 + c * u1
    return q0, q1


def frame_coordinates(shape, positions, angles_deg):
    """Frame-0 pixel coordinates of every plate of every frame: (T, R, C, 2) (see
    :func:`plate_coordinates`)."""
    q0, q1 = plate_coordinates(shape, positions, np.deg2rad(np.asarray(angles_deg, dtype=np.float64)))
    return np.stack([q0, q1], axis=-1)


def fuse(frames, positions, angles=None, *, weights=None, output_pitch_px=(1.0, 1.0),
         min_weight=0.05):
    """Fuse frames into one image on a uniform grid.

    Each observation is spread onto its four nearest output pixels with bilinear weights
    (forward mapping, "splatting"), multiplied by its own weight; each output pixel is the
    weighted mean of what landed on it (normalised convolution, Knutsson & Westin 1993).

    Parameters
    ----------
    frames : (T, R, C) array_like
        Frame values (any real dtype); axis 0 of a frame along the swipe.
    positions : (T, 2) array_like
        Frame positions (px) in the library convention.
    angles : (T,) array_like, optional
        Frame angles in degrees. Default is zeros.
    weights : (T, R, C) or (R, C) array_like, optional
        Non-negative weight of each observation (0 excludes it). Default is ones.
    output_pitch_px : (2,) float
        Output pixel pitch in sensor pixels (along, across). Default is (1, 1).
    min_weight : float
        Pixels whose weight is below this stay NaN. Default is 0.05.

    Returns
    -------
    Mosaic

    References
    ----------
    .. [1] H. Knutsson and C.-F. Westin, "Normalized and differential convolution", Proc.
           IEEE CVPR 1993, 515-523. doi:10.1109/CVPR.1993.341081

    Examples
    --------
    >>> import numpy as np
    >>> frames = np.arange(2 * 2 * 3, dtype=float).reshape(2, 2, 3)
    >>> m = fuse(frames, [[0, 0], [2, 0]])
    >>> m.image.shape
    (4, 3)
    >>> bool(np.allclose(m.image[2:], frames[1]))
    True
    """
    x = check_frames(frames, min_frames=1, min_rows=1, min_cols=1)
    t_n, r_n, c_n = x.shape
    pos = check_array(positions, name="positions", shape=(t_n, 2))
    ang = np.zeros(t_n) if angles is None else check_array(angles, name="angles", shape=(t_n,))
    pitch = check_array(output_pitch_px, name="output_pitch_px", shape=(2,))
    for k in range(2):
        check_positive(float(pitch[k]), name=f"output_pitch_px[{k}]")
    if weights is None:
        w = np.broadcast_to(np.float32(1.0), x.shape)
    else:
        w = np.asarray(weights)
        if w.dtype.kind not in "uif":
            raise TypeError(f"weights must be real numeric; got dtype {w.dtype}")
        if w.shape == (r_n, c_n):
            w = np.broadcast_to(w, x.shape)
        if w.shape != x.shape:
            raise ValueError(f"weights must have shape {(r_n, c_n)} or {x.shape}; got {w.shape}")
        if not np.isfinite(w).all() or (w < 0).any():
            raise ValueError("weights must be finite and non-negative")
    return _fuse(x, pos, ang, w, np.ones((r_n, c_n)), pitch, min_weight)


def _fuse(x, pos, ang, w, plate_w, pitch, min_weight):
    """:func:`fuse` after validation: observation weight ``w[t, r, c] * plate_w[r, c]`` (``w``
    may be a broadcast view, e.g. one weight per frame, so no frame-sized weight array is
    built)."""
    t_n, r_n, c_n = x.shape
    # Grid bounds from the frames' corners (a rotated rectangle's extremes are its corners),
    # then frames are splatted in chunks so memory stays proportional to the image.
    k0, k1 = plate_coordinates((t_n, r_n, c_n), pos, np.deg2rad(ang), rows=[0, r_n - 1],
                               cols=[0, c_n - 1])
    k0 = k0 / pitch[0]
    k1 = k1 / pitch[1]
    lo0 = np.floor(k0.min())
    lo1 = np.floor(k1.min())
    h = int(np.floor(k0.max() - lo0)) + 2
    wd = int(np.floor(k1.max() - lo1)) + 2
    acc = np.zeros((h, wd))
    wacc = np.zeros((h, wd))
    cf = np.array([(r_n - 1) / 2.0, (c_n - 1) / 2.0])
    th = np.deg2rad(ang)
    # One compiled pass over the observations (no per-observation temporaries).
    step = max(1, 1_000_000 // max(r_n * c_n, 1))
    pw = np.ascontiguousarray(plate_w, dtype=np.float64)
    kept = 0
    for s0 in range(0, t_n, step):
        sl = slice(s0, min(t_n, s0 + step))
        # Native dtypes go straight in (the kernel reads them as double).
        kept += _splat(x[sl], w[sl], pw, pos[sl], np.cos(th[sl]), np.sin(th[sl]), cf, pitch,
                       lo0, lo1, acc, wacc)
    if kept == 0:
        raise ValueError("weights exclude every observation: nothing to fuse")
    # Trim empty border rows/columns left by the +2 allocation.
    rows = np.flatnonzero(wacc.max(axis=1) >= min_weight)
    cols = np.flatnonzero(wacc.max(axis=0) >= min_weight)
    r0, r1 = (rows[0], rows[-1] + 1) if rows.size else (0, h)
    c0, c1 = (cols[0], cols[-1] + 1) if cols.size else (0, wd)
    acc = acc[r0:r1, c0:c1]
    wacc = wacc[r0:r1, c0:c1]
    with np.errstate(invalid="ignore", divide="ignore"):
        img = np.where(wacc >= min_weight, acc / np.where(wacc > 0, wacc, 1.0), np.nan)
    origin = np.array([-lo0 - r0, -lo1 - c0])
    return Mosaic(image=img, weight=wacc, origin_px=origin, pitch_px=pitch)


@numba.njit(cache=True, inline="always")
def plate_point(p0, p1, ct, st, cf0, cf1, u0, u1):
    """Frame-0 coordinates of the plate at offset (u0, u1) from the centre (cf0, cf1) of a
    frame at (p0, p1) turned by an angle of cosine ct and sine st: the compiled counterpart
    of :func:`plate_coordinates` for one plate."""
    return cf0 + p0 + ct * u0 - st * u1, cf1 + p1 + st * u0 + ct * u1


@numba.njit(**JIT)
def _splat(vals, w, pw, pos, cos_t, sin_t, cf, pitch, lo0, lo1, acc, wacc):
    """Bilinear splat of every observation with weight ``w[t, r, c] * pw[r, c]`` > 0 into
    (acc, wacc), in place; returns how many were splatted."""
    t_n, r_n, c_n = vals.shape
    kept = 0
    wp = np.zeros(c_n + 2)     # a frame row's weights and weighted values, zero at both ends
    vp = np.zeros(c_n + 2)
    for t in range(t_n):
        ct = cos_t[t]
        st = sin_t[t]
        f1 = pos[t, 1] - lo1
        i1 = int(np.floor(f1))
        if st == 0.0 and ct == 1.0 and pitch[1] == 1.0 and 0 <= i1 and i1 + c_n + 1 <= acc.shape[1]:
            # Unrotated at the sensor pitch across: one set of bilinear weights per row, and
            # plate c lands on columns i1 + c and i1 + c + 1, so a frame row adds a two-tap
            # filter of its weighted values to two image rows (contiguous, vectorised).
            a1 = f1 - i1
            for r in range(r_n):
                f0 = (r + pos[t, 0]) / pitch[0] - lo0
                i0 = int(np.floor(f0))
                a0 = f0 - i0
                for c in range(c_n):
                    wv = float(w[t, r, c]) * pw[r, c]
                    if wv > 0.0:
                        kept += 1
                        wp[c + 1] = wv
                        vp[c + 1] = wv * float(vals[t, r, c])
                    else:              # excluded: adds nothing (its value may be anything)
                        wp[c + 1] = 0.0
                        vp[c + 1] = 0.0
                for di in range(2):
                    fa = a0 if di == 1 else 1.0 - a0
                    fb0 = fa * (1.0 - a1)
                    fb1 = fa * a1
                    ra = acc[i0 + di, i1:i1 + c_n + 1]
                    rw = wacc[i0 + di, i1:i1 + c_n + 1]
                    for m in range(c_n + 1):
                        ra[m] += fb0 * vp[m + 1] + fb1 * vp[m]
                    for m in range(c_n + 1):
                        rw[m] += fb0 * wp[m + 1] + fb1 * wp[m]
            continue
        for r in range(r_n):
            u0 = r - cf[0]
            for c in range(c_n):
                wv = float(w[t, r, c]) * pw[r, c]
                if wv <= 0.0:
                    continue
                kept += 1
                q0, q1 = plate_point(pos[t, 0], pos[t, 1], ct, st, cf[0], cf[1], u0, c - cf[1])
                f0 = q0 / pitch[0] - lo0
                f1 = q1 / pitch[1] - lo1
                i0 = int(np.floor(f0))
                i1 = int(np.floor(f1))
                a0 = f0 - i0
                a1 = f1 - i1
                v = float(vals[t, r, c])
                w00 = wv * (1.0 - a0) * (1.0 - a1)
                w01 = wv * (1.0 - a0) * a1
                w10 = wv * a0 * (1.0 - a1)
                w11 = wv * a0 * a1
                acc[i0, i1] += w00 * v
                wacc[i0, i1] += w00
                acc[i0, i1 + 1] += w01 * v
                wacc[i0, i1 + 1] += w01
                acc[i0 + 1, i1] += w10 * v
                wacc[i0 + 1, i1] += w10
                acc[i0 + 1, i1 + 1] += w11 * v
                wacc[i0 + 1, i1 + 1] += w11
    return kept
