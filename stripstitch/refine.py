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
from scipy import ndimage, sparse
from scipy.sparse import linalg as splinalg

from . import mosaic as _mosaic
from . import trajectory as _traj
from ._jit import JIT
from ._validate import check_array, check_frames, check_int

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
    """

    positions: np.ndarray
    angles_rad: np.ndarray
    frame_info: np.ndarray
    stretch: np.ndarray
    shear: np.ndarray
    twist: np.ndarray
    ncc: np.ndarray

    def __post_init__(self):
        for name in ("positions", "angles_rad", "frame_info", "stretch", "shear", "twist", "ncc"):
            arr = np.array(getattr(self, name), dtype=np.float64)
            arr.flags.writeable = False
            object.__setattr__(self, name, arr)


def build_model(z, weights, positions, angles_rad, *, fine_px=(0.25, 0.5), smooth_px=(0.3, 0.3),
                margin_px=3.0):
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
    """
    t_n, r_n, c_n = z.shape
    h = np.asarray(fine_px, dtype=np.float64)
    w = np.asarray(weights)                   # any real dtype; chunks are taken in double
    if w.ndim == 1:
        w = np.broadcast_to(w[:, None, None], z.shape)
    # Bounds from the frame corners (a rotated rectangle's extremes are its corners).
    k0, k1 = _mosaic.plate_coordinates(z.shape, positions, angles_rad, rows=[0, r_n - 1],
                                       cols=[0, c_n - 1])
    lo = np.array([k0.min(), k1.min()]) - margin_px
    hi = np.array([k0.max(), k1.max()]) + margin_px
    shape = tuple((np.ceil((hi - lo) / h)).astype(np.int64) + 2)
    # Moments per node for a local linear fit: sums of w, w dy, w dx, w dy^2, w dx^2,
    # w dy dx, w z, w z dy, w z dx, with (dy, dx) the offset (px) of the observation from
    # the node it is splatted to.
    acc = np.zeros((9,) + shape)
    cf = np.array([(r_n - 1) / 2.0, (c_n - 1) / 2.0])
    th = np.asarray(angles_rad, dtype=np.float64)
    _splat_moments(z, w, np.asarray(positions, dtype=np.float64), np.cos(th), np.sin(th), cf,
                   lo, h, acc)
    sig = np.asarray(smooth_px, dtype=np.float64) / h

    def kernels(sigma, spacing):
        radius = int(4.0 * sigma + 0.5)
        off = np.arange(-radius, radius + 1, dtype=np.float64)
        g = np.exp(-0.5 * (off / max(sigma, 1e-9)) ** 2)
        g /= g.sum()
        d = off * spacing
        return g, g * d, g * d * d

    gy0, gy1, gy2 = kernels(sig[0], h[0])
    gx0, gx1, gx2 = kernels(sig[1], h[1])

    # Moments about each output node: the offset from splat node to output node is added in,
    # (dy + oy)^a (dx + ox)^b expanded; one compiled pass across, one along (see
    # _smooth_moments).
    sm = np.empty_like(acc)
    _smooth_moments(acc, gx0, gx1, gx2, gy0, gy1, gy2, sm)
    s00 = sm[0]
    b0, a00 = acc[6], acc[0]
    # Local linear where the samples around a node determine both slopes, local mean
    # elsewhere (_local_linear); nodes with little weight take a wider local mean (no holes).
    local = _local_linear(sm)
    pos_w = s00[s00 > 0]
    full = (s00 >= 0.05 * float(np.percentile(pos_w, 90))) & (s00 > 1e-9) if pos_w.size else s00 > 0
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        model = np.where(full, local, 0.0)
        if not full.all():
            wide = 2.0 * sig + 0.5
            s3 = ndimage.gaussian_filter(b0, wide, mode="constant", truncate=3.0)
            w3 = ndimage.gaussian_filter(a00, wide, mode="constant", truncate=3.0)
            model = np.where(full, model, np.where(w3 > 1e-9, s3 / np.where(w3 > 0, w3, 1.0), 0.0))
    return model, s00, lo


