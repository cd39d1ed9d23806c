"""Pairwise registration stage: sub-pixel displacement, rotation and information between frames.

In: a stack of strip frames and a list of frame pairs. Out: per-pair shift, rotation, 2x2
information matrix (inverse covariance), residual noise and a match score.

Model (library convention): for a pair (i, j), ``frames[j][u] ~ frames[i][delta + Rot(theta) u]``
with u measured from the frame centre, so ``delta`` is the position of frame j relative to
frame i, in frame i's axes.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

__all__ = ["Prepared", "PairEstimates", "prepare", "coarse_shifts", "refine_shifts"]


# --------------------------------------------------------------------------------------
# Preparation: fixed-pattern removal, bad plates, contact
# --------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class Prepared:
    """Frames ready for registration.

    Attributes
    ----------
    z : (T, R, C) float32
        Frames with per-plate offset and gain removed (zero mean, unit spread over contact
        frames); bad plates set to 0.
    plate_ok : (R, C) bool
        Plates used (dead, stuck and noisy plates are False).
    offset, gain : (R, C) float64
        Per-plate offset and gain removed, in input units (``z = (x - offset) / gain``).
    contact : (T,) bool
        Frames with finger texture.
    texture : (T,) float64
        Per-frame texture strength (standard deviation of ``z`` over good plates).
    noise_sigma : float
        Robust estimate of the temporal noise in units of ``z``.
    """

    z: np.ndarray
    plate_ok: np.ndarray
    offset: np.ndarray
    gain: np.ndarray
    contact: np.ndarray
    texture: np.ndarray
    noise_sigma: float


def _robust_sigma(x, axis=None):
    """Normal-consistent median absolute deviation (1.4826 * MAD; common practice)."""
    med = np.median(x, axis=axis, keepdims=True)
    return 1.4826 * np.median(np.abs(x - med), axis=axis)


def prepare(frames, *, frame_weights=None):
    """Remove the fixed pattern and find bad plates and frames in contact.

    The fixed pattern (per-plate offset and gain) is the same in every frame, so left in place
    it pulls every correlation towards zero shift. It is estimated from the frames themselves:
    per-plate mean and spread over the frames in contact, using the same frames for every plate
    so that every plate averages (nearly) the same stretch of finger.

    Parameters
    ----------
    frames : (T, R, C) ndarray
        Raw frames (any real dtype).
    frame_weights : (T,) array_like, optional
        Weights of the frames in the per-plate statistics (e.g. to equalise finger positions
        when the finger stalled). Default is None (equal weights over contact frames).

    Returns
    -------
    Prepared
    """
    x = np.asarray(frames, dtype=np.float64)
    t_n = x.shape[0]
    # Per-plate median over time removes most of the fixed pattern robustly; what is left per
    # frame is finger texture plus temporal noise: its spread tells contact from no contact.
    med = np.median(x, axis=0)
    resid = x - med
    texture0 = np.sqrt(np.mean(resid ** 2, axis=(1, 2)))
    # Contact: texture well above the quietest frames (blank frames show only noise) and not
    # far below the typical frame. Frame differences are no noise estimate while the finger
    # moves, so only the texture spread itself is used.
    lo = float(np.percentile(texture0, 5))
    hi = float(np.percentile(texture0, 90))
    thresh = max(0.2 * hi, min(3.0 * lo, 0.5 * hi))
    contact = texture0 > thresh
    if contact.sum() < 2:
        contact = texture0 >= np.sort(texture0)[-min(2, t_n)]
    dif = np.diff(x, axis=0)
    w = contact.astype(np.float64)
    if frame_weights is not None:
        w = w * np.asarray(frame_weights, dtype=np.float64)
    w_sum = w.sum()
    if w_sum <= 0:
        w = contact.astype(np.float64)
        w_sum = w.sum()
    wn = w / w_sum
    offset = np.einsum("t,trc->rc", wn, x)
    spread = np.sqrt(np.einsum("t,trc->rc", wn, (x - offset) ** 2))
    # Temporal noise per plate from successive differences within contact (noisy plates).
    both = contact[1:] & contact[:-1]
    if both.sum() >= 2:
        pn = np.sqrt(np.mean(dif[both] ** 2, axis=0) / 2.0)
    else:
        pn = np.sqrt(np.mean(dif ** 2, axis=0) / 2.0) if t_n > 1 else np.zeros_like(spread)
    med_spread = float(np.median(spread))
    med_pn = float(np.median(pn))
    plate_ok = spread > 0.25 * med_spread                      # dead, stuck or never touched
    if med_pn > 0:
        plate_ok &= pn < 4.0 * med_pn + 1e-12                  # noisy plates
    # Gain: a plate's spread relative to the others, but only where the spread is texture.
    gain = np.where(plate_ok, spread / max(med_spread, 1e-12), 1.0)
    gain = np.clip(gain, 0.5, 2.0)
    scale = max(med_spread, 1e-12)
    z = ((x - offset) / (gain * scale)).astype(np.float32)
    z[:, ~plate_ok] = 0.0
    texture = np.sqrt(np.mean(z[:, plate_ok] ** 2, axis=1)) if plate_ok.any() else np.zeros(t_n)
    noise_sigma = float(np.median(pn[plate_ok]) / scale) if plate_ok.any() else 0.0
    return Prepared(z=z, plate_ok=plate_ok, offset=offset, gain=gain * scale, contact=contact,
                    texture=texture, noise_sigma=noise_sigma)


# --------------------------------------------------------------------------------------
# Coarse: integer-pixel normalised cross-correlation by FFT, parabolic sub-pixel start
# --------------------------------------------------------------------------------------

def _row_normalise(z, plate_ok):
    """Zero mean, unit spread per row over good plates (for the coarse search only)."""
    okf = plate_ok.astype(np.float32)
    n = np.maximum(okf.sum(axis=1), 1.0)
    mean = (z * okf).sum(axis=2) / n
    zc = (z - mean[..., None]) * okf
    sd = np.sqrt((zc ** 2).sum(axis=2) / n)
    return zc / np.maximum(sd, 1e-6)[..., None]


def _next_fast_len(n):
    from scipy.fft import next_fast_len
    return next_fast_len(n, real=True)


def coarse_shifts(zn, pairs, *, max_along, max_across, prior=None, prior_window_px=1.5,
                  chunk=2048):
    """Integer-pixel search by normalised cross-correlation, with a parabolic sub-pixel start.

    Parameters
    ----------
    zn : (T, R, C) float32
        Row-normalised frames (see ``_row_normalise``).
    pairs : (P, 2) int
        Frame index pairs (i, j): shift of j relative to i.
    max_along, max_across : int
        Search half-ranges in pixels.
    prior : (P, 2) float, optional
        Expected shifts: the peak is searched within ``prior_window_px`` of them first and
        the global peak is used only if it is clearly stronger.

    Returns
    -------
    shift : (P, 2) float64
    score : (P,) float64
        Peak NCC (about 1 for a perfect match, about 0 for unrelated frames).
    n_overlap : (P,) int
        Number of overlapping samples at the peak.
    """
    from scipy import fft as sfft

    t_n, r_n, c_n = zn.shape
    p_n = len(pairs)
    n_r = 2 * r_n
    n_c = _next_fast_len(c_n + max_across + 1)
    d = np.arange(-max_along, max_along + 1)
    e = np.arange(-max_across, max_across + 1)
    # Overlap sample counts for every candidate (rows x columns), and a lower confidence bound
    # on the NCC (noise std of an NCC over N samples is about 1/sqrt(N)) to keep small
    # overlaps from winning by chance.
    n_ov = (r_n - np.abs(d))[:, None] * (c_n - np.abs(e))[None, :]
    shift = np.zeros((p_n, 2))
    score = np.zeros(p_n)
    nsel = np.zeros(p_n, dtype=np.int64)
    fz = sfft.rfft2(zn, s=(n_r, n_c), axes=(1, 2), workers=1)
    for s in range(0, p_n, chunk):
        pi = pairs[s:s + chunk, 0]
        pj = pairs[s:s + chunk, 1]
        # corr[d, e] = sum A[r + d, c + e] B[r, c]  (A = frame i, B = frame j)
        corr = sfft.irfft2(fz[pi] * np.conj(fz[pj]), s=(n_r, n_c), axes=(1, 2), workers=1)
        surf = corr[:, d % n_r][:, :, e % n_c] / n_ov[None]
        lcb = surf - 2.0 / np.sqrt(n_ov)[None]
        flat = lcb.reshape(len(pi), -1)
        if prior is not None:
            pr = prior[s:s + chunk]
            dd = d[None, :, None] - pr[:, 0, None, None]
            ee = e[None, None, :] - pr[:, 1, None, None]
            near = (np.abs(dd) <= prior_window_px) & (np.abs(ee) <= prior_window_px)
            near_flat = np.where(near.reshape(len(pi), -1), flat, -np.inf)
            k_near = np.argmax(near_flat, axis=1)
            k_all = np.argmax(flat, axis=1)
            v_near = near_flat[np.arange(len(pi)), k_near]
            v_all = flat[np.arange(len(pi)), k_all]
            # Keep the peak near the prediction unless the global one is clearly stronger.
            k = np.where(np.isfinite(v_near) & (v_near >= 0.75 * v_all), k_near, k_all)
        else:
            k = np.argmax(flat, axis=1)
        kd, ke = np.unravel_index(k, surf.shape[1:])
        idx = np.arange(len(pi))
        sub = np.zeros((len(pi), 2))
        for axis, kk, nmax in ((0, kd, len(d)), (1, ke, len(e))):
            inner = (kk > 0) & (kk < nmax - 1)
            km = np.clip(kk - 1, 0, nmax - 1)
            kp = np.clip(kk + 1, 0, nmax - 1)
            if axis == 0:
                ym, y0, yp = surf[idx, km, ke], surf[idx, kk, ke], surf[idx, kp, ke]
            else:
                ym, y0, yp = surf[idx, kd, km], surf[idx, kd, kk], surf[idx, kd, kp]
            den = ym - 2 * y0 + yp
            frac = np.where(inner & (den < 0), 0.5 * (ym - yp) / np.where(den < 0, den, -1.0), 0.0)
            sub[:, axis] = np.clip(frac, -0.5, 0.5)
        shift[s:s + chunk, 0] = d[kd] + sub[:, 0]
        shift[s:s + chunk, 1] = e[ke] + sub[:, 1]
        score[s:s + chunk] = surf[idx, kd, ke]
        nsel[s:s + chunk] = n_ov[kd, ke]
    return shift, score, nsel


# --------------------------------------------------------------------------------------
# Fine: inverse-compositional Gauss-Newton with a cubic B-spline interpolator
# --------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class PairEstimates:
    """Refined pairwise estimates.

    Attributes
    ----------
    pairs : (P, 2) int
    shift : (P, 2) float64
        Position of frame j relative to frame i (along, across), pixels, frame i's axes.
    angle_rad : (P,) float64
        Rotation of frame j relative to frame i.
    info : (P, 2, 2) float64
        Information matrix (inverse covariance, px^-2) of ``shift``, with rotation, offset
        and gain marginalised; zero for failed pairs.
    angle_info : (P,) float64
        Information (rad^-2) of ``angle_rad``.
    sigma : (P,) float64
        Residual noise standard deviation in units of the prepared frames.
    n_valid : (P,) int
        Samples in the overlap.
    ncc : (P,) float64
        Normalised correlation of the overlap at the solution.
    ok : (P,) bool
        Converged with enough overlap.
    """

    pairs: np.ndarray
    shift: np.ndarray
    angle_rad: np.ndarray
    info: np.ndarray
    angle_info: np.ndarray
    sigma: np.ndarray
    n_valid: np.ndarray
    ncc: np.ndarray
    ok: np.ndarray


_PAD = 2  # rows/columns of boundary extrapolation around each frame in the atlas


def _keys_weights(frac):
    """Cubic convolution weights (Keys 1981, a = -1/2) for taps at -1, 0, 1, 2."""
    f = frac
    f2 = f * f
    f3 = f2 * f
    return (-0.5 * f3 + f2 - 0.5 * f,
            1.5 * f3 - 2.5 * f2 + 1.0,
            -1.5 * f3 + 2.0 * f2 + 0.5 * f,
            0.5 * f3 - 0.5 * f2)


def _keys_extend(z):
    """Pad every frame by two samples per side with Keys' boundary condition.

    f(-1) = 3 f(0) - 3 f(1) + f(2) (Keys 1981, eq. 25) keeps the kernel third-order accurate
    up to the frame edge; a mirror or spline boundary would distort all rows of a short frame.
    """
    def ext(a, axis):
        n = a.shape[axis]
        take = lambda i: np.take(a, [i], axis=axis)
        if n >= 3:
            lo1 = 3 * take(0) - 3 * take(1) + take(2)
            hi1 = 3 * take(n - 1) - 3 * take(n - 2) + take(n - 3)
        else:
            lo1 = 2 * take(0) - take(n - 1)
            hi1 = 2 * take(n - 1) - take(0)
        lo2 = 2 * lo1 - take(0)
        hi2 = 2 * hi1 - take(n - 1)
        return np.concatenate([lo2, lo1, a, hi1, hi2], axis=axis)
    return ext(ext(z, 1), 2)


class _Atlas:
    """All frames, boundary-extended and tiled into one flat array for batched interpolation.

    Interpolation is cubic convolution (Keys 1981), a local 4 x 4 kernel: frames never mix and
    the short along-swipe axis needs no global prefilter.
    """

    def __init__(self, z):
        t_n, r_n, c_n = z.shape
        ext = _keys_extend(z.astype(np.float64))
        self.h, self.w = r_n + 2 * _PAD, c_n + 2 * _PAD
        self.flat = ext.reshape(-1)
        self.r_n, self.c_n = r_n, c_n

    def sample(self, frame_idx, rows, cols):
        """Interpolate frames ``frame_idx`` (P,) at (P, N) rows/cols in frame coordinates."""
        rr = np.clip(rows, -1.0, self.r_n)  # callers mask samples outside [0, n-1]
        cc = np.clip(cols, -1.0, self.c_n)
        i0 = np.floor(rr)
        j0 = np.floor(cc)
        wr = _keys_weights(rr - i0)
        wc = _keys_weights(cc - j0)
        base = (frame_idx[:, None] * (self.h * self.w)
                + (i0.astype(np.int64) + _PAD - 1) * self.w + (j0.astype(np.int64) + _PAD - 1))
        out = np.zeros(rows.shape)
        for a in range(4):
            row = np.zeros(rows.shape)
            off = base + a * self.w
            for b in range(4):
                row += wc[b] * np.take(self.flat, off + b)
            out += wr[a] * row
        return out


def _template_gradients(z):
    """Central differences of each frame (along, across), independent of the centre sample.

    At the first and last row the nearest interior difference is used (B[2]-B[1] for row 0),
    not a one-sided difference through the row itself: a gradient that shares a sample with
    the residual biases the estimate towards zero shift.
    """
    t_n, r_n, c_n = z.shape
    g0 = np.zeros_like(z)
    g1 = np.zeros_like(z)
    if r_n >= 3:
        g0[:, 1:-1] = 0.5 * (z[:, 2:] - z[:, :-2])
        g0[:, 0] = z[:, 2] - z[:, 1]
        g0[:, -1] = z[:, -2] - z[:, -3]
    else:
        g0[:] = (z[:, 1:2] - z[:, 0:1])
    g1[:, :, 1:-1] = 0.5 * (z[:, :, 2:] - z[:, :, :-2])
    g1[:, :, 0] = z[:, :, 2] - z[:, :, 1]
    g1[:, :, -1] = z[:, :, -2] - z[:, :, -3]
    return g0, g1


def refine_shifts(prep, pairs, init_shift, *, init_angle=None, estimate_rotation=True,
                  iterations=5, smooth_first=True, chunk=1024, atlas=None, grads=None):
    """Refine pairwise shifts by inverse-compositional Gauss-Newton (Lucas-Kanade).

    For each pair (i, j) with B = frame j on its own pixel grid and A = frame i, minimise
    ``sum_u w(u) [A(delta + Rot(theta) u) - (1 + g) B(u) - b]^2`` over the shift ``delta``,
    rotation ``theta``, gain ``g`` and offset ``b``. A is sampled by cubic convolution
    (Keys); the Jacobian uses B's own gradient (inverse compositional form, Baker & Matthews
    2004), which does not share noise with the residual and is computed once per pair.

    Parameters
    ----------
    prep : Prepared
    pairs : (P, 2) int
    init_shift : (P, 2) float
        Starting shifts (within about half a ridge period of the truth).
    init_angle : (P,) float, optional
        Starting rotations in radians. Default zeros.
    estimate_rotation : bool
        Estimate theta (else held at ``init_angle``). Default is True.
    iterations : int
        Gauss-Newton iterations. Default is 5.
    smooth_first : bool
        Run the first two iterations on frames smoothed by a Gaussian of 1 px, so that fine
        textures cannot lock the refinement onto whole pixels. Default is True.

    Returns
    -------
    PairEstimates

    References
    ----------
    .. [1] B. D. Lucas and T. Kanade, "An iterative image registration technique with an
           application to stereo vision", IJCAI 1981, 674-679.
    .. [2] S. Baker and I. Matthews, "Lucas-Kanade 20 years on: a unifying framework",
           Int. J. Computer Vision 56(3), 221-255 (2004). doi:10.1023/B:VISI.0000011205.11775.fd
    .. [3] R. Keys, "Cubic convolution interpolation for digital image processing", IEEE
           Trans. Acoustics, Speech and Signal Processing 29(6), 1153-1160 (1981).
           doi:10.1109/TASSP.1981.1163711
    """
    z = prep.z
    t_n, r_n, c_n = z.shape
    pairs = np.asarray(pairs, dtype=np.int64)
    p_n = len(pairs)
    shift = np.array(init_shift, dtype=np.float64).reshape(p_n, 2).copy()
    angle = np.zeros(p_n) if init_angle is None else np.array(init_angle, dtype=np.float64).copy()
    if atlas is None:
        atlas = _Atlas(z)
    if grads is None:
        grads = _template_gradients(z)
    atlas_s = grads_s = None
    if smooth_first and iterations > 2:
        zs = ndimage.gaussian_filter1d(ndimage.gaussian_filter1d(z, 1.0, axis=1, mode="mirror"),
                                       1.0, axis=2, mode="mirror")
        atlas_s = _Atlas(zs)
        grads_s = _template_gradients(zs)
        zs_all = zs
    ok_plate = prep.plate_ok.ravel()
    rc = (np.arange(r_n) - (r_n - 1) / 2.0)
    cc = (np.arange(c_n) - (c_n - 1) / 2.0)
    u0 = np.repeat(rc, c_n)            # (N,) centred along coordinate of B's samples
    u1 = np.tile(cc, r_n)
    n_par = 5 if estimate_rotation else 4

    info = np.zeros((p_n, 2, 2))
    ainfo = np.zeros(p_n)
    sigma = np.full(p_n, np.inf)
    n_valid = np.zeros(p_n, dtype=np.int64)
    ncc = np.zeros(p_n)
    okp = np.zeros(p_n, dtype=bool)
    for s in range(0, p_n, chunk):
        sl = slice(s, min(s + chunk, p_n))
        pi, pj = pairs[sl, 0], pairs[sl, 1]
        m = len(pi)
        sh = shift[sl].copy()
        an = angle[sl].copy()
        for it in range(iterations):
            smooth = atlas_s is not None and it < 2
            at, (g0a, g1a), zz = (atlas_s, grads_s, zs_all) if smooth else (atlas, grads, z)
            bvals = zz[pj].reshape(m, -1)
            gb0 = g0a[pj].reshape(m, -1)
            gb1 = g1a[pj].reshape(m, -1)
            ca, sa = np.cos(an)[:, None], np.sin(an)[:, None]
            # Sample point in A (centred coordinates): delta + Rot(theta) u
            a0 = sh[:, 0:1] + ca * u0 - sa * u1
            a1 = sh[:, 1:2] + sa * u0 + ca * u1
            rows = a0 + (r_n - 1) / 2.0
            cols = a1 + (c_n - 1) / 2.0
            valid = ((rows >= -1e-9) & (rows <= r_n - 1 + 1e-9) & (cols >= -1e-9)
                     & (cols <= c_n - 1 + 1e-9) & ok_plate[None, :])
            # Plates of A near the sample must be good too (nearest-plate check).
            ri = np.clip(np.rint(rows), 0, r_n - 1).astype(np.int64)
            ci = np.clip(np.rint(cols), 0, c_n - 1).astype(np.int64)
            valid &= prep.plate_ok[ri, ci]
            avals = at.sample(pi, rows, cols)
            w = valid.astype(np.float64)
            # Jacobian of A(delta + Rot u) wrt (delta0, delta1, theta) using B's gradient
            # (the same finger point), plus gain (B) and offset (1) columns.
            jac = [gb0, gb1]
            if estimate_rotation:
                jac.append(-gb0 * u1[None, :] + gb1 * u0[None, :])
            jac += [bvals, np.ones_like(bvals)]
            jac = np.stack(jac, axis=-1) * w[..., None]                  # (m, N, n_par)
            resid = (avals - bvals) * w
            hess = np.einsum("mnp,mnq->mpq", jac, jac)
            grad = np.einsum("mnp,mn->mp", jac, resid)
            hess_r = hess + np.eye(n_par)[None] * 1e-9 * (np.trace(hess, axis1=1, axis2=2)[:, None, None] + 1e-12)
            try:
                step = np.linalg.solve(hess_r, grad[..., None])[..., 0]
            except np.linalg.LinAlgError:
                step = np.zeros((m, n_par))
            # A(delta + Rot u) ~ A0 + J step -> residual A - B - ... minimised by step = -H^-1 g
            # (gain/offset terms absorb the photometric difference).
            step = -step
            step[:, :2] = np.clip(step[:, :2], -1.0, 1.0)
            sh += step[:, :2]
            if estimate_rotation:
                an += np.clip(step[:, 2], -0.02, 0.02)
        # Final statistics at the solution (full-resolution frames).
        bvals = z[pj].reshape(m, -1)
        gb0 = grads[0][pj].reshape(m, -1)
        gb1 = grads[1][pj].reshape(m, -1)
        ca, sa = np.cos(an)[:, None], np.sin(an)[:, None]
        a0 = sh[:, 0:1] + ca * u0 - sa * u1
        a1 = sh[:, 1:2] + sa * u0 + ca * u1
        rows = a0 + (r_n - 1) / 2.0
        cols = a1 + (c_n - 1) / 2.0
        valid = ((rows >= -1e-9) & (rows <= r_n - 1 + 1e-9) & (cols >= -1e-9)
                 & (cols <= c_n - 1 + 1e-9) & ok_plate[None, :])
        ri = np.clip(np.rint(rows), 0, r_n - 1).astype(np.int64)
        ci = np.clip(np.rint(cols), 0, c_n - 1).astype(np.int64)
        valid &= prep.plate_ok[ri, ci]
        avals = atlas.sample(pi, rows, cols)
        w = valid.astype(np.float64)
        nv = w.sum(axis=1)
        jac = [gb0, gb1, -gb0 * u1[None, :] + gb1 * u0[None, :], bvals, np.ones_like(bvals)]
        jac = np.stack(jac, axis=-1) * w[..., None]
        hess = np.einsum("mnp,mnq->mpq", jac, jac)
        # Photometric fit at the solution, then residual variance.
        sw = np.maximum(nv, 1.0)
        am = (avals * w).sum(1) / sw
        bm = (bvals * w).sum(1) / sw
        ac = (avals - am[:, None]) * w
        bc = (bvals - bm[:, None]) * w
        sab = (ac * bc).sum(1)
        saa = (ac * ac).sum(1)
        sbb = (bc * bc).sum(1)
        gain = sab / np.maximum(sbb, 1e-12)
        res = ac - gain[:, None] * bc
        dof = np.maximum(nv - n_par, 1.0)
        # Noise is in both frames: the residual variance is about 2 sigma^2 but the Jacobian
        # carries only one frame's noise-free gradient, so cov(delta) = var(res) * H^-1.
        var = (res ** 2).sum(1) / dof
        cc_ = sab / np.sqrt(np.maximum(saa * sbb, 1e-24))
        # Marginal information of (delta0, delta1): Schur complement over theta, gain, offset.
        hdd = hess[:, :2, :2]
        hdo = hess[:, :2, 2:]
        hoo = hess[:, 2:, 2:] + np.eye(3)[None] * 1e-9 * (np.trace(hess, axis1=1, axis2=2)[:, None, None] + 1e-12)
        schur = hdd - hdo @ np.linalg.solve(hoo, np.transpose(hdo, (0, 2, 1)))
        # Angle information: Schur complement of theta over the other four.
        idx_o = [0, 1, 3, 4]
        hth = hess[:, 2, 2]
        hto = hess[:, 2, idx_o]
        hoo2 = hess[:, idx_o][:, :, idx_o] + np.eye(4)[None] * 1e-9 * (np.trace(hess, axis1=1, axis2=2)[:, None, None] + 1e-12)
        ath = hth - np.einsum("mp,mp->m", hto, np.linalg.solve(hoo2, hto[..., None])[..., 0])
        inv_var = 1.0 / np.maximum(var, 1e-12)
        info[sl] = schur * inv_var[:, None, None]
        ainfo[sl] = np.maximum(ath, 0.0) * inv_var
        sigma[sl] = np.sqrt(var / 2.0)
        n_valid[sl] = nv.astype(np.int64)
        ncc[sl] = cc_
        shift[sl] = sh
        angle[sl] = an
        okp[sl] = (nv >= max(16, 0.5 * c_n)) & np.isfinite(sh).all(1)
    info[~okp] = 0.0
    ainfo[~okp] = 0.0
    return PairEstimates(pairs=pairs, shift=shift, angle_rad=angle, info=info, angle_info=ainfo,
                         sigma=sigma, n_valid=n_valid, ncc=ncc, ok=okp)
