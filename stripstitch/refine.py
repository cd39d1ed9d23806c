"""Refinement stage: every frame registered to a model of the finger finer than the plates.

In: prepared frames (fixed pattern removed), per-observation weights, and the positions and
angles of the pairwise solve. Out: refined positions, per-frame information, and the stretch
and shear of the trajectory that the frames' own row spacing revealed.

Why. The plates sample ridge edges far sharper than their pitch, so a frame interpolated from
its own samples is aliased, and a shift measured between two frames is pulled towards whole
pixels (pixel locking); over a swipe these small biases add up to a scale error. But the finger
slides along the swipe by a fraction of a pixel per frame, so together the frames sample every
row of the finger at many sub-pixel phases. A model of the finger built on a grid finer than
the plates (normalised convolution of all observations at their positions) is therefore not
aliased along the swipe, and each frame registered against it by Gauss-Newton carries no
pixel-locking bias.

Alternating model and positions leaves two modes that converge slowly: a stretch along the
swipe and a shear across it. Every frame agrees with a model that stretched (or sheared) with
it; only the known spacing of the rows inside each frame sees them. Each frame's fit therefore
has a stretch and a shear parameter, and their values, smoothed over the swipe, correct the
trajectory directly.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np
from scipy import linalg, ndimage

from . import mosaic as _mosaic
from . import trajectory as _traj
from ._jit import JIT
from ._validate import check_array, check_frames, check_in_range, check_int

__all__ = ["Refined", "build_model", "refine_positions"]


@dataclass(frozen=True, eq=False)
class Refined:
    """Result of :func:`refine_positions`.

    Attributes
    ----------
    positions : (T, 2) float64
        Refined positions (px, frame 0's axes; ``positions[0] == 0``).
    angles_rad : (T,) float64
        Refined angles (``angles_rad[0]`` as given).
    frame_info : (T, 2, 2) float64
        Information (px^-2) each frame's fit against the model gave about its position.
    stretch : (T,) float64
        Stretch along the swipe of the trajectory the last pass started from, per frame
        (smoothed; 0.001 = 0.1 % too long).
    shear : (T,) float64
        Across-swipe offset per row along the swipe of that trajectory (smoothed).
    twist : (T,) float64
        Angle error (rad) per pixel of travel of that trajectory (smoothed).
    ncc : (T,) float64
        Normalised correlation of each frame with the model at its refined position.
    first_turn_deg : float
        The turn (degrees, peak to peak over the frames with finger) the first pass's twist
        implied, whether or not it was kept (NaN when ``min_turn_deg`` is None or the
        angles are not read).
    """

    positions: np.ndarray
    angles_rad: np.ndarray
    frame_info: np.ndarray
    stretch: np.ndarray
    shear: np.ndarray
    twist: np.ndarray
    ncc: np.ndarray
    first_turn_deg: float = float("nan")

    def __post_init__(self):
        for name in ("positions", "angles_rad", "frame_info", "stretch", "shear", "twist", "ncc"):
            arr = np.array(getattr(self, name), dtype=np.float64)
            arr.flags.writeable = False
            object.__setattr__(self, name, arr)
        object.__setattr__(self, "first_turn_deg", float(self.first_turn_deg))


def build_model(z, weights, positions, angles_rad, *, fine_px=(0.25, 0.5), smooth_px=(0.3, 0.3),
                margin_px=3.0, sharpen=0.0):
    """Model of the finger on a fine grid, by normalised convolution of all observations.

    Every observation is spread onto its four nearest fine-grid nodes with bilinear weights
    times its own weight, and each node gets a local linear fit (plane) to the observations
    around it, weighted by a small Gaussian: normalised convolution of first order. A local
    mean (order zero) is pulled towards the side where samples are denser, and around every
    frame's first and last row the other frames' samples lie mostly on one side (their rows
    end there; on a slanted swipe also to one side across); the linear terms remove that
    bias, which would otherwise read as a stretch or a shear of every frame. Nodes with
    little weight take a wider local mean, so sparse sampling leaves no holes.

    Parameters
    ----------
    z : (T, R, C) array
        Prepared frames.
    weights : (T, R, C) or (T,) array
        Observation weights (0 excludes).
    positions : (T, 2) array
    angles_rad : (T,) array
    fine_px : (2,) float
        Grid spacing along and across in sensor pixels. Default (0.25, 0.5).
    smooth_px : (2,) float
        Gaussian sigma of the normalised convolution, sensor pixels. Default (0.3, 0.3):
        narrower leaves nodes between the sub-pixel phases a swipe happens to sample
        (often two, near 0 and 0.5 px) to the wide fill, which biases the stretch.
    margin_px : float
        Border around the observed region. Default 3.
    sharpen : float
        Weight in [0, 1] of the correction of the smoothing's second-order bias along the
        swipe (a local linear fit reads f + f'' (v - m^2) / 2, v and m the variance and mean
        of the sample offsets about the node [2]_); 0 (default) leaves the fit as it is.

    Returns
    -------
    model : (H, W) float64
    weight : (H, W) float64
        Smoothed observation weight per node.
    lo : (2,) float64
        Frame-0 coordinate of node (0, 0).

    References
    ----------
    .. [1] H. Knutsson and C.-F. Westin, "Normalized and differential convolution", Proc.
           IEEE CVPR 1993, 515-523. doi:10.1109/CVPR.1993.341081
    .. [2] J. Fan and I. Gijbels, "Local Polynomial Modelling and Its Applications",
           Chapman & Hall, 1996, sec. 3.2.1 (bias of the local linear fit).
    """
    sharpen = check_in_range(sharpen, 0.0, 1.0, name="sharpen")
    t_n, r_n, c_n = z.shape
    h = np.asarray(fine_px, dtype=np.float64)
    w = np.asarray(weights)                   # any real dtype; chunks are taken in double
    if w.ndim == 1:
        w = np.broadcast_to(w[:, None, None], z.shape)
    positions = np.asarray(positions, dtype=np.float64)
    angles_rad = np.asarray(angles_rad, dtype=np.float64)
    # Bounds from the frame corners (a rotated rectangle's extremes are its corners).
    k0, k1 = _mosaic.plate_coordinates(z.shape, positions, angles_rad, rows=[0, r_n - 1],
                                       cols=[0, c_n - 1])
    lo = np.array([k0.min(), k1.min()]) - margin_px
    hi = np.array([k0.max(), k1.max()]) + margin_px
    shape = tuple(int(v) for v in np.ceil((hi - lo) / h).astype(np.int64) + 2)
    model, s00 = _model_window(z, w, np.arange(t_n), positions, angles_rad, h, smooth_px, lo,
                               shape, _Workspace(), sharp=sharpen)
    return model.copy(), s00.copy(), lo


class _Workspace:
    """Grow-only scratch buffers, reused by the tiles and passes of one refinement: fresh
    swipe-sized arrays cost page faults (first touch) that took as long as the arithmetic."""

    def __init__(self):
        self._bufs = {}
        self._clean = set()          # buffers known to be all zero

    def get(self, name, shape, dtype=np.float64):
        n = int(np.prod(shape))
        buf = self._bufs.get(name)
        if buf is None or buf.size < n or buf.dtype != dtype:
            buf = self._bufs[name] = np.empty(max(n, 1), dtype=dtype)
        self._clean.discard(name)
        return buf[:n].reshape(shape)

    def get_zeroed(self, name, shape, dtype=np.float64):
        """As :meth:`get`, all zero: cleared only if its last user did not leave it so
        (see :meth:`mark_clean`)."""
        n = int(np.prod(shape))
        buf = self._bufs.get(name)
        if buf is None or buf.size < n or buf.dtype != dtype:
            buf = self._bufs[name] = np.zeros(max(n, 1), dtype=dtype)
        elif name not in self._clean:
            buf[:] = 0                   # all of it: mark_clean vouches for the whole buffer
        self._clean.discard(name)
        return buf[:n].reshape(shape)

    def mark_clean(self, name):
        """The whole buffer ``name`` is zero again (its user cleared what it wrote)."""
        self._clean.add(name)


def _model_window(z, w, src, positions, angles_rad, h, smooth_px, lo, shape, work, sharp=0.0,
                  splat=True, keep=False, pad_px=0.0):
    """Model (and smoothed weight) on the grid of ``shape`` nodes from ``lo``, from the
    observations of frames ``src`` that fall on it (see :func:`build_model`). The arrays
    returned are views into ``work``.

    The splatted sums depend on the positions only, not on the smoothing: with ``keep`` they
    stay in ``work`` for the next call on the same window, which passes ``splat=False`` (a
    second model of other smoothing, as the twist's). ``pad_px``: smoothing (px across) of
    the widest model the sums are kept for (their zero margin must fit its kernel)."""
    r_n, c_n = z.shape[1:]
    # Moments per node for a local linear fit: sums of w, w dy, w dx, w dy^2, w dx^2,
    # w dy dx, w z, w z dy, w z dx, with (dy, dx) the offset (px) of the observation from
    # the node it is splatted to. Single precision: a node sums a few dozen observations
    # (relative error ~1e-7, far below the noise), and the array is the largest of the
    # refinement (halved: less to clear and to stream through).
    sig = np.asarray(smooth_px, dtype=np.float64) / h

    def kernels(sigma, spacing):
        g = _gauss_kernel(sigma, int(_TRUNCATE * sigma + 0.5))
        d = (np.arange(g.size) - g.size // 2) * spacing
        return g, g * d, g * d * d

    gy0, gy1, gy2 = kernels(sig[0], h[0])
    gx0, gx1, gx2 = kernels(sig[1], h[1])
    # Plane-major (H, 9, W) with the across kernel's radius of zero columns on either side:
    # both compiled passes then run over contiguous rows of one moment at a time, which the
    # compiler vectorises (the node-major layout it replaced took twice as long).
    pad = max(gx0.size // 2, int(_TRUNCATE * float(pad_px) / h[1] + 0.5))
    # (the smoothing below clears each row of sums once it has read it, so the buffer is
    # zero again for the next window or pass without a sweep of its own: 1.7 ms a pass on
    # an 8x192 swipe)
    if splat:
        acc = work.get_zeroed("acc", (shape[0], 9, shape[1] + 2 * pad), np.float32)
        cf = np.array([(r_n - 1) / 2.0, (c_n - 1) / 2.0])
        _splat_moments(z, w, np.asarray(src, dtype=np.int64), positions, np.cos(angles_rad),
                       np.sin(angles_rad), cf, np.asarray(lo, dtype=np.float64), h, acc, pad)
    else:
        acc = work.get("acc", (shape[0], 9, shape[1] + 2 * pad), np.float32)
    # Nodes with too little weight (see below) take a wide local mean of the sums (it only
    # fills holes and borders): single precision (OpenCV's separable filter, zero outside
    # like ndimage mode "constant", truncated at 3 sigma), the moment's plane as a strided
    # view (OpenCV takes a row step, no copy needed).
    import cv2
    wide = 2.0 * sig + 0.5
    ky, kx = (_gauss_kernel(s_, int(3.0 * s_ + 0.5)).astype(np.float32) for s_ in wide)
    s3, w3 = (cv2.sepFilter2D(acc[:, m, pad:pad + shape[1]], cv2.CV_32F, kx, ky,
                              borderType=cv2.BORDER_CONSTANT) for m in (6, 0))
    # Moments about each output node: the offset from splat node to output node is added in,
    # (dy + oy)^a (dx + ox)^b expanded; one compiled pass across, one along, and the local
    # linear fit where the samples around a node determine both slopes, local mean elsewhere
    # (_smooth_moments); nodes with little weight take a wider local mean below (no holes).
    model = work.get("model", shape)
    s00 = work.get("s00", shape)
    var0 = work.get("var0", shape) if sharp > 0 else np.empty((0, 0))
    # The two passes in single precision like the sums they smooth (kernels, ring and row
    # buffer): twice the lanes per vector instruction.
    f32 = lambda *a: [np.asarray(x, dtype=np.float32) for x in a]
    _smooth_moments(acc, pad, *f32(gx0, gx1, gx2, gy0, gy1, gy2), model, s00, var0,
                    np.empty((9, 0, 0), dtype=np.float32),
                    work.get("ring", (gy0.size, 9, shape[1]), np.float32),
                    work.get("ring_out", (9, shape[1]), np.float32), not keep)
    if not keep:
        work.mark_clean("acc")
    # "Enough weight": 5 % of the 90th percentile of the positive weights, the percentile
    # taken on an even subsample of at most ~10^5 nodes (a statistic of the whole window).
    k = max(1, int(np.ceil(np.sqrt(s00.size / 1e5))))
    sub = s00[::k, ::k]
    pos_w = sub[sub > 0]
    thr = max(0.05 * float(np.percentile(pos_w, 90)), 1e-9) if pos_w.size else 1e-9
    _fill_holes(model, s00, s3, w3, thr)
    if sharp > 0:
        _deblur_along(model, s00, var0, thr, sharp * 0.5 / (h[0] * h[0]),
                      work.get("row3", (3, shape[1])))
    return model, s00


# Sharpening weight from the frames' median NCC with the model (automatic mode): none at
# 0.975 and below (about 12 dB and less), full at 0.99 and above (about 20 dB and more).
_NCC_LO, _NCC_HI = 0.975, 0.99
# The smoothing kernels end at 3 sigma (as OpenCV's Gaussian kernels, common practice): at
# 4 sigma the along kernel had 11 taps instead of 9 for weights under 0.4 % of the centre's;
# the accuracy suite's metrics did not change (along RMS median 0.070 -> 0.069 px), the
# stitch took 2 % less time.
_TRUNCATE = 3.0


@numba.njit(**JIT)
def _deblur_along(model, s00, var0, thr, scale, rows):
    """Remove the smoothing's second-order bias along the swipe, in place.

    A local linear fit to samples at offsets d (weights w) about a node reads, for a smooth
    f, f + f'' (s2^2 - s1 s3) / (2 (s2 - s1^2)) there, s_k the weighted means of d^k (Fan &
    Gijbels 1996, sec. 3.2.1); for offsets symmetric about their mean m with variance v that
    is f + f'' (v - m^2) / 2, which ``var0`` holds per node (``s2 - 2 m^2``). The term is taken off
    with f'' from the model's own second difference along: ``model -= scale * var0 * d2``,
    scale = weight / (2 h^2). Only at nodes with enough weight whose two neighbours along
    have it too (the wide fill of holes and borders is left alone)."""
    hh, ww = model.shape
    if hh < 3:
        return
    # rows[k % 3] holds the uncorrected row k (the second difference needs the originals)
    for c in range(ww):
        rows[0, c] = model[0, c]
        rows[1, c] = model[1, c]
    for i in range(1, hh - 1):
        nxt = rows[(i + 1) % 3]
        for c in range(ww):
            nxt[c] = model[i + 1, c]
        prv = rows[(i - 1) % 3]
        cur = rows[i % 3]
        for c in range(ww):
            if s00[i, c] >= thr and s00[i - 1, c] >= thr and s00[i + 1, c] >= thr:
                model[i, c] = cur[c] - scale * var0[i, c] * (nxt[c] - 2.0 * cur[c] + prv[c])


@numba.njit(**JIT)
def _fill_holes(model, s00, s3, w3, thr):
    """Where the smoothed weight s00 is under ``thr`` (or zero), the wide local mean s3 / w3
    (0 where w3 is negligible), in place."""
    hh, ww = model.shape
    for i in range(hh):
        for c in range(ww):
            if s00[i, c] < thr or not s00[i, c] > 1e-9:
                wv = float(w3[i, c])
                model[i, c] = float(s3[i, c]) / wv if wv > 1e-9 else 0.0


def _gauss_kernel(sigma, radius):
    off = np.arange(-radius, radius + 1, dtype=np.float64)
    g = np.exp(-0.5 * (off / max(sigma, 1e-9)) ** 2)
    return g / g.sum()


@numba.njit(**JIT)
def _plane_value(s00, s10, s01, s20, s02, s11, t0, t1y, t1x):
    """Value at the node of the weighted local plane fit (3 x 3 normal equations by
    cofactors), or the local mean where the plane is not determined (or 0 without weight)."""
    c00 = s20 * s02 - s11 * s11
    c01 = s11 * s01 - s10 * s02
    c02 = s10 * s11 - s20 * s01
    det = s00 * c00 + s10 * c01 + s01 * c02
    if det > 1e-6 * s00 * max(s20 * s02, 1e-30):
        return (c00 * t0 + c01 * t1y + c02 * t1x) / det
    if s00 > 0.0:
        return t0 / s00
    return t0


@numba.njit(**JIT)
def _smooth_moments(acc, pad, gx0, gx1, gx2, gy0, gy1, gy2, model, s00, var0, out, p, buf,
                    clear=False):
    """Separable Gaussian moments of the splatted sums (zero outside the grid) and the local
    plane fit they define, row by row.

    ``acc`` (H, 9, W + 2 pad) holds the per-node sums (w, w dy, w dx, w dy^2, w dx^2,
    w dy dx, w z, w z dy, w z dx) between ``pad`` zero columns on either side (``pad`` at
    least the across kernel's radius); ``g*0, g*1, g*2`` are a Gaussian and its first and
    second offset moments across (x) and along (y). The moments about each output node (s00,
    s10, s01, s20, s02, s11, t0, t1y, t1x) are the same sums as scipy.ndimage.correlate1d
    with mode "constant". Writes the plane fit's value to ``model`` and s00 to ``s00``
    (H, W), s20 / s00 - 2 (s10 / s00)^2 to ``var0`` if it is (H, W) (for
    :func:`_deblur_along`); the nine moments to ``out`` (9, H, W) only if it has that shape
    (tests), since they are never needed whole: the across pass is kept for the last
    ``2 ry + 1`` rows only (a ring that stays in cache, no swipe-sized temporary). Every
    inner loop runs over the columns of one moment (contiguous, vectorised). ``p`` (the ring,
    (2 ry + 1, 9, W)) and ``buf`` (9, W) are scratch (passed in: measured faster than
    allocating them here). With ``clear`` each row of ``acc`` is zeroed once read (the
    caller reuses it for the next window).
    """
    hh = acc.shape[0]
    ww = acc.shape[2] - 2 * pad
    rx = gx0.shape[0] // 2
    ry = gy0.shape[0] // 2
    off = pad - rx            # padded column of the first tap of output column 0
    if off < 0:               # (also tells the compiler that c + off + j is never negative)
        raise ValueError("pad must be at least the across kernel's radius")
    keep = out.shape[1] == hh and out.shape[2] == ww
    n_ring = 2 * ry + 1
    if p.shape[0] < n_ring or p.shape[1] != 9 or p.shape[2] != ww or buf.shape != (9, ww):
        raise ValueError("ring must be (>= 2 ry + 1, 9, W) and buf (9, W)")
    for i in range(hh + ry):
        if i < hh:
            # across pass of row i into its ring slot: the nine inputs of the along pass,
            # xa.. = g0 * a.., plus the first and second offset moments the offsets add
            s = i % n_ring
            for k in range(9):
                for c in range(ww):
                    p[s, k, c] = 0.0
            for j in range(2 * rx + 1):
                k0 = gx0[j]
                k1 = gx1[j]
                k2 = gx2[j]
                k1d = k1 + k1         # (not 2.0 * k1: a double literal widens single kernels)
                o2 = off + j
                for k in range(9):
                    for c in range(ww):
                        p[s, k, c] += k0 * acc[i, k, c + o2]
                for c in range(ww):       # xa01 + x1_a00
                    p[s, 2, c] += k1 * acc[i, 0, c + o2]
                for c in range(ww):       # xa02 + 2 x1_a01 + x2_a00
                    p[s, 4, c] += k1d * acc[i, 2, c + o2] + k2 * acc[i, 0, c + o2]
                for c in range(ww):       # xa11 + x1_a10
                    p[s, 5, c] += k1 * acc[i, 1, c + o2]
                for c in range(ww):       # xb1x + x1_b0
                    p[s, 8, c] += k1 * acc[i, 6, c + o2]
            if clear:
                # row i is never read again: leave the accumulator zero for its next use
                for k in range(9):
                    ak = acc[i, k]
                    for c in range(ak.shape[0]):
                        ak[c] = 0.0
        o = i - ry
        if o < 0:
            continue
        # along pass of output row o (rows o - ry .. o + ry are in the ring)
        for k in range(9):
            for c in range(ww):
                buf[k, c] = 0.0
        for j in range(max(-ry, -o), min(ry, hh - 1 - o) + 1):
            s = (o + j) % n_ring
            k0 = gy0[j + ry]
            k1 = gy1[j + ry]
            k2 = gy2[j + ry]
            k1d = k1 + k1
            for c in range(ww):
                q0 = p[s, 0, c]
                q1 = p[s, 1, c]
                q2 = p[s, 2, c]
                q6 = p[s, 6, c]
                buf[0, c] += k0 * q0                                  # s00
                buf[1, c] += k0 * q1 + k1 * q0                        # s10
                buf[2, c] += k0 * q2                                  # s01
                buf[3, c] += k0 * p[s, 3, c] + k1d * q1 + k2 * q0   # s20
                buf[4, c] += k0 * p[s, 4, c]                          # s02
                buf[5, c] += k0 * p[s, 5, c] + k1 * q2                # s11
                buf[6, c] += k0 * q6                                  # t0
                buf[7, c] += k0 * p[s, 7, c] + k1 * q6                # t1y
                buf[8, c] += k0 * p[s, 8, c]                          # t1x
        if var0.shape[0] == hh:
            for c in range(ww):
                b0 = float(buf[0, c])
                if b0 > 0.0:
                    m1 = buf[1, c] / b0
                    var0[o, c] = buf[3, c] / b0 - 2.0 * m1 * m1
                else:
                    var0[o, c] = 0.0
        for c in range(ww):
            s00[o, c] = buf[0, c]
            # (the plane's cofactors in double precision: they cancel where it is barely
            # determined)
            model[o, c] = _plane_value(float(buf[0, c]), float(buf[1, c]), float(buf[2, c]),
                                       float(buf[3, c]), float(buf[4, c]), float(buf[5, c]),
                                       float(buf[6, c]), float(buf[7, c]), float(buf[8, c]))
        if keep:
            out[:, o, :] = buf


@numba.njit(**JIT)
def _nodes_per_plate(h1):
    """Nodes per plate across when that is a whole number (0.5 px grid: 2), else 0."""
    m = 1.0 / h1
    return int(round(m)) if abs(m - round(m)) < 1e-9 else 0


@numba.njit(**JIT)
def _axpy(dst, k, a):
    """dst += k a (one contiguous moment row)."""
    for n in range(dst.shape[0]):
        dst[n] += k * a[n]


@numba.njit(**JIT)
def _axpy_dx(dst, k, a, dx, power):
    """dst += k a dx^power, power 1 or 2."""
    if power == 1:
        for n in range(dst.shape[0]):
            dst[n] += k * a[n] * dx[n]
    else:
        for n in range(dst.shape[0]):
            dst[n] += k * a[n] * dx[n] * dx[n]


@numba.njit(**JIT)
def _turned_row(p0, p1, ct, st, cf, lo, h, u0, c_n, hh, ww):
    """Row u0 of a turned frame at (p0, p1): plate c lies at node coordinates (f0s + d0 c,
    f1s + d1 c) (:func:`mosaic.plate_point`, linear in c); ``inside``: every plate of the row
    has its four bilinear nodes on the (hh, ww) grid."""
    d0 = -st / h[0]
    d1 = ct / h[1]
    f0s = (cf[0] + p0 + ct * u0 + st * cf[1] - lo[0]) / h[0]
    f1s = (cf[1] + p1 + st * u0 - ct * cf[1] - lo[1]) / h[1]
    f0e = f0s + d0 * (c_n - 1)
    f1e = f1s + d1 * (c_n - 1)
    inside = (min(f0s, f0e) >= 0.0 and max(f0s, f0e) < hh - 1
              and min(f1s, f1e) >= 0.0 and max(f1s, f1e) < ww - 1)
    return f0s, f1s, d0, d1, inside


@numba.njit(**JIT)
def _splat_moments(z, w, src, pos, cos_t, sin_t, cf, lo, h, acc, pad):
    """Per node the moments of a local linear fit, from every observation of the frames
    ``src`` splatted onto its four nearest nodes with bilinear weights (in place into acc,
    shape (H, 9, W + 2 pad), the node grid in columns pad .. pad + W - 1): sums of w, w dy,
    w dx, w dy^2, w dx^2, w dy dx, w z, w z dy, w z dx, with (dy, dx) the offset (px) of the
    observation from the node. Nodes off the grid are skipped (a grid may be a window of
    the swipe)."""
    _, r_n, c_n = z.shape
    hh = acc.shape[0]
    ww = acc.shape[2] - 2 * pad
    step1 = _nodes_per_plate(h[1])
    n2 = max(step1, 1) * c_n
    # Row temporaries and coefficients in the accumulator's precision: single-precision
    # rows add without conversions (measured 1.3x faster than double temporaries).
    wn = np.zeros(n2, dtype=acc.dtype)
    zn = np.zeros(n2, dtype=acc.dtype)
    dxn = np.zeros(n2, dtype=acc.dtype)
    kc = np.zeros(3, dtype=acc.dtype)
    cv = np.zeros(4, dtype=acc.dtype)         # (scalars cast to the accumulator's precision)
    for t in src:
        ct = cos_t[t]
        st = sin_t[t]
        if st == 0.0 and ct == 1.0 and step1 >= 2:
            # Unturned frame: plate c of every row lands on nodes j1 + step1 c (+ 1) with the
            # same across weights and offsets, so a frame row is one contiguous run of nodes
            # (weights interleaved per plate, zero between) added moment by moment to the
            # two node rows it falls between.
            b1 = (pos[t, 1] - lo[1]) / h[1]
            j1 = int(np.floor(b1))
            a1 = b1 - j1
            n_lo = max(0, -j1)                # run entries n with node j1 + n on the grid
            n_hi = min(n2, ww - j1)
            if n_hi <= n_lo:
                continue
            wn[:] = 0.0
            zn[:] = 0.0
            dxn[:] = 0.0
            for c in range(c_n):
                dxn[step1 * c] = a1 * h[1]
                dxn[step1 * c + 1] = (a1 - 1.0) * h[1]
            dx_run = dxn[n_lo:n_hi]
            for r in range(r_n):
                f0 = (cf[0] + pos[t, 0] + (r - cf[0]) - lo[0]) / h[0]
                i0 = int(np.floor(f0))
                if i0 < -1 or i0 >= hh:
                    continue
                a0 = f0 - i0
                for c in range(c_n):
                    wv = float(w[t, r, c])
                    if wv > 0.0:
                        zv = wv * float(z[t, r, c])
                    else:             # excluded: adds nothing (its value may be anything)
                        wv = 0.0
                        zv = 0.0
                    wn[step1 * c] = wv * (1.0 - a1)
                    wn[step1 * c + 1] = wv * a1
                    zn[step1 * c] = zv * (1.0 - a1)
                    zn[step1 * c + 1] = zv * a1
                w_run = wn[n_lo:n_hi]
                z_run = zn[n_lo:n_hi]
                for di in range(2):
                    n0 = i0 + di
                    if n0 < 0 or n0 >= hh:
                        continue
                    wa = a0 if di == 1 else 1.0 - a0
                    dy = (a0 - di) * h[0]
                    s0 = pad + j1 + n_lo
                    s1 = pad + j1 + n_hi
                    a = acc[n0]
                    kc[0] = wa
                    kc[1] = wa * dy
                    kc[2] = wa * dy * dy
                    k0 = kc[0]
                    k1 = kc[1]
                    _axpy(a[0, s0:s1], k0, w_run)
                    _axpy(a[1, s0:s1], k1, w_run)
                    _axpy_dx(a[2, s0:s1], k0, w_run, dx_run, 1)
                    _axpy(a[3, s0:s1], kc[2], w_run)
                    _axpy_dx(a[4, s0:s1], k0, w_run, dx_run, 2)
                    _axpy_dx(a[5, s0:s1], k1, w_run, dx_run, 1)
                    _axpy(a[6, s0:s1], k0, z_run)
                    _axpy(a[7, s0:s1], k1, z_run)
                    _axpy_dx(a[8, s0:s1], k0, z_run, dx_run, 1)
            continue
        # Turned frame: plate c of row r lies at f0s + d0 c, f1s + d1 c (node units; the
        # plate_point transform, linear in c). A row whose whole run falls inside the grid
        # takes its four nodes unchecked, in the sums' precision (single: the products
        # convert no more; measured 1.5x faster on an 8x192 swipe turning 2 degrees).
        kc[0] = 1.0
        kc[1] = h[0]
        kc[2] = h[1]
        one = kc[0]
        h0f = kc[1]
        h1f = kc[2]
        for r in range(r_n):
            f0s, f1s, d0, d1, inside = _turned_row(pos[t, 0], pos[t, 1], ct, st, cf, lo, h,
                                                   r - cf[0], c_n, hh, ww)
            for c in range(c_n):
                wv = float(w[t, r, c])
                if wv <= 0.0:
                    continue
                f0 = f0s + d0 * c
                f1 = f1s + d1 * c
                i0 = int(np.floor(f0))
                i1 = int(np.floor(f1))
                a0 = f0 - i0
                a1 = f1 - i1
                v = float(z[t, r, c])
                if inside:
                    cv[0] = a0
                    cv[1] = a1
                    cv[2] = wv
                    cv[3] = v
                    a0f = cv[0]
                    a1f = cv[1]
                    wvf = cv[2]
                    vf = cv[3]
                    dx0 = a1f * h1f
                    dx1 = (a1f - one) * h1f
                    m0 = i1 + pad
                    for di in range(2):
                        wa = wvf * (a0f if di == 1 else one - a0f)
                        dy = (a0f - one) * h0f if di == 1 else a0f * h0f
                        a = acc[i0 + di]
                        for dj in range(2):
                            wk = wa * (a1f if dj == 1 else one - a1f)
                            dx = dx1 if dj == 1 else dx0
                            wy = wk * dy
                            wx = wk * dx
                            m = m0 + dj
                            a[0, m] += wk
                            a[1, m] += wy
                            a[2, m] += wx
                            a[3, m] += wy * dy
                            a[4, m] += wx * dx
                            a[5, m] += wy * dx
                            a[6, m] += wk * vf
                            a[7, m] += wy * vf
                            a[8, m] += wx * vf
                    continue
                if i0 < -1 or i0 >= hh or i1 < -1 or i1 >= ww:
                    continue
                for di in range(2):
                    n0 = i0 + di
                    if n0 < 0 or n0 >= hh:
                        continue
                    wa = a0 if di == 1 else 1.0 - a0
                    dy = (a0 - di) * h[0]
                    for dj in range(2):
                        n1 = i1 + dj
                        if n1 < 0 or n1 >= ww:
                            continue
                        n1 += pad
                        wb = a1 if dj == 1 else 1.0 - a1
                        dx = (a1 - dj) * h[1]
                        wk = wv * wa * wb
                        wy = wk * dy
                        wx = wk * dx
                        acc[n0, 0, n1] += wk
                        acc[n0, 1, n1] += wy
                        acc[n0, 2, n1] += wx
                        acc[n0, 3, n1] += wy * dy
                        acc[n0, 4, n1] += wx * dx
                        acc[n0, 5, n1] += wy * dx
                        acc[n0, 6, n1] += wk * v
                        acc[n0, 7, n1] += wy * v
                        acc[n0, 8, n1] += wx * v


@numba.njit(**JIT)
def _gradient_stack(model, h0, h1, stack, curv_weight=1.0):
    """``stack[..., 0]`` = model, ``[..., 1:3]`` = its gradient along and across, as
    numpy.gradient (central differences inside, one-sided at the edges); ``[..., 3:5]`` (if
    the stack has them) = its second differences along and across, node units (0 at the
    edges) times ``curv_weight``, for the curvature term of the interpolation in
    :func:`_frame_normals`."""
    hh, ww = model.shape
    curv = stack.shape[2] >= 5
    for i in range(hh):
        im = max(i - 1, 0)
        ip = min(i + 1, hh - 1)
        dy = (ip - im) * h0
        for c in range(ww):
            cm = max(c - 1, 0)
            cp = min(c + 1, ww - 1)
            stack[i, c, 0] = model[i, c]
            stack[i, c, 1] = (model[ip, c] - model[im, c]) / dy if dy > 0 else 0.0
            stack[i, c, 2] = (model[i, cp] - model[i, cm]) / ((cp - cm) * h1) if cp > cm else 0.0
            if curv:
                stack[i, c, 3] = (curv_weight * (model[ip, c] - 2.0 * model[i, c] + model[im, c])
                                  if ip - im == 2 else 0.0)
                stack[i, c, 4] = (curv_weight * (model[i, cp] - 2.0 * model[i, c] + model[i, cm])
                                  if cp - cm == 2 else 0.0)


@numba.njit(**JIT)
def _inv_batch(a):
    """Inverse of every matrix of ``a`` (N, n, n) by Gauss-Jordan elimination with partial
    pivoting (NaN for a matrix with a zero pivot). Small matrices in a batch: numpy.linalg.inv
    calls LAPACK once per matrix, whose overhead dominates at n = 7 (measured 1.16 ms for 409
    matrices; this 0.22 ms).

    References
    ----------
    .. [1] G. H. Golub and C. F. Van Loan, "Matrix Computations", 4th ed., Johns Hopkins
           University Press (2013), sec. 3.4 (Gaussian elimination with partial pivoting).
    """
    n_b, n, _ = a.shape
    out = np.empty((n_b, n, n))
    m = np.empty((n, 2 * n))
    for b in range(n_b):
        for i in range(n):
            for j in range(n):
                m[i, j] = a[b, i, j]
                m[i, n + j] = 1.0 if i == j else 0.0
        ok = True
        for col in range(n):
            p = col
            for i in range(col + 1, n):
                if abs(m[i, col]) > abs(m[p, col]):
                    p = i
            piv = m[p, col]
            if piv == 0.0 or not np.isfinite(piv):
                ok = False
                break
            if p != col:
                for j in range(2 * n):
                    m[p, j], m[col, j] = m[col, j], m[p, j]
            for j in range(2 * n):
                m[col, j] = m[col, j] / piv
            for i in range(n):
                f = m[i, col]
                if i != col and f != 0.0:
                    for j in range(2 * n):
                        m[i, j] -= f * m[col, j]
        for i in range(n):
            for j in range(n):
                out[b, i, j] = m[i, n + j] if ok else np.nan
    return out


def _solve_frames(hess, grad, rss, nobs):
    """Gauss-Newton step of every frame from its normal equations (7 parameters: along and
    across shift, stretch (along offset per row), shear (across offset per row), twist, gain
    and offset). Returns the position step with the position information (the other five
    marginalised: Schur complement), and the stretch, shear and twist estimates with their
    variances."""
    n_par = hess.shape[1]
    tr = np.trace(hess, axis1=1, axis2=2)[:, None, None] + 1e-12
    hreg = hess + np.eye(n_par)[None] * 1e-9 * tr
    hinv = _inv_batch(hreg)                   # needed whole for the variances: one inverse
    full_step = np.einsum("tpq,tq->tp", hinv, grad)
    var = np.maximum(rss - np.einsum("tp,tp->t", grad, full_step), 0.0) / np.maximum(nobs - n_par, 1.0)
    inv_var = 1.0 / np.maximum(var, 1e-12)
    # Position block: information = inverse of the marginal covariance; its step is the
    # position part of the full solution.
    cov_p = hinv[:, :2, :2] / inv_var[:, None, None]
    with np.errstate(invalid="ignore", over="ignore"):
        info = np.linalg.inv(cov_p + np.eye(2)[None] * 1e-12)
    bad = nobs < 16
    info[bad] = 0.0
    info[~np.isfinite(info).all(axis=(1, 2))] = 0.0
    extra = []
    for k in (2, 3, 4):
        v = hinv[:, k, k] / inv_var
        v[bad] = np.inf
        extra.append((full_step[:, k], v))
    return full_step[:, :2], info, extra[0], extra[1], extra[2]


@numba.njit(**JIT)
def _select_inplace(a, lo, hi, k):
    """k-th smallest of a[lo:hi] by quickselect (Hoare partition, median-of-three pivot);
    reorders a[lo:hi] in place. Expected linear time."""
    hi -= 1
    while hi > lo:
        mid = (lo + hi) // 2
        x, y, zz = a[lo], a[mid], a[hi]
        piv = max(min(x, y), min(max(x, y), zz))
        i, j = lo, hi
        while i <= j:
            while a[i] < piv:
                i += 1
            while a[j] > piv:
                j -= 1
            if i <= j:
                a[i], a[j] = a[j], a[i]
                i += 1
                j -= 1
        if k <= j:
            hi = j
        elif k >= i:
            lo = i
        else:
            return a[k]
    return a[k]


@numba.njit(**JIT)
def _median_inplace(a, n_all, n):
    """Median of the n smallest of a[:n_all] (the rest: +inf, excluded values), as
    numpy.median (mean of the two middle values for even n); reorders a[:n_all] in place
    (no copy: it runs once per frame)."""
    k = n // 2
    upper = _select_inplace(a, 0, n_all, k)
    if n % 2 == 1:
        return upper
    # a[:k] now holds the k smallest: the lower middle value is their maximum
    lower = a[0]
    for i in range(1, k):
        if a[i] > lower:
            lower = a[i]
    return 0.5 * (lower + upper)


@numba.njit(**JIT)
def _sample_stack(stack, i0, i1, a0, a1, curv):
    """Model value and gradients (along, across) interpolated bilinearly at the fraction
    (a0, a1) past node (i0, i1) of the stack of :func:`_gradient_stack`; with ``curv`` the
    value gets the curvature term of the linear interpolation back."""
    w00 = (1.0 - a0) * (1.0 - a1)
    w01 = (1.0 - a0) * a1
    w10 = a0 * (1.0 - a1)
    w11 = a0 * a1
    m = (stack[i0, i1, 0] * w00 + stack[i0, i1 + 1, 0] * w01
         + stack[i0 + 1, i1, 0] * w10 + stack[i0 + 1, i1 + 1, 0] * w11)
    if curv:
        # Linear interpolation reads f - a (1 - a) h^2 f'' / 2 between nodes: add the
        # curvature term back (interpolated second differences).
        d2y = (stack[i0, i1, 3] * w00 + stack[i0, i1 + 1, 3] * w01
               + stack[i0 + 1, i1, 3] * w10 + stack[i0 + 1, i1 + 1, 3] * w11)
        d2x = (stack[i0, i1, 4] * w00 + stack[i0, i1 + 1, 4] * w01
               + stack[i0 + 1, i1, 4] * w10 + stack[i0 + 1, i1 + 1, 4] * w11)
        m -= 0.5 * (a0 * (1.0 - a0) * d2y + a1 * (1.0 - a1) * d2x)
    gy = (stack[i0, i1, 1] * w00 + stack[i0, i1 + 1, 1] * w01
          + stack[i0 + 1, i1, 1] * w10 + stack[i0 + 1, i1 + 1, 1] * w11)
    gx = (stack[i0, i1, 2] * w00 + stack[i0, i1 + 1, 2] * w01
          + stack[i0 + 1, i1, 2] * w10 + stack[i0 + 1, i1 + 1, 2] * w11)
    return m, gy, gx


@numba.njit(**JIT)
def _frame_normals(z, w, idx, pos, cos_t, sin_t, cf, stack, lo, h, hess, grad, rss, nobs, ncc):
    """Per frame of ``idx``: the model (and its gradients) sampled bilinearly where each plate looked,
    Huber weights (k = 2 robust sigmas of the frame's residuals), and the weighted normal
    equations of the 7 parameters (shift along, across, stretch, shear, twist, gain, offset),
    the weighted residual sum of squares, the count and the NCC with the model (in place)."""
    _, r_n, c_n = z.shape
    hh, ww_, n_ch = stack.shape
    curv = n_ch >= 5
    n_px = r_n * c_n
    stride = max(1, n_px // 256)
    step1 = _nodes_per_plate(h[1])
    res = np.empty(n_px)
    absr = np.empty(n_px)
    wts = np.empty(n_px)
    mv = np.empty(n_px)
    gyv = np.empty(n_px)
    gxv = np.empty(n_px)
    zv = np.empty(n_px)
    for t in idx:
        ct = cos_t[t]
        st = sin_t[t]
        cnt = 0
        # Unturned frame on a grid with a whole number of nodes per plate across: every plate
        # of a row falls between the same two node rows with the same weights (taken once per
        # row, no per-plate floor), when the frame lies inside the grid across.
        fast = False
        if st == 0.0 and ct == 1.0 and step1 > 0:
            b1 = (pos[t, 1] - lo[1]) / h[1]
            j1 = int(np.floor(b1))
            a1 = b1 - j1
            fast = j1 >= 0 and j1 + step1 * (c_n - 1) <= ww_ - 2
        for r in range(r_n):
            if fast:
                f0 = (pos[t, 0] + r - lo[0]) / h[0]
                i0 = min(max(int(np.floor(f0)), 0), hh - 2)
                a0 = min(max(f0 - i0, 0.0), 1.0)
            else:
                # a row wholly inside the grid needs no clamping
                f0s, f1s, d0, d1, inside = _turned_row(pos[t, 0], pos[t, 1], ct, st, cf, lo,
                                                       h, r - cf[0], c_n, hh, ww_)
            for c in range(c_n):
                k = r * c_n + c
                wts[k] = float(w[t, r, c])
                if wts[k] <= 0.0:
                    # excluded (every later sum skips it): not sampled
                    res[k] = mv[k] = gyv[k] = gxv[k] = zv[k] = 0.0
                    continue
                if fast:
                    i1 = j1 + step1 * c
                else:
                    f0 = f0s + d0 * c
                    f1 = f1s + d1 * c
                    if inside:
                        i0 = int(np.floor(f0))
                        i1 = int(np.floor(f1))
                        a0 = f0 - i0
                        a1 = f1 - i1
                    else:
                        i0 = min(max(int(np.floor(f0)), 0), hh - 2)
                        i1 = min(max(int(np.floor(f1)), 0), ww_ - 2)
                        a0 = min(max(f0 - i0, 0.0), 1.0)
                        a1 = min(max(f1 - i1, 0.0), 1.0)
                mv[k], gyv[k], gxv[k] = _sample_stack(stack, i0, i1, a0, a1, curv)
                zv[k] = float(z[t, r, c])
                res[k] = zv[k] - mv[k]
                cnt += 1
        nobs[t] = cnt
        # Robust scale from an even subsample of about 256 residuals: it only sets the Huber
        # threshold (its relative error ~8 %), and a full median per frame cost as much as
        # the rest of the fit.
        n_s = 0
        for k in range(0, n_px, stride):
            if wts[k] > 0.0:
                absr[n_s] = abs(res[k])
                n_s += 1
        if n_s < 16:
            n_s = 0
            for k in range(n_px):
                if wts[k] > 0.0:
                    absr[n_s] = abs(res[k])
                    n_s += 1
        med = _median_inplace(absr, n_s, n_s) if n_s > 0 else 0.0
        sig = 1.4826 * med + 1e-9
        for i in range(7):
            grad[t, i] = 0.0
            for j in range(7):
                hess[t, i, j] = 0.0
        rs = 0.0
        sw = szw = smw = 0.0
        for k in range(n_px):
            wk = wts[k]
            if wk <= 0.0:
                continue
            sw += wk
            szw += wk * zv[k]
            smw += wk * mv[k]
        # The Jacobian is (gy, gx, gy u0, gx u0, -gy u0 u1, m, 1): per row u0 is constant,
        # so the sums are taken over (gy, gx, m, 1) times powers of u1 within a row and
        # combined with u0 per row (fewer products per plate than the full 7 x 7).
        inv2s = 1.0 / (2.0 * sig)
        for r in range(r_n):
            u0 = r - cf[0]
            # row sums: yy, yx, xx, ym, xm, mm, y1, x1, m1, w; with u1: yyu, yxu, ymu, yu1,
            # yyuu, and the gradient sums
            syy = syx = sxx = sym = sxm = smm = sy = sx = sm_ = sw1 = 0.0
            syyu = syxu = symu = syu = syyuu = 0.0
            gy_r = gx_r = gm_r = g1_r = gyu_r = 0.0
            rs_r = 0.0
            for c in range(c_n):
                k = r * c_n + c
                wk = wts[k]
                if wk <= 0.0:
                    continue
                rk = res[k]
                a = abs(rk) * inv2s
                wr = wk / a if a > 1.0 else wk
                u1 = c - cf[1]
                gyk = gyv[k]
                gxk = gxv[k]
                mk = mv[k]
                wgy = wr * gyk
                wgx = wr * gxk
                wm = wr * mk
                syy += wgy * gyk
                syx += wgy * gxk
                sxx += wgx * gxk
                sym += wgy * mk
                sxm += wgx * mk
                smm += wm * mk
                sy += wgy
                sx += wgx
                sm_ += wm
                sw1 += wr
                syyu += wgy * gyk * u1
                syxu += wgy * gxk * u1
                symu += wgy * mk * u1
                syu += wgy * u1
                syyuu += wgy * gyk * u1 * u1
                gy_r += wgy * rk
                gx_r += wgx * rk
                gm_r += wm * rk
                g1_r += wr * rk
                gyu_r += wgy * u1 * rk
                rs_r += wr * rk * rk
            rs += rs_r
            # parameters: 0 gy, 1 gx, 2 gy u0, 3 gx u0, 4 -gy u0 u1, 5 m, 6 1
            H = hess[t]
            H[0, 0] += syy
            H[0, 1] += syx
            H[0, 2] += u0 * syy
            H[0, 3] += u0 * syx
            H[0, 4] -= u0 * syyu
            H[0, 5] += sym
            H[0, 6] += sy
            H[1, 1] += sxx
            H[1, 2] += u0 * syx
            H[1, 3] += u0 * sxx
            H[1, 4] -= u0 * syxu
            H[1, 5] += sxm
            H[1, 6] += sx
            H[2, 2] += u0 * u0 * syy
            H[2, 3] += u0 * u0 * syx
            H[2, 4] -= u0 * u0 * syyu
            H[2, 5] += u0 * sym
            H[2, 6] += u0 * sy
            H[3, 3] += u0 * u0 * sxx
            H[3, 4] -= u0 * u0 * syxu
            H[3, 5] += u0 * sxm
            H[3, 6] += u0 * sx
            H[4, 4] += u0 * u0 * syyuu
            H[4, 5] -= u0 * symu
            H[4, 6] -= u0 * syu
            H[5, 5] += smm
            H[5, 6] += sm_
            H[6, 6] += sw1
            grad[t, 0] += gy_r
            grad[t, 1] += gx_r
            grad[t, 2] += u0 * gy_r
            grad[t, 3] += u0 * gx_r
            grad[t, 4] -= u0 * gyu_r
            grad[t, 5] += gm_r
            grad[t, 6] += g1_r
        for i in range(7):
            for j in range(i):
                hess[t, i, j] = hess[t, j, i]
        rss[t] = rs
        sw = max(sw, 1e-12)
        zm = szw / sw
        mm = smw / sw
        szz = smm = szm = 0.0
        for k in range(n_px):
            wk = wts[k]
            if wk <= 0.0:
                continue
            za = zv[k] - zm
            ma = mv[k] - mm
            szz += wk * za * za
            smm += wk * ma * ma
            szm += wk * za * ma
        ncc[t] = szm / np.sqrt(max(szz * smm, 1e-24))


def _phase_concentration(along, active, n_rows, phase_of=None):
    """Resultant length of the sub-pixel phases of the frames around each frame.

    Over the frames whose along position lies within one strip length of frame t's (the
    frames that saw the same rows), ``|mean(exp(2 pi i frac(x)))|`` with x the along
    position (or ``phase_of``, e.g. the across position): 0 for phases spread evenly (or two
    phases half a pixel apart), 1 when every frame sits at the same phase.
    """
    t_n = len(along)
    ph = np.exp(2j * np.pi * (along if phase_of is None else np.asarray(phase_of, dtype=np.float64)))
    out = np.ones(t_n)
    order = np.argsort(along, kind="stable")
    a_sorted = along[order]
    c = np.concatenate([[0.0 + 0.0j], np.cumsum(np.where(active[order], ph[order], 0.0))])
    n = np.concatenate([[0], np.cumsum(active[order].astype(np.int64))])
    lo = np.searchsorted(a_sorted, a_sorted - 0.5 * n_rows, side="left")
    hi = np.searchsorted(a_sorted, a_sorted + 0.5 * n_rows, side="right")
    cnt = n[hi] - n[lo]
    res = np.abs(c[hi] - c[lo]) / np.maximum(cnt, 1)
    out[order] = np.where(cnt >= 4, res, 1.0)
    return out


def _fit_tiles(z, w, positions, angles_rad, h, smooth_px, tile_px, work=None, margin_px=3.0,
               sharp=0.0, twist_smooth_px=None, twist_frames=None):
    """Model and frame fits tile by tile along the swipe, so memory and cache follow the
    tile, not the swipe: the frames whose centres lie in a tile are fitted to a model of the
    window they cover (plus a margin for the smoothing and the gradients), built from every
    observation that falls in that window.

    With ``twist_smooth_px`` the frames flagged in ``twist_frames`` are also fitted to a
    second model of that smoothing (unsharpened), built from the same splatted sums, and
    its twist estimate (values, variances) is returned as a seventh item."""
    t_n, r_n, c_n = z.shape
    work = _Workspace() if work is None else work
    positions = np.asarray(positions, dtype=np.float64)
    angles_rad = np.asarray(angles_rad, dtype=np.float64)
    k0, k1 = _mosaic.plate_coordinates(z.shape, positions, angles_rad, rows=[0, r_n - 1],
                                       cols=[0, c_n - 1])
    k0 = k0.reshape(t_n, -1)
    k1 = k1.reshape(t_n, -1)
    y_lo, y_hi = k0.min(axis=1), k0.max(axis=1)
    x_lo, x_hi = k1.min(axis=1), k1.max(axis=1)
    centre = 0.5 * (y_lo + y_hi)
    lo_c, hi_c = float(centre.min()), float(centre.max())
    n_tiles = max(1, int(np.ceil((hi_c - lo_c + 1e-9) / float(tile_px))))
    edges = lo_c + (hi_c - lo_c + 1e-6) * np.arange(n_tiles + 1) / n_tiles
    order = np.argsort(centre, kind="stable")
    cuts = np.searchsorted(centre[order], edges[1:-1], side="left")
    hess = np.zeros((t_n, 7, 7))
    grad = np.zeros((t_n, 7))
    rss = np.zeros(t_n)
    nobs = np.zeros(t_n)
    ncc = np.zeros(t_n)
    cf = np.array([(r_n - 1) / 2.0, (c_n - 1) / 2.0])
    ct, st = np.cos(angles_rad), np.sin(angles_rad)
    two = twist_smooth_px is not None
    if two:
        hess2, grad2, rss2 = np.zeros((t_n, 7, 7)), np.zeros((t_n, 7)), np.zeros(t_n)
        nobs2, ncc2 = np.zeros(t_n), np.zeros(t_n)
        flag = np.ones(t_n, bool) if twist_frames is None else np.asarray(twist_frames, bool)
        pad_px = max(float(np.asarray(smooth_px, dtype=np.float64)[1]),
                     float(np.asarray(twist_smooth_px, dtype=np.float64)[1]))
    else:
        pad_px = 0.0
    for fit in np.split(order, cuts):
        if fit.size == 0:
            continue
        lo = np.array([y_lo[fit].min(), x_lo[fit].min()]) - margin_px
        hi = np.array([y_hi[fit].max(), x_hi[fit].max()]) + margin_px
        src = np.flatnonzero((y_hi >= lo[0]) & (y_lo <= hi[0]) & (x_hi >= lo[1]) & (x_lo <= hi[1]))
        shape = tuple(int(v) for v in np.ceil((hi - lo) / h).astype(np.int64) + 2)
        model, _ = _model_window(z, w, src, positions, angles_rad, h, smooth_px, lo, shape, work,
                                 sharp=sharp, keep=two, pad_px=pad_px)
        stack = work.get("stack", shape + (5 if sharp > 0 else 3,))
        _gradient_stack(model, float(h[0]), float(h[1]), stack, float(sharp))
        _frame_normals(z, w, fit.astype(np.int64), positions, ct, st, cf, stack, lo, h, hess,
                       grad, rss, nobs, ncc)
        if two:
            # the second model from the same sums (the first is done with: its buffers are
            # reused)
            model, _ = _model_window(z, w, src, positions, angles_rad, h, twist_smooth_px, lo,
                                     shape, work, splat=False, pad_px=pad_px)
            stack = work.get("stack", shape + (3,))
            _gradient_stack(model, float(h[0]), float(h[1]), stack, 0.0)
            sel = fit[flag[fit]]
            if sel.size:
                _frame_normals(z, w, sel.astype(np.int64), positions, ct, st, cf, stack, lo, h,
                               hess2, grad2, rss2, nobs2, ncc2)
    delta, info, st_, sh_, tw_ = _solve_frames(hess, grad, rss, nobs)
    if two:
        return delta, info, st_, sh_, tw_, ncc, _solve_frames(hess2, grad2, rss2, nobs2)[4]
    return delta, info, st_, sh_, tw_, ncc


# Frames reading a smoothed stretch, shear or twist within its window: none below the first,
# full weight from the second (on the accuracy suite and 64 random swipes it changes no result).
_READERS = (4.0, 8.0)


def _travel_px(positions):
    """Distance travelled along the swipe up to each frame (px): backtracks count."""
    return np.concatenate([[0.0], np.cumsum(np.abs(np.diff(positions[:, 0])))])


def _smooth_weighted(values, var, travel_px, sigma_px):
    """Inverse-variance weighted Gaussian smoothing over the travel.

    ``travel_px`` (T,) is each frame's distance travelled along the swipe (non-decreasing),
    so the window spans the same stretch of finger whether the finger moves or stands: a
    stall's hundreds of frames, which read nothing, do not widen it over the rest of the
    swipe, and a few frames' readings are not carried to frames far away in travel. The
    sums are splatted linearly onto bins a quarter of ``sigma_px`` apart, smoothed there
    (zero outside) and read back by linear interpolation (O(T))."""
    values = np.asarray(values, dtype=np.float64)
    wts = np.where(np.isfinite(var) & (var > 0), 1.0 / np.where(var > 0, var, 1.0), 0.0)
    if not wts.any():
        return np.zeros_like(values)
    b = (np.asarray(travel_px, dtype=np.float64) - float(travel_px[0])) / (0.25 * sigma_px)
    i0 = np.floor(b).astype(np.int64)
    a = b - i0
    n_b = int(i0.max()) + 2
    wx = wts * np.nan_to_num(values)

    def splat(v):
        return (np.bincount(i0, v * (1.0 - a), minlength=n_b)
                + np.bincount(i0 + 1, v * a, minlength=n_b))[:n_b]

    num = ndimage.gaussian_filter1d(splat(wx), 4.0, mode="constant")
    den = ndimage.gaussian_filter1d(splat(wts), 4.0, mode="constant")
    cnt = ndimage.gaussian_filter1d(splat((wts > 0).astype(np.float64)), 4.0, mode="constant")
    num_t = (1.0 - a) * num[i0] + a * num[i0 + 1]
    den_t = (1.0 - a) * den[i0] + a * den[i0 + 1]
    # How many frames read it within the window (Gaussian weights, 1 at the centre): where
    # only a few do, their reading is not carried at all (none up to _READERS[0], full weight
    # from _READERS[1]). Each frame's reading is biased by what its model is made of (the
    # shear's scatter measured three times its noise-based one), and a pocket of a few
    # readers among frames that cannot read (concentrated phases: a fast swipe's frames have
    # under four neighbours within half a strip) spoke for the whole window.
    n_t = ((1.0 - a) * cnt[i0] + a * cnt[i0 + 1]) * np.sqrt(2.0 * np.pi) * 4.0
    q = np.clip((n_t - _READERS[0]) / (_READERS[1] - _READERS[0]), 0.0, 1.0)
    return q * np.where(den_t > 0, num_t / np.where(den_t > 0, den_t, 1.0), 0.0)


def _end_rows(dt, sigma_acc, cut=None):
    """The first and last rows of the acceleration prior in each stretch between cut links,
    as (first, coeffs) (see :func:`_jerk_rows`): the pull's end condition."""
    k, c = _traj._prior_coefficients(dt, sigma_acc, cut)
    if not k.size:
        return np.zeros(0, int), np.zeros((0, 3))
    seg = np.concatenate([[0], np.cumsum(cut)]) if cut is not None else np.zeros(len(dt) + 1, int)
    start = np.searchsorted(seg, seg, side="left")            # each frame's stretch: first,
    end = np.searchsorted(seg, seg, side="right") - 1          # and last frame
    ends = (k - 1 == start[k]) | (k + 1 == end[k])
    return k[ends] - 1, c[ends]


def _jerk_rows(dt, sigma_acc, cut=None):
    """Third-difference rows for the pull in :func:`_solve_steps`: the difference of two
    successive rows of the acceleration prior (each in its own allowance), as (first, coeffs):
    row i weighs x[first[i] + j] by coeffs[i, j], j = 0..3. No row spans a cut link."""
    k, c = _traj._prior_coefficients(dt, sigma_acc, cut)
    if k.size < 2:
        return np.zeros(0, int), np.zeros((0, 4))
    nxt = np.flatnonzero(k[1:] == k[:-1] + 1)
    coef = np.zeros((nxt.size, 4))
    coef[:, :3] -= c[nxt]
    coef[:, 1:] += c[nxt + 1]
    return k[nxt] - 1, coef


def _add_pull(ab, rhs, first, c, x, step):
    """Add a Cauchy-weighted prior on the along positions x + u, rows c[i] on x[first[i] + j],
    to the banded normal matrix ab (upper form, 7 rows, unknowns interleaved) and rhs."""
    if not first.size:
        return
    t_n = len(x)
    w = c.shape[1]
    idx = first[:, None] + np.arange(w)
    m = np.einsum("ij,ij->i", c, x[idx])
    m_fit = np.einsum("ij,ij->i", c, (x + step)[idx])
    wt = 1.0 / (1.0 + (np.maximum(np.abs(m), np.abs(m_fit)) / _PULL_SCALE) ** 2)
    # D^T W D on the along unknowns (diagonal d of the along block is diagonal 2d of the
    # interleaved matrix) and -D^T W D x on the right
    for d in range(w):
        band = np.bincount(idx[:, :w - d].ravel(),
                           (wt[:, None] * c[:, :w - d] * c[:, d:]).ravel(), minlength=t_n)
        ab[6 - 2 * d, 2 * d::2] += band[:t_n - d]
    rhs[0::2] -= np.bincount(idx.ravel(), (c * (wt * m)[:, None]).ravel(), minlength=t_n)


def _solve_steps(positions, delta, info, dt, sigma_acc_px, cut):
    """Joint position update: each frame's step with its information, an acceleration prior
    on the update itself (the trajectory it corrects already carries the motion prior), and a
    robust pull of the whole trajectory's jerk along the swipe towards zero; neither across
    ``cut`` links (gaps). Frames without information follow their neighbours' correction.

    The pull is a second prior on x + u along the swipe (x the current positions, u the
    update): its rows are differences of successive rows of the acceleration prior at half
    the allowance (``_PULL_ALLOWANCE``), each stretch between cuts closed by its first and
    last acceleration row at a quarter (``_END_ALLOWANCE``), all with Cauchy weights
    ``1 / (1 + (m / 2)^2)`` [1]_, m the larger of a row's value in x and in x + delta (where
    the frames' fits would put them), taken at x (one reweighting per pass). A smooth stretch
    loses the frame-to-frame jitter the fits leave, a smooth change of speed is left alone,
    and a stall's or a reversal's abrupt change keeps its shape. See ``_PULL_SCALE`` for what
    was measured.

    The normal matrix, unknowns interleaved (along, across per frame), is banded: the 2 x 2
    information blocks, the motion prior's pentadiagonal D^T D on each axis and the pull's
    heptadiagonal one along (band 6), so it is solved by banded Cholesky (LAPACK pbsv) in O(T).

    References
    ----------
    .. [1] P. W. Holland and R. E. Welsch, "Robust regression using iteratively reweighted
           least-squares", Commun. Statist. Theory Methods 6(9), 813-827 (1977).
    """
    t_n = len(positions)
    n = 2 * t_n
    ab = np.zeros((7, n))                    # upper banded form: ab[6 - d, j] = A[j - d, j]
    ab[6, 0::2] = info[:, 0, 0]
    ab[6, 1::2] = info[:, 1, 1]
    ab[5, 1::2] = info[:, 0, 1]              # A[2t, 2t + 1]
    bands = _traj._prior_gram_bands(dt, sigma_acc_px, cut)
    ab[6] += np.repeat(bands[0], 2)
    ab[4, 2:] += np.repeat(bands[1, :-1], 2)  # A[2t + a, 2t + 2 + a]
    ab[2, 4:] += np.repeat(bands[2, :-2], 2)  # A[2t + a, 2t + 4 + a]
    ab[6] += 1e-6
    rhs = np.einsum("tab,tb->ta", info, delta).reshape(-1)
    x = positions[:, 0]
    _add_pull(ab, rhs, *_jerk_rows(dt, _PULL_ALLOWANCE * sigma_acc_px, cut), x, delta[:, 0])
    _add_pull(ab, rhs, *_end_rows(dt, _END_ALLOWANCE * sigma_acc_px, cut), x, delta[:, 0])
    sol = linalg.solveh_banded(ab, rhs, check_finite=False)
    return sol.reshape(t_n, 2)


# The pull in _solve_steps: its allowance as a fraction of the motion prior's, and the scale
# (in its own allowances) of its Cauchy weights. It takes out what the prior on the update
# alone left at convergence: each frame ended where its fit to the model put it, and the
# model's aliasing differs between sampling phases (a swipe at 0.49 px per frame alternates
# between two), a frame-to-frame jitter of two to three times the Cramer-Rao bound above
# 20 dB. Measured on bench_accuracy's 18 swipes (default mode, median of the increment RMS
# along over the bound; 2.08 without the pull), bench_random.py's 64 swipes (seed 7000; 2.63)
# and bench_geometry.py's 36 strips (3.97):
# - the plain motion prior on the whole trajectory, both axes: 1.48, but it bent the
#   simulator's instant stops and reversals (random swipes with them: 6-17 times the bound
#   -> 15-108);
# - Cauchy-weighted as here, full allowance: 1.68 / 2.39; half, scale 4 (2 of the prior's
#   allowances): 1.40 / 2.22, but a 1 kHz strip's human swipe 13.8 -> 27.8 (geometry);
#   both axes: the across RMS of whole-pixel swipes grew (16x128 at 0.98 px per frame:
#   0.031 -> 0.053 px);
# - these settings: 1.47 / 2.17 / 3.82; span error median 0.058 -> 0.070 % (suite), 0.044 ->
#   0.039 % (random), along RMS median 0.069 -> 0.072 px (suite), 0.055 -> 0.053 px (random),
#   no other figure's median moved by more than 0.002 px, no false event added. A smooth
#   2 kHz reversal (0.2 px per frame^2, frames placed only weakly there) still comes out
#   bent: 10 -> 25 times the bound on that swipe, its position RMS unchanged.
# That pull was on the acceleration. Fast swipes whose speed changes smoothly by more than
# the pull's allowance (which falls as 1 / f^2) were bent towards a constant speed:
# bench_independent.py's default along RMS median 0.057 -> 0.087 px (a 16x128 at 2.1 px per
# frame and 4 kHz 0.059 -> 0.317 px). On the jerk (differences of successive acceleration
# rows, same allowance and weights), which leaves a smooth acceleration free and still damps
# the two-phase jitter: independent 0.087 -> 0.067 px (that swipe 0.070 px), the suite's
# median increment over the bound 1.469 -> 1.168 (bench_accuracy.py's prior study; 0.986 ->
# 0.853 at 20 dB and less), its span error median 0.068 %, along 0.071 px (unchanged within 0.002);
# bench_random.py's figures within 0.004 (across median 0.144 -> 0.140 px); bench_geometry.py
# along median 0.092 -> 0.082 px, span median 0.047 -> 0.053 %, its 3- and 5-row strips
# 0.1 px worse along; bench_few_rows.py 2-5 rows median span error 0.5-0.6 % as before.
# Alone, the jerk pull lets a stretch's ends curve where the frames there read least (the
# first frames after a gap: 0.07 px of step error instead of 0.03); a natural end condition,
# each stretch's first and last acceleration rows at a quarter of the allowance, holds them
# (0.044 px) while a swipe that really starts or ends accelerating keeps most of the gain
# (two rows at each end, half the allowance: that 16x128 0.174 px).
_PULL_ALLOWANCE = 0.5
_PULL_SCALE = 2.0
_END_ALLOWANCE = 0.25


def refine_positions(z, weights, positions, angles_rad, *, dt=None, sigma_acc_px=0.05, cut=None,
                     iterations=4, fine_px=(0.25, 0.5), smooth_px=(0.3, 0.3), max_step_px=0.5,
                     correct_stretch=True, rotation=True, min_turn_deg=1.0, tile_px=256.0,
                     twist_smooth_px=None, sharpen="auto", stop_if_turning=False):
    """Refine frame positions against a super-resolved model of the finger.

    Each pass builds the model from the current positions (:func:`build_model`), fits every
    frame against it by Gauss-Newton (shift, stretch, shear, gain and offset per frame, with
    Huber weights), solves all position steps jointly with the acceleration prior, and then
    removes the smoothed stretch and shear from the trajectory (see the module notes).

    Parameters
    ----------
    z : (T, R, C) array
        Prepared frames (fixed pattern removed).
    weights : (T, R, C) array
        Observation weights (0 for bad plates and frames without finger).
    positions : (T, 2) array
        Starting positions (px), e.g. from the pairwise solve; within a few tenths of a pixel.
    angles_rad : (T,) array
        Frame angles (held fixed here).
    dt : (T-1,) array, optional
        Time steps in nominal frames. Default ones.
    sigma_acc_px : float
        Acceleration prior (px per nominal frame squared). Default 0.05.
    cut : (T-1,) bool, optional
        Links with no overlap (gaps): no prior and no stretch correction across them.
    iterations : int
        Passes. Default 4.
    fine_px, smooth_px : (2,) float
        Model grid spacing and smoothing (sensor pixels), see :func:`build_model`.
    max_step_px : float
        Largest position change per pass. Default 0.5.
    correct_stretch : bool
        Remove the smoothed stretch, shear (and twist) from the trajectory. Default True.
    rotation : bool
        Read the twist and correct the angles with it. Default True.
    min_turn_deg : float or None
        The angles are corrected only if the first pass's twist turns the frames with finger
        by at least this much over the swipe, and by ten times its white-noise standard
        error (else the given angles stand). None: always corrected (a turn established
        earlier). Default 1.0.
    tile_px : float
        Length along the swipe of the tiles the model is built in (memory follows the tile,
        not the swipe; smaller tiles also stay in cache). Default 256.
    twist_smooth_px : (2,) float or None
        Smoothing (along, across, px) of a second model the twist is read from on frames
        whose along phases are concentrated (when they are a tenth of the frames with finger
        or more); None (default): the twist comes from the one model.
    sharpen : "auto" or float
        Weight in [0, 1] of two corrections of the model's smoothing and interpolation: its
        second-order smoothing bias along (see :func:`build_model`), and the curvature term of
        the linear interpolation where the frames sample it (``f - a (1 - a) h^2 f'' / 2``
        between nodes a fraction a apart). Both restore detail of fine ridges near the plate
        pitch, which the smoothing would otherwise turn into a per-frame placement error that
        no amount of signal removes; both also amplify the model's noise. "auto" (default):
        full weight in the first pass, then from the frames' median NCC with the model, 0 at
        0.975 (about 12 dB) rising to 1 at 0.99 (about 20 dB).
    stop_if_turning : bool
        Stop after the first pass when its twist established a turn (``min_turn_deg`` met)
        and the frames sample many along phases (under a tenth of them concentrated): for a
        caller that follows with passes of its own for turning swipes. Where the phases are
        concentrated the second pass still places the frames better. Default False.

    Returns
    -------
    Refined

    References
    ----------
    .. [1] S. Baker and I. Matthews, "Lucas-Kanade 20 years on: a unifying framework",
           Int. J. Computer Vision 56(3), 221-255 (2004).
    .. [2] S. Farsiu, M. D. Robinson, M. Elad and P. Milanfar, "Fast and robust multiframe
           super resolution", IEEE Trans. Image Processing 13(10), 1327-1344 (2004).
           doi:10.1109/TIP.2004.834669
    """
    z = check_frames(z, name="z", min_frames=2, min_rows=2)
    t_n, r_n, c_n = z.shape
    pos = check_array(positions, name="positions", shape=(t_n, 2)).copy()
    ang = check_array(angles_rad, name="angles_rad", shape=(t_n,)).copy()
    if np.shape(weights) != z.shape:
        raise ValueError(f"weights must have the shape of z {z.shape}; got {np.shape(weights)}")
    iterations = check_int(iterations, name="iterations", lo=1, hi=50)
    dt = np.ones(t_n - 1) if dt is None else np.asarray(dt, dtype=np.float64)
    cut = np.zeros(t_n - 1, dtype=bool) if cut is None else np.asarray(cut, dtype=bool)
    w = np.asarray(weights)                   # any real dtype (float32 halves the memory)
    h = np.asarray(fine_px, dtype=np.float64)
    info = np.zeros((t_n, 2, 2))
    st_s = np.zeros(t_n)
    sh_s = np.zeros(t_n)
    tw_s = np.zeros(t_n)
    ncc = np.zeros(t_n)
    active = w.reshape(t_n, -1).max(axis=1) > 0
    # Smoothing window of the stretch and shear: about two strips' length of travel (the
    # weak modes are smooth over the finger; a frame's own estimate is noisy), and at least
    # eight frames of a fast swipe. Over the travel, not the frame index: a stall (speed 0)
    # made a window in frames span the whole swipe, and where it also left only a couple of
    # frames that read a stretch (a fast swipe that then stalled, 2 of 228 frames), their
    # reading moved every frame (an 8x192 swipe at 2-3 px per frame drawn by a generator
    # outside the library, a texture sampled with plate averaging and a three-step motion
    # blur: span error -0.8 % from the tracker, +5.0 % after one pass, +2.8 % after two).
    steps = np.abs(np.diff(pos[:, 0]))
    moving = steps[active[1:] & active[:-1] & (steps > 0.02)] if t_n > 2 else steps[:0]
    speed = float(np.median(moving)) if moving.size else 1.0
    sigma_px = max(2.0 * r_n, 8.0 * speed)
    work = _Workspace()
    if isinstance(sharpen, str) and sharpen != "auto":
        raise ValueError(f'sharpen must be "auto" or a number in [0, 1]; got {sharpen!r}')
    auto = isinstance(sharpen, str)
    sharp = 1.0 if auto else check_in_range(sharpen, 0.0, 1.0, name="sharpen")
    first_turn = float("nan")
    for it in range(max(1, int(iterations))):
        # Only where the frames sample many sub-pixel phases is the model finer than the
        # plates (see the stretch below); elsewhere it is an interpolation of aliased samples
        # like any other, and the pairwise placement stands.
        conc = _phase_concentration(pos[:, 0], active, r_n)
        alias = active & (conc >= 0.5)
        # Where the along phases are concentrated, the twist from a model smoothed wider
        # along: the sharp model's interpolation between the few phases reads only part of a
        # turn (measured on two 16-row strips turning 3 degrees at 0.98 px per frame: 0.55 deg
        # RMS -> 0.09 and 0.08). Built from the same splatted sums as the first model.
        # (under a tenth of the frames with finger at concentrated phases: many phases)
        many_phases = alias.sum() < 0.1 * max(active.sum(), 1)
        twist2 = twist_smooth_px is not None and rotation and not many_phases
        fitted = _fit_tiles(z, w, pos, ang, h, smooth_px, tile_px, work, sharp=sharp,
                            twist_smooth_px=twist_smooth_px if twist2 else None,
                            twist_frames=alias)
        delta, info, (st, st_var), (sh, sh_var), (tw, tw_var), ncc = fitted[:6]
        if twist2:
            tw2, tw2_var = fitted[6]
            tw = np.where(alias, tw2, tw)
            tw_var = np.where(alias, tw2_var, tw_var)
        ok = active & (ncc > 0.3)
        if auto and ok.any():
            # Sharpening restores detail the smoothing took but also amplifies the model's
            # noise: its weight for the next pass follows the frames' fit to this one (see
            # the parameter). Measured on the 18-swipe accuracy suite: median per-pair error
            # 2.90 -> 2.24 times the Cramer-Rao bound, across RMS 0.076 -> 0.057 px; a 4-row
            # strip at 10 dB (NCC 0.967) lost 0.35 % of span at full weight, none with it.
            sharp = float(np.clip((np.median(ncc[ok]) - _NCC_LO) / (_NCC_HI - _NCC_LO), 0.0, 1.0))
        use = ok & (conc < 0.5)
        # Frames the model cannot place are held where they are (a weak anchor, 0.1 px), so
        # a long stall is not bent by the prior extrapolating its neighbours' corrections.
        info = np.where(use[:, None, None], info, np.eye(2)[None] * 100.0)
        delta = np.clip(np.where(use[:, None], delta, 0.0), -max_step_px, max_step_px)
        upd = _solve_steps(pos, delta, info, dt, sigma_acc_px, cut)
        pos = pos + np.clip(upd, -max_step_px, max_step_px)
        # Stretch and shear of the trajectory, smoothed over the swipe, removed from its steps.
        # The stretch is read against the model's along-swipe detail, which is only finer
        # than the plates where the frames sample many sub-pixel phases: a swipe moving by
        # nearly whole pixels per frame samples one phase, and the model between is a smooth
        # guess that biases the stretch. Frames whose neighbourhood (the frames that saw the
        # same rows) has concentrated phases (resultant length above 0.5) do not count.
        st_var = np.where(ok & (conc < 0.5), st_var, np.inf)
        # The shear, read against the model's detail across the swipe, needs the same (its
        # across profile is a local linear fit too, so a slanted swipe's one-sided samples
        # do not bias it).
        sh_var = np.where(ok & (conc < 0.5), sh_var, np.inf)
        # The twist (angle error growing with the travel) is read on every frame the model
        # places that travels: it is an along shift that changes across the strip, which a
        # model interpolated between concentrated along phases still shows, only weaker (a
        # 16-row strip at 0.98 px per frame read 65 % of a 3-degree turn; held back as the
        # stretch is, such a swipe kept no turn at all, 1.7 deg RMS). twist_smooth_px reads
        # it better. Only where the moving frames themselves sample few phases, though: a
        # stall (frames that do not move, concentrated at one phase) and the frames around
        # it, whose model the stall's hundreds of repeats make, are left out as before (read
        # there, they turned an unturned swipe by 2 degrees).
        travel = np.abs(np.gradient(ndimage.uniform_filter1d(pos[:, 0], 5, mode="nearest")))
        moving = active & (travel >= 0.2)
        whole_px = moving & (_phase_concentration(pos[:, 0], moving, r_n) >= 0.5)
        tw_var = np.where(ok & ((conc < 0.5) | whole_px), tw_var, np.inf) if rotation \
            else np.full(t_n, np.inf)
        travel_px = _travel_px(pos)
        st_s = _smooth_weighted(st, st_var, travel_px, sigma_px)
        sh_s = _smooth_weighted(sh, sh_var, travel_px, sigma_px)
        tw_s = _smooth_weighted(tw, tw_var, travel_px, sigma_px)
        d = np.diff(pos, axis=0)
        mid = lambda x: 0.5 * (x[1:] + x[:-1])
        # Only over the steps from the first to the last frame that shows the finger: before
        # it arrives nothing was measured, and a correction carried there would move (or turn)
        # frame 0's reference.
        idx = np.arange(t_n - 1)
        act = np.flatnonzero(active)
        both = ((idx >= act[0]) & (idx < act[-1]) & ~cut) if act.size else np.zeros(t_n - 1, bool)
        corr = np.stack([-mid(st_s) * d[:, 0], -mid(sh_s) * d[:, 0]], axis=1)
        corr[~both] = 0.0
        turn = np.where(both, -mid(tw_s) * d[:, 0], 0.0)
        if it == 0:
            # The turn the first reading implies decides whether the angles are corrected at
            # all: below min_turn_deg over the frames with finger, what the twist reads is
            # mostly its own bias (tremor, a stall dominating the model), and turning every
            # placement by it costs more than it gains.
            probe = np.concatenate([[0.0], np.cumsum(turn)])
            # ... and it must stand out of its own noise: the turn summed from the frames'
            # raw twists against its white-noise standard error (independent frames), at ten
            # of them, since the residual of aliased edges is not white and the white-noise
            # error understates the real one (simulated suite: a real 3.5 deg turn stood at 46,
            # a false one on a 4-row strip at 10 dB at 6).
            ok_t = np.isfinite(tw_var) & both[np.minimum(np.arange(t_n), t_n - 2)]
            dk = np.abs(np.concatenate([d[:, 0], [0.0]]))
            raw = float(np.sum(np.where(ok_t, tw * dk, 0.0)))
            se = float(np.sqrt(np.sum(np.where(ok_t, tw_var, 0.0) * dk ** 2)))
            read_deg = float(np.degrees(np.ptp(probe[active]))) if active.any() else 0.0
            if min_turn_deg is not None and rotation and active.any():
                first_turn = read_deg
            use_twist = bool(active.any()) and (
                min_turn_deg is None
                or (read_deg >= float(min_turn_deg) and abs(raw) >= 10.0 * se))
        if not use_twist:
            turn[:] = 0.0
        if not correct_stretch:
            corr[:] = 0.0
            turn[:] = 0.0
        pos = pos + np.vstack([[0.0, 0.0], np.cumsum(corr, axis=0)])
        ang = ang + np.concatenate([[0.0], np.cumsum(turn)])
        if it == 0 and stop_if_turning and use_twist and min_turn_deg is not None and many_phases:
            break                             # (the caller's turn passes take it from here)
    # Across a gap the frames never overlapped: keep the step the caller placed there.
    d = np.diff(pos, axis=0)
    d[cut] = np.diff(np.asarray(positions, dtype=np.float64), axis=0)[cut]
    pos = np.vstack([[0.0, 0.0], np.cumsum(d, axis=0)])
    return Refined(positions=pos, angles_rad=ang, frame_info=info, stretch=st_s, shear=sh_s,
                   twist=tw_s, ncc=ncc, first_turn_deg=first_turn)