@numba.njit(**JIT)
def _smooth_moments(acc, gx0, gx1, gx2, gy0, gy1, gy2, out):
    """Separable Gaussian moments of the splatted sums (zero outside the grid).

    ``acc`` holds the per-node sums (w, w dy, w dx, w dy^2, w dx^2, w dy dx, w z, w z dy,
    w z dx); ``g*0, g*1, g*2`` are a Gaussian and its first and second offset moments across
    (x) and along (y). Writes s00, s10, s01, s20, s02, s11, t0, t1y, t1x (moments about each
    output node) into ``out`` (9, H, W): the same sums as scipy.ndimage.correlate1d with
    mode "constant", grouped so that every input is read once per pass.
    """
    _, hh, ww = acc.shape
    rx = gx0.shape[0] // 2
    ry = gy0.shape[0] // 2
    # across: the nine inputs of the along pass
    p = np.empty((9, hh, ww))
    for i in range(hh):
        for c in range(ww):
            v0 = v1 = v2 = v3 = v4 = v5 = v6 = v7 = v8 = 0.0
            x1a00 = x1a01 = x1a10 = x1b0 = x2a00 = 0.0
            for j in range(max(-rx, -c), min(rx, ww - 1 - c) + 1):
                cc = c + j
                k0 = gx0[j + rx]
                k1 = gx1[j + rx]
                k2 = gx2[j + rx]
                a00 = acc[0, i, cc]
                a01 = acc[2, i, cc]
                a10 = acc[1, i, cc]
                b0 = acc[6, i, cc]
                v0 += k0 * a00
                v1 += k0 * a10
                v2 += k0 * a01
                v3 += k0 * acc[3, i, cc]
                v4 += k0 * acc[4, i, cc]
                v5 += k0 * acc[5, i, cc]
                v6 += k0 * b0
                v7 += k0 * acc[7, i, cc]
                v8 += k0 * acc[8, i, cc]
                x1a00 += k1 * a00
                x1a01 += k1 * a01
                x1a10 += k1 * a10
                x1b0 += k1 * b0
                x2a00 += k2 * a00
            p[0, i, c] = v0                          # xa00
            p[1, i, c] = v1                          # xa10
            p[2, i, c] = v2 + x1a00                  # xa01 + x1_a00
            p[3, i, c] = v3                          # xa20
            p[4, i, c] = v4 + 2.0 * x1a01 + x2a00    # xa02 + 2 x1_a01 + x2_a00
            p[5, i, c] = v5 + x1a10                  # xa11 + x1_a10
            p[6, i, c] = v6                          # xb0
            p[7, i, c] = v7                          # xb1y
            p[8, i, c] = v8 + x1b0                   # xb1x + x1_b0
    # along (rows are contiguous: the inner loop runs over columns); each output row is
    # accumulated in a small buffer that stays in cache and written once
    buf = np.empty((9, ww))
    for i in range(hh):
        buf[:, :] = 0.0
        for j in range(max(-ry, -i), min(ry, hh - 1 - i) + 1):
            ii = i + j
            k0 = gy0[j + ry]
            k1 = gy1[j + ry]
            k2 = gy2[j + ry]
            for c in range(ww):
                q0 = p[0, ii, c]
                q1 = p[1, ii, c]
                q2 = p[2, ii, c]
                q6 = p[6, ii, c]
                buf[0, c] += k0 * q0                              # s00
                buf[1, c] += k0 * q1 + k1 * q0                    # s10
                buf[2, c] += k0 * q2                              # s01
                buf[3, c] += k0 * p[3, ii, c] + 2.0 * k1 * q1 + k2 * q0   # s20
                buf[4, c] += k0 * p[4, ii, c]                     # s02
                buf[5, c] += k0 * p[5, ii, c] + k1 * q2           # s11
                buf[6, c] += k0 * q6                              # t0
                buf[7, c] += k0 * p[7, ii, c] + k1 * q6           # t1y
                buf[8, c] += k0 * p[8, ii, c]                     # t1x
        out[:, i, :] = buf


@numba.njit(**JIT)
def _local_linear(sm):
    """Value at each node of the weighted local plane fit (3 x 3 normal equations by
    cofactors), or the local mean where the plane is not determined (or 0 without weight)."""
    _, hh, ww = sm.shape
    out = np.empty((hh, ww))
    for i in range(hh):
        for c in range(ww):
            s00 = sm[0, i, c]
            s10 = sm[1, i, c]
            s01 = sm[2, i, c]
            s20 = sm[3, i, c]
            s02 = sm[4, i, c]
            s11 = sm[5, i, c]
            c00 = s20 * s02 - s11 * s11
            c01 = s11 * s01 - s10 * s02
            c02 = s10 * s11 - s20 * s01
            det = s00 * c00 + s10 * c01 + s01 * c02
            if det > 1e-6 * s00 * max(s20 * s02, 1e-30):
                out[i, c] = (c00 * sm[6, i, c] + c01 * sm[7, i, c] + c02 * sm[8, i, c]) / det
            elif s00 > 0.0:
                out[i, c] = sm[6, i, c] / s00
            else:
                out[i, c] = sm[6, i, c]
    return out


@numba.njit(**JIT)
def _splat_moments(z, w, pos, cos_t, sin_t, cf, lo, h, acc):
    """Per node the moments of a local linear fit, from every observation splatted onto its
    four nearest nodes with bilinear weights (in place into acc, shape (9, H, W)): sums of
    w, w dy, w dx, w dy^2, w dx^2, w dy dx, w z, w z dy, w z dx, with (dy, dx) the offset
    (px) of the observation from the node."""
    t_n, r_n, c_n = z.shape
    for t in range(t_n):
        ct = cos_t[t]
        st = sin_t[t]
        for r in range(r_n):
            u0 = r - cf[0]
            for c in range(c_n):
                wv = float(w[t, r, c])
                if wv <= 0.0:
                    continue
                q0, q1 = _mosaic.plate_point(pos[t, 0], pos[t, 1], ct, st, cf[0], cf[1], u0,
                                             c - cf[1])
                f0 = (q0 - lo[0]) / h[0]
                f1 = (q1 - lo[1]) / h[1]
                i0 = int(np.floor(f0))
                i1 = int(np.floor(f1))
                a0 = f0 - i0
                a1 = f1 - i1
                v = float(z[t, r, c])
                for di in range(2):
                    wa = a0 if di == 1 else 1.0 - a0
                    dy = (a0 - di) * h[0]
                    for dj in range(2):
                        wb = a1 if dj == 1 else 1.0 - a1
                        dx = (a1 - dj) * h[1]
                        wk = wv * wa * wb
                        wy = wk * dy
                        wx = wk * dx
                        n0 = i0 + di
                        n1 = i1 + dj
                        acc[0, n0, n1] += wk
                        acc[1, n0, n1] += wy
                        acc[2, n0, n1] += wx
                        acc[3, n0, n1] += wy * dy
                        acc[4, n0, n1] += wx * dx
                        acc[5, n0, n1] += wy * dx
                        acc[6, n0, n1] += wk * v
                        acc[7, n0, n1] += wy * v
                        acc[8, n0, n1] += wx * v


def _fit_frames(z, w, positions, angles_rad, stack, lo, h):
    """Gauss-Newton normal equations of every frame against the model.

    Parameters per frame: along and across shift, stretch (along offset per row), shear
    (across offset per row), gain and offset. Returns the position information and step
    with the other four marginalised (Schur complement), the stretch and shear estimates
    with their variances, and the NCC with the model.
    """
    t_n, r_n, c_n = z.shape
    n_par = 7
    hess = np.zeros((t_n, n_par, n_par))
    grad = np.zeros((t_n, n_par))
    rss = np.zeros(t_n)
    nobs = np.zeros(t_n)
    ncc = np.zeros(t_n)
    th = np.asarray(angles_rad, dtype=np.float64)
    cf = np.array([(r_n - 1) / 2.0, (c_n - 1) / 2.0])
    _frame_normals(z, w, np.asarray(positions, dtype=np.float64), np.cos(th), np.sin(th), cf,
                   np.ascontiguousarray(stack, dtype=np.float64), np.asarray(lo, np.float64),
                   np.asarray(h, np.float64), hess, grad, rss, nobs, ncc)
    tr = np.trace(hess, axis1=1, axis2=2)[:, None, None] + 1e-12
    hreg = hess + np.eye(n_par)[None] * 1e-9 * tr
    full_step = np.linalg.solve(hreg, grad[..., None])[..., 0]
    var = np.maximum(rss - np.einsum("tp,tp->t", grad, full_step), 0.0) / np.maximum(nobs - n_par, 1.0)
    inv_var = 1.0 / np.maximum(var, 1e-12)
    hinv = np.linalg.inv(hreg)
    # Position block: information = inverse of the marginal covariance; its step is the
    # position part of the full solution.
    cov_p = hinv[:, :2, :2] / inv_var[:, None, None]
    with np.errstate(invalid="ignore", over="ignore"):
        info = np.linalg.inv(cov_p + np.eye(2)[None] * 1e-12)
    info[nobs < 16] = 0.0
    info[~np.isfinite(info).all(axis=(1, 2))] = 0.0
    st = full_step[:, 2]
    sh = full_step[:, 3]
    st_var = hinv[:, 2, 2] / inv_var
    sh_var = hinv[:, 3, 3] / inv_var
    bad = nobs < 16
    tw = full_step[:, 4]
    tw_var = hinv[:, 4, 4] / inv_var
    st_var[bad] = np.inf
    sh_var[bad] = np.inf
    tw_var[bad] = np.inf
    return full_step[:, :2], info, (st, st_var), (sh, sh_var), (tw, tw_var), ncc


@numba.njit(**JIT)
def _frame_normals(z, w, pos, cos_t, sin_t, cf, stack, lo, h, hess, grad, rss, nobs, ncc):
    """Per frame: the model (and its gradients) sampled bilinearly where each plate looked,
    Huber weights (k = 2 robust sigmas of the frame's residuals), and the weighted normal
    equations of the 7 parameters (shift along, across, stretch, shear, twist, gain, offset),
    the weighted residual sum of squares, the count and the NCC with the model (in place)."""
    t_n, r_n, c_n = z.shape
    hh, ww_, _ = stack.shape
    n_px = r_n * c_n
    res = np.empty(n_px)
    absr = np.empty(n_px)
    wts = np.empty(n_px)
    mv = np.empty(n_px)
    gyv = np.empty(n_px)
    gxv = np.empty(n_px)
    zv = np.empty(n_px)
    for t in range(t_n):
        ct = cos_t[t]
        st = sin_t[t]
        cnt = 0
        for r in range(r_n):
            u0 = r - cf[0]
            for c in range(c_n):
                k = r * c_n + c
                q0, q1 = _mosaic.plate_point(pos[t, 0], pos[t, 1], ct, st, cf[0], cf[1], u0,
                                             c - cf[1])
                f0 = (q0 - lo[0]) / h[0]
                f1 = (q1 - lo[1]) / h[1]
                i0 = min(max(int(np.floor(f0)), 0), hh - 2)
                i1 = min(max(int(np.floor(f1)), 0), ww_ - 2)
                a0 = min(max(f0 - i0, 0.0), 1.0)
                a1 = min(max(f1 - i1, 0.0), 1.0)
                w00 = (1.0 - a0) * (1.0 - a1)
                w01 = (1.0 - a0) * a1
                w10 = a0 * (1.0 - a1)
                w11 = a0 * a1
                mv[k] = (stack[i0, i1, 0] * w00 + stack[i0, i1 + 1, 0] * w01
                         + stack[i0 + 1, i1, 0] * w10 + stack[i0 + 1, i1 + 1, 0] * w11)
                gyv[k] = (stack[i0, i1, 1] * w00 + stack[i0, i1 + 1, 1] * w01
                          + stack[i0 + 1, i1, 1] * w10 + stack[i0 + 1, i1 + 1, 1] * w11)
                gxv[k] = (stack[i0, i1, 2] * w00 + stack[i0, i1 + 1, 2] * w01
                          + stack[i0 + 1, i1, 2] * w10 + stack[i0 + 1, i1 + 1, 2] * w11)
                zv[k] = float(z[t, r, c])
                res[k] = zv[k] - mv[k]
                wts[k] = float(w[t, r, c])
                if wts[k] > 0.0:
                    absr[cnt] = abs(res[k])
                    cnt += 1
        nobs[t] = cnt
        med = np.median(absr[:cnt]) if cnt > 0 else 0.0
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


def _fit_tiles(z, w, positions, angles_rad, h, smooth_px, tile_px):
    """Model and frame fits tile by tile along the swipe, so memory follows the tile, not the
    swipe: the frames whose centres lie in a tile are fitted to a model built from every
    frame whose footprint reaches into it (with a margin)."""
    t_n, r_n, c_n = z.shape
    # Reach of a frame along the swipe from its centre (a turned frame reaches further).
    half = float(np.max(0.5 * (r_n * np.abs(np.cos(angles_rad)) + c_n * np.abs(np.sin(angles_rad))))) + 2.0
    centre = positions[:, 0] + 0.5 * (r_n - 1)
    lo_c, hi_c = float(centre.min()), float(centre.max())
    n_tiles = max(1, int(np.ceil((hi_c - lo_c + 1e-9) / float(tile_px))))
    edges = lo_c + (hi_c - lo_c + 1e-6) * np.arange(n_tiles + 1) / n_tiles
    delta = np.zeros((t_n, 2))
    info = np.zeros((t_n, 2, 2))
    extra = [np.zeros(t_n), np.full(t_n, np.inf), np.zeros(t_n), np.full(t_n, np.inf),
             np.zeros(t_n), np.full(t_n, np.inf)]
    ncc = np.zeros(t_n)
    for k in range(n_tiles):
        fit = np.flatnonzero((centre >= edges[k]) & ((centre < edges[k + 1]) | (k == n_tiles - 1)))
        if fit.size == 0:
            continue
        a, b = centre[fit].min() - 2 * half, centre[fit].max() + 2 * half
        src = np.flatnonzero((centre >= a) & (centre <= b))
        model, _, lo = build_model(z[src], w[src], positions[src], angles_rad[src], fine_px=h,
                                   smooth_px=smooth_px)
        gy, gx = np.gradient(model, h[0], h[1])
        stack = np.stack([model, gy, gx], axis=-1)
        del model, gy, gx
        d, i, (st, stv), (sh, shv), (tw, twv), nc = _fit_frames(z[fit], w[fit], positions[fit],
                                                                angles_rad[fit], stack, lo, h)
        delta[fit], info[fit], ncc[fit] = d, i, nc
        for arr, val in zip(extra, (st, stv, sh, shv, tw, twv)):
            arr[fit] = val
    return delta, info, (extra[0], extra[1]), (extra[2], extra[3]), (extra[4], extra[5]), ncc


def _smooth_weighted(values, var, sigma_frames):
    """Inverse-variance weighted Gaussian smoothing over the frame index."""
    wts = np.where(np.isfinite(var) & (var > 0), 1.0 / np.where(var > 0, var, 1.0), 0.0)
    num = ndimage.gaussian_filter1d(wts * np.nan_to_num(values), sigma_frames, mode="nearest")
    den = ndimage.gaussian_filter1d(wts, sigma_frames, mode="nearest")
    return np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)


def _solve_steps(positions, delta, info, dt, sigma_acc_px, cut):
    """Joint position update: each frame's step with its information and an acceleration
    prior on the update itself (the trajectory it corrects already carries the motion prior),
    none across ``cut`` links (gaps). Frames without information follow their neighbours'
    correction."""
    t_n = len(positions)
    n = 2 * t_n
    ti = np.arange(t_n)
    rows = np.concatenate([2 * ti + a for a in (0, 0, 1, 1)])
    cols = np.concatenate([2 * ti + b for b in (0, 1, 0, 1)])
    vals = np.concatenate([info[:, 0, 0], info[:, 0, 1], info[:, 1, 0], info[:, 1, 1]])
    a_mat = sparse.csr_matrix((vals, (rows, cols)), shape=(n, n))
    rhs = np.einsum("tab,tb->ta", info, delta).reshape(-1)
    d1 = _traj._prior_rows(dt, sigma_acc_px, cut=cut)
    if d1.shape[0]:
        d = sparse.kron(sparse.csr_matrix(d1), sparse.identity(2), format="csr")
        a_mat = a_mat + (d.T @ d).tocsr()
    a_mat = a_mat + sparse.identity(n, format="csr") * 1e-6
    sol = splinalg.spsolve(a_mat.tocsc(), rhs)
    return np.asarray(sol).reshape(t_n, 2)


def refine_positions(z, weights, positions, angles_rad, *, dt=None, sigma_acc_px=0.05, cut=None,
                     iterations=4, fine_px=(0.25, 0.5), smooth_px=(0.3, 0.3), max_step_px=0.5,
                     correct_stretch=True, rotation=True, min_turn_deg=1.0, tile_px=256.0):
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
    min_turn_deg : float
        The angles are corrected only if the first pass's twist turns the frames with finger
        by at least this much over the swipe, and by ten times its white-noise standard
        error (else the given angles stand). Default 1.0.
    tile_px : float
        Length along the swipe of the tiles the model is built in (memory follows the tile,
        not the swipe; smaller tiles also stay in cache). Default 256.

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
    # Smoothing window of the stretch and shear: the frames that travel over about two
    # strips' length (the weak modes are smooth over the swipe; a frame's own estimate is noisy).
    steps = np.diff(pos[:, 0])
    speed = float(np.median(np.abs(steps[active[1:] & active[:-1]]))) if t_n > 2 and active.sum() > 2 else 1.0
    sigma_frames = float(np.clip(2.0 * r_n / max(speed, 0.02), 8.0, max(8.0, t_n / 2.0)))
    for it in range(max(1, int(iterations))):
        delta, info, (st, st_var), (sh, sh_var), (tw, tw_var), ncc = _fit_tiles(
            z, w, pos, ang, h, smooth_px, tile_px)
        # Only where the frames sample many sub-pixel phases is the model finer than the
        # plates (see the stretch below); elsewhere it is an interpolation of aliased samples
        # like any other, and the pairwise placement stands.
        conc = _phase_concentration(pos[:, 0], active, r_n)
        ok = active & (ncc > 0.3)
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
        # The twist (angle error growing with the travel) is read like the stretch.
        tw_var = np.where(ok & (conc < 0.5), tw_var, np.inf) if rotation else np.full(t_n, np.inf)
        st_s = _smooth_weighted(st, st_var, sigma_frames)
        sh_s = _smooth_weighted(sh, sh_var, sigma_frames)
        tw_s = _smooth_weighted(tw, tw_var, sigma_frames)
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
            use_twist = (bool(active.any()) and np.degrees(np.ptp(probe[active])) >= float(min_turn_deg)
                         and abs(raw) >= 10.0 * se)
        if not use_twist:
            turn[:] = 0.0
        if not correct_stretch:
            corr[:] = 0.0
            turn[:] = 0.0
        pos = pos + np.vstack([[0.0, 0.0], np.cumsum(corr, axis=0)])
        ang = ang + np.concatenate([[0.0], np.cumsum(turn)])
    # Across a gap the frames never overlapped: keep the step the caller placed there.
    d = np.diff(pos, axis=0)
    d[cut] = np.diff(np.asarray(positions, dtype=np.float64), axis=0)[cut]
    pos = np.vstack([[0.0, 0.0], np.cumsum(d, axis=0)])
    return Refined(positions=pos, angles_rad=ang, frame_info=info, stretch=st_s, shear=sh_s,
                   twist=tw_s, ncc=ncc)
