"""Pairwise registration stage: sub-pixel displacement, rotation and information between frames.

In: a stack of strip frames and a list of frame pairs. Out: per-pair shift, rotation, 2x2
information matrix (inverse covariance), residual noise and a match score. For strips of very
few rows also the speed read from the delay between neighbouring rows (:func:`row_delay`).

Model (library convention): for a pair (i, j), ``frames[j][u] ~ frames[i][delta + Rot(theta) u]``
with u measured from the frame centre, so ``delta`` is the position of frame j relative to
frame i, in frame i's axes.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numba
import numpy as np
from scipy import ndimage

from ._jit import JIT
from ._validate import check_array, check_int, check_positive

__all__ = ["Prepared", "PairEstimates", "RowDelay", "prepare", "coarse_shifts", "refine_shifts",
           "frame_turn", "row_delay"]


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


def _blank_finger_split(log_texture):
    """Otsu's threshold (Otsu 1979, via scikit-image) between frames without and with a
    finger on their log texture, or None when the two classes do not really separate
    (means less than 3x apart) or there are fewer than 4 frames."""
    from skimage.filters import threshold_otsu
    lt = np.asarray(log_texture, dtype=np.float64)
    if lt.size < 4 or not np.ptp(lt) > 0:
        return None
    th = float(threshold_otsu(lt))
    lo_c, hi_c = lt[lt <= th], lt[lt > th]
    if lo_c.size and hi_c.size and hi_c.mean() - lo_c.mean() > np.log(3.0):
        return th
    return None


def _contact_threshold(texture, floor):
    """Texture above which a frame shows the finger (``floor`` if the frames do not split into
    two classes, see :func:`_blank_finger_split`): partial contact counts, since texture power
    grows with the fraction of plates touched, so a frame is in contact above a small share of
    the full-contact excess power (90th percentile) over the blank level (5 %: fainter frames
    at the soft pad edge gave worse placements)."""
    texture = np.asarray(texture, dtype=np.float64)
    lt = np.log(texture + floor)
    th = _blank_finger_split(lt)
    if th is None:
        return floor
    l0 = float(np.exp(np.median(lt[lt <= th])))
    l1 = float(np.percentile(texture, 90))
    return float(np.sqrt(l0 ** 2 + 0.05 * max(l1 ** 2 - l0 ** 2, 0.0)))


def _novelty_weights(change, contact):
    """Per-frame weights in [0, 1] for the per-plate statistics: how much new finger a frame
    shows (``change``, e.g. its change from the frame before, or its travel), over half the
    90th percentile of that of the frames in ``contact`` (of all frames if none is)."""
    ref = np.percentile(change[contact], 90) if contact.any() else np.percentile(change, 90)
    return np.clip(change / max(0.5 * ref, 1e-12), 0.0, 1.0)


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
        Weights of the frames in the per-plate statistics. Default is None: each contact frame
        weighs by how much it changed from the previous one (clipped at half the 90th
        percentile), so a stall counts about once.

    Returns
    -------
    Prepared
    """
    x = np.asarray(frames)
    if x.dtype.kind not in "uif" or x.dtype.itemsize > 8:
        x = x.astype(np.float64)
    t_n, r_n = x.shape[0], x.shape[1]
    # Per-frame statistics in one compiled pass over the frames, in their own dtype.
    texture0, change = _frame_stats(x)
    # Per-plate median over time removes most of the fixed pattern robustly; what is left per
    # frame is finger texture plus temporal noise: its spread tells contact from no contact.
    # Texture within each frame (differences between neighbouring plates): ridge edges
    # dominate it when a finger is on, fixed pattern and noise when not. A measure relative
    # to each plate's median over time would call a long stall "no contact" (the median
    # then is the stalled finger).
    # Both axes: ridges running across the strip barely change from column to column.
    # Contact: texture well above the quietest frames (blank frames show only noise) and not
    # far below the typical frame. Frame differences are no noise estimate while the finger
    # moves, so only the texture spread itself is used.
    # Two classes (no finger / finger) by Otsu's threshold on log texture (Otsu 1979, via
    # scikit-image), used only when the classes really separate (means more than 3x apart);
    # otherwise every frame with any texture counts as contact.
    floor = 1e-9 * (max(abs(float(x.max())), abs(float(x.min()))) + 1.0)
    contact = texture0 > _contact_threshold(texture0, floor)
    w = contact.astype(np.float64)
    if frame_weights is None and t_n > 2:
        # A frame counts by how much new finger it shows: during a stall every frame repeats
        # the last, and an unweighted mean would turn the stalled finger into a static
        # "fixed pattern" that pulls every shift towards zero.
        change = np.concatenate([change[:1], change])
        # A stall's frames change by the temporal noise alone, which at low SNR is a good part
        # of a moving frame's change: where a fifth of the frames or more sit near the floor
        # (within 25 % of the 2nd percentile) and the moving ones clearly above it (90th
        # percentile 1.8 times the floor), only the change above the floor counts. Measured
        # on two simulated 14-18 dB swipes that stall for over a third of their frames: the
        # stalled texture left in the fixed pattern pulled fast mode's tracker as the finger
        # left (span error -7.5 % and -10.6 %, now -1.2 % and -1.9 %); the suite's figures stay
        # within 0.01 % (its low-SNR swipes change by noise alike: no separate floor).
        p2 = float(np.percentile(change, 2))
        if np.mean(change < 1.25 * p2) >= 0.2 and np.percentile(change, 90) >= 1.8 * p2:
            change = np.sqrt(np.maximum(change ** 2 - p2 ** 2, 0.0))
        w = w * _novelty_weights(change, contact)
    elif frame_weights is not None:
        w = w * np.asarray(frame_weights, dtype=np.float64)
    w_sum = w.sum()
    if w_sum <= 0:
        w = contact.astype(np.float64)
        w_sum = w.sum()
    if w_sum <= 0:                      # no finger anywhere: uniform weights, caller decides
        w = np.ones(t_n)
        w_sum = float(t_n)
    wn = w / w_sum
    blank = ~contact
    both = contact[1:] & contact[:-1]
    use_both = both.sum() >= 2
    mean_c, spread, blank_mean, pn = _plate_stats(x, wn, blank, both if use_both
                                                  else np.ones(max(t_n - 1, 0), dtype=bool))
    if blank.sum() >= 8:
        # Frames without a finger show the fixed pattern itself (plus noise).
        offset = blank_mean
        offset = offset - offset.mean() + mean_c.mean()
    else:
        # The mean over contact frames also holds the finger's average shape (the pad edge,
        # the texture each plate happened to see); a real fixed pattern varies from plate to
        # plate, so keep only the high-pass part of the mean.
        smooth = ndimage.gaussian_filter(mean_c, sigma=(min(2.0, r_n / 4.0), 4.0), mode="nearest")
        offset = mean_c - smooth + mean_c.mean()
    # Temporal noise per plate (pn, from _plate_stats): successive differences within contact
    # (noisy plates), or over all frames when fewer than two successive pairs are in contact.
    med_spread = float(np.median(spread))
    plate_ok = spread > 0.25 * med_spread                      # dead, stuck or never touched
    # Noisy plates: temporal change well above that of the plates that see texture (the upper
    # half by spread). Not the median over all plates: on a strip wider than the finger most
    # plates may see noise only, their median is the bare noise, and every plate under the
    # moving finger (whose frame-to-frame change is texture motion) looked noisy: an 8x400
    # strip whose finger covered half the columns kept 1829 of 3200 plates, lost its links
    # wherever under 45 % of it was touched, and came out 16 % long.
    upper = spread >= med_spread
    med_pn = float(np.median(pn[upper])) if upper.any() else float(np.median(pn))
    if med_pn > 0:
        plate_ok &= pn < 4.0 * med_pn + 1e-12
    # Gain: a plate's spread relative to the others, but only where the spread is texture.
    # No per-plate gain here: the texture spread a plate saw differs from its neighbours' by
    # more than a real gain mismatch (a few %), so dividing by it would add a static pattern.
    # Gains are fitted against the fused image later (pipeline._refit_fixed_pattern).
    gain = np.ones_like(spread)
    scale = max(med_spread, 1e-12)
    z, texture = _normalise(x, offset, gain * scale, plate_ok)
    noise_sigma = float(np.median(pn[plate_ok]) / scale) if plate_ok.any() else 0.0
    return Prepared(z=z, plate_ok=plate_ok, offset=offset, gain=gain * scale, contact=contact,
                    texture=texture, noise_sigma=noise_sigma)


def _frame_stats(x):
    """Per frame: RMS difference of neighbouring plates (both axes, summed in quadrature) and
    RMS change from the previous frame (T - 1 values)."""
    # Frames of at most 16-bit integers: each row summed in single precision (8-bit: every
    # partial sum an integer under 2^24, so exact; twice as fast), the rows in double.
    single = x.dtype.kind in "ui" and x.dtype.itemsize <= 2
    return _frame_stats_rows(x, np.float32(0.0) if single else 0.0)


@numba.njit(**JIT)
def _frame_stats_rows(x, zero):
    """:func:`_frame_stats` with each row's sums in the type of ``zero`` (rows as views
    indexed from 0: vectorised)."""
    t_n, r_n, c_n = x.shape
    tex = np.zeros(t_n)
    chg = np.zeros(max(t_n - 1, 0))
    for t in range(t_n):
        s1 = 0.0
        s0 = 0.0
        sc = 0.0
        for r in range(r_n):
            xr = x[t, r]
            x1 = xr[1:]
            a1 = zero
            for c in range(c_n - 1):
                d = (zero + x1[c]) - (zero + xr[c])
                a1 += d * d
            s1 += a1
            if r + 1 < r_n:
                xn = x[t, r + 1]
                a0 = zero
                for c in range(c_n):
                    d = (zero + xn[c]) - (zero + xr[c])
                    a0 += d * d
                s0 += a0
            if t > 0:
                xp = x[t - 1, r]
                ac = zero
                for c in range(c_n):
                    d = (zero + xr[c]) - (zero + xp[c])
                    ac += d * d
                sc += ac
        m1 = s1 / max(r_n * (c_n - 1), 1)
        m0 = s0 / max((r_n - 1) * c_n, 1)
        tex[t] = np.sqrt(m1 + m0)
        if t > 0:
            chg[t - 1] = np.sqrt(sc / (r_n * c_n))
    return tex, chg


@numba.njit(**JIT)
def _plate_stats(x, wn, blank, pairs_used):
    """Per plate: weighted mean and spread over time (weights wn, summing to 1), mean over the
    blank frames, and temporal noise sqrt(mean(diff^2) / 2) over the successive pairs used."""
    t_n, r_n, c_n = x.shape
    mean = np.zeros((r_n, c_n))
    for t in range(t_n):
        if wn[t] == 0.0:
            continue
        for r in range(r_n):
            for c in range(c_n):
                mean[r, c] += wn[t] * float(x[t, r, c])
    var = np.zeros((r_n, c_n))
    bsum = np.zeros((r_n, c_n))
    n_blank = 0
    for t in range(t_n):
        wt = wn[t]
        if blank[t]:
            n_blank += 1
        for r in range(r_n):
            for c in range(c_n):
                v = float(x[t, r, c])
                if wt != 0.0:
                    d = v - mean[r, c]
                    var[r, c] += wt * d * d
                if blank[t]:
                    bsum[r, c] += v
    d2 = np.zeros((r_n, c_n))
    n_p = 0
    for t in range(t_n - 1):
        if not pairs_used[t]:
            continue
        n_p += 1
        for r in range(r_n):
            for c in range(c_n):
                d = float(x[t + 1, r, c]) - float(x[t, r, c])
                d2[r, c] += d * d
    spread = np.sqrt(var)
    bmean = bsum / max(n_blank, 1)
    pn = np.sqrt(d2 / max(n_p, 1) / 2.0)
    return mean, spread, bmean, pn


@numba.njit(**JIT)
def _normalise(x, offset, scale, plate_ok):
    """z = (x - offset) / scale as float32 (0 on bad plates) and each frame's RMS over the
    good plates."""
    t_n, r_n, c_n = x.shape
    z = np.zeros((t_n, r_n, c_n), dtype=np.float32)
    tex = np.zeros(t_n)
    n_ok = 0
    for r in range(r_n):
        for c in range(c_n):
            if plate_ok[r, c]:
                n_ok += 1
    # multiply by the inverse (0 on bad plates) rather than divide: no branch, no division
    inv = np.zeros((r_n, c_n))
    for r in range(r_n):
        for c in range(c_n):
            if plate_ok[r, c]:
                inv[r, c] = 1.0 / scale[r, c]
    for t in range(t_n):
        s = 0.0
        for r in range(r_n):
            for c in range(c_n):
                v = np.float32((float(x[t, r, c]) - offset[r, c]) * inv[r, c])
                z[t, r, c] = v
                s += float(v) * float(v)
        tex[t] = np.sqrt(s / n_ok) if n_ok > 0 else 0.0
    return z, tex


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
                  chunk=2048, return_surfaces=False):
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
    surfaces = np.zeros((p_n, len(d), len(e)), dtype=np.float32) if return_surfaces else None
    for s in range(0, p_n, chunk):
        pi = pairs[s:s + chunk, 0]
        pj = pairs[s:s + chunk, 1]
        # Spectra of this chunk's frames only, so memory does not grow with the swipe.
        used, inv = np.unique(pairs[s:s + chunk].ravel(), return_inverse=True)
        fz = sfft.rfft2(zn[used], s=(n_r, n_c), axes=(1, 2), workers=1).astype(np.complex64)
        inv = inv.reshape(-1, 2)
        # corr[d, e] = sum A[r + d, c + e] B[r, c]  (A = frame i, B = frame j)
        corr = sfft.irfft2(fz[inv[:, 0]] * np.conj(fz[inv[:, 1]]), s=(n_r, n_c), axes=(1, 2),
                           workers=1)
        surf = corr[:, d % n_r][:, :, e % n_c] / n_ov[None]
        if surfaces is not None:
            surfaces[s:s + chunk] = surf
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
    if return_surfaces:
        return shift, score, nsel, surfaces
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


_PAD = 2  # samples of Keys boundary extension around each upsampled frame


def _keys_weights(frac):
    """Cubic convolution weights (Keys 1981, a = -1/2) for taps at -1, 0, 1, 2."""
    f = frac
    f2 = f * f
    f3 = f2 * f
    return (-0.5 * f3 + f2 - 0.5 * f,
            1.5 * f3 - 2.5 * f2 + 1.0,
            -1.5 * f3 + 2.0 * f2 + 0.5 * f,
            0.5 * f3 - 0.5 * f2)


def _keys_extend(z, axes=(1, 2)):
    """Pad by two samples per side along ``axes`` with Keys' boundary condition.

    f(-1) = 3 f(0) - 3 f(1) + f(2) (Keys 1981, eq. 25) keeps the kernel third-order accurate
    up to the edge; a mirror or spline boundary would distort every row of a short frame.
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
    for ax in axes:
        z = ext(z, ax)
    return z


@functools.lru_cache(maxsize=64)
def _lagrange_upsample_matrix(n, taps=6, symmetric=False):
    """(2n-1, n) matrix that doubles the sampling of a length-n signal.

    Samples at the original points are kept; mid-points come from the Lagrange polynomial
    through the ``taps`` nearest samples. For 6 taps in the interior this is the classic
    [3, -25, 150, 150, -25, 3]/256 half-sample filter. Near the ends the window is shifted
    inwards (nothing extrapolated), or with ``symmetric`` it shrinks instead, centred on the
    mid-point (4 taps next to the end pair, 2 at it), so that every mid-point filter is
    symmetric and has no phase error.

    A window shifted inwards extrapolates a ridge's phase at the frame's edge rows:
    registrations whose overlap lies within three rows of an edge (every frame against its
    key on an 8-row strip) read along shifts long, +0.03 px at half-pixel shifts on
    scikit-image's camera photograph swiped over 8x192, +0.06 px at 4.5 px (the key-frame
    tracker takes the symmetric windows; see stripstitch.track).
    """
    k = min(taps, n)
    m = np.zeros((2 * n - 1, n))
    m[0::2, :] = np.eye(n)
    for i in range(n - 1):
        x = i + 0.5
        if symmetric:
            kk = min(k - k % 2, 2 * min(i + 1, n - 1 - i))
            lo = i + 1 - kk // 2
        else:
            kk = k
            lo = int(np.clip(np.floor(x) - (k // 2 - 1), 0, n - k))
        nodes = np.arange(lo, lo + kk, dtype=np.float64)
        for a, xa in enumerate(nodes):
            others = np.delete(nodes, a)
            m[2 * i + 1, lo + a] = np.prod((x - others) / (xa - others))
    m.flags.writeable = False          # cached and shared: callers copy (astype)
    return m


class _Atlas:
    """Frames upsampled twice in both axes (Lagrange, 6 taps), then Keys-extended.

    Interpolating the twice-denser grid with cubic convolution has about eight times less
    phase error at the ridge frequency than interpolating the frames themselves (the kernel's
    error grows as the cube of frequency in cycles per sample), which is what keeps the
    shift estimates free of a fractional-position bias.
    """

    def __init__(self, z):
        t_n, r_n, c_n = z.shape
        mr = _lagrange_upsample_matrix(r_n).astype(np.float32)   # cached; astype copies
        mc = _lagrange_upsample_matrix(c_n).astype(np.float32)
        # Two large matrix products (rows, then columns) rather than T small ones.
        zr = np.tensordot(mr, z.astype(np.float32), axes=(1, 1))           # (2R-1, T, C)
        up = (zr.reshape(-1, c_n) @ mc.T).reshape(2 * r_n - 1, t_n, -1).transpose(1, 0, 2)
        self.u = _keys_extend(up)                   # (T, 2R-1+4, 2C-1+4) float32
        self.r_n, self.c_n = r_n, c_n


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


def _column_blocks(c_n, n_blocks):
    edges = np.linspace(0, c_n, n_blocks + 1).round().astype(np.int64)
    return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:]) if b > a]


def refine_shifts(prep, pairs, init_shift, *, init_angle=None, estimate_rotation=True,
                  iterations=3, atlas=None, grads=None, chunk=512, smooth_first=None,
                  prior_px=0.5):
    """Refine pairwise shifts by inverse-compositional Gauss-Newton (Lucas-Kanade).

    For each pair (i, j), with B = frame j on its own pixel grid and A = frame i, minimise
    ``sum_u w(u) [A(delta + Rot(theta) u) - (1 + g) B(u) - b]^2`` over the shift ``delta``,
    rotation ``theta``, gain ``g`` and offset ``b``.

    * A is sampled by cubic convolution (Keys) on a twice-upsampled copy of the frame, which
      keeps the interpolation phase error (a bias that depends on the fractional shift) below
      about 1e-3 px for ridge periods near 9 px.
    * The Jacobian uses B's own central differences (inverse compositional form), which share
      no noise with the residual (a gradient through the residual's own sample biases the
      estimate towards zero shift) and are computed once.
    * Rotation: the strip is split into column blocks, each sampled with the along-swipe
      offset of its own centre; what is left of the rotation inside a block is carried to
      first order in the residual and the Jacobian.
    * All pair-blocks with the same integer offset are interpolated together by strided
      slicing, so the cost is a few multiply-adds per sample.

    Parameters
    ----------
    prep : Prepared
    pairs : (P, 2) int
    init_shift : (P, 2) float
        Starting shifts (within about a third of a ridge period of the truth).
    init_angle : (P,) float, optional
        Starting rotations in radians. Default zeros.
    estimate_rotation : bool
        Estimate theta (else held at ``init_angle``). Default is True.
    iterations : int
        Gauss-Newton iterations. Default is 3. With the rotation free and only a few rows
        overlapping at the strip's edge, the rotation's across term is nearly the across
        shift and convergence is linear (3 of 8 rows, a start 0.17 px off: 0.030 px along
        after 4 iterations, 0.007 after 8); the library's own callers hold the rotation.
    prior_px : float or None
        Standard deviation of a weak Gaussian prior of the shift around its start, so that
        along an ambiguous direction (ridges parallel to the shift: the aperture problem) the
        estimate stays at its start instead of wandering; the returned information excludes
        it. Default is 0.5. None disables it.

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
    pairs = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    p_n = len(pairs)
    sh = np.array(init_shift, dtype=np.float64).reshape(p_n, 2).copy()
    th = np.zeros(p_n) if init_angle is None else np.array(init_angle, dtype=np.float64).copy()
    if atlas is None:
        atlas = _Atlas(z)
    if grads is None:
        grads = _template_gradients(z)
    g0_all, g1_all = grads
    up = atlas.u
    okf = prep.plate_ok.astype(np.float32)
    rc = (np.arange(r_n) - (r_n - 1) / 2.0).astype(np.float32)
    cc = (np.arange(c_n) - (c_n - 1) / 2.0).astype(np.float32)
    n_par = 5 if estimate_rotation else 4
    blocks = _column_blocks(c_n, max(1, min(8, c_n // 48)) if estimate_rotation else 1)
    ia_all, ib_all = pairs[:, 0], pairs[:, 1]
    hess = np.zeros((p_n, n_par, n_par))
    grad = np.zeros((p_n, n_par))
    # A ~ (1 + gamma) B: A's gradient is (1 + gamma) times B's, so the geometric columns are
    # scaled by the gain found in the previous iteration (else a brighter frame converges slowly).
    gscale = np.ones(p_n, dtype=np.float32)
    sh0 = sh.copy()
    for it in range(max(1, iterations)):
        last = it == max(1, iterations) - 1
        hess[:] = 0.0
        grad[:] = 0.0
        rr_it = np.zeros(p_n)
        nv_it = np.zeros(p_n)
        if last:
            bw = max(4, c_n // 16)
            n_blk = -(-c_n // bw)
            gblk = np.zeros((p_n, n_blk, n_par))
            hblk = np.zeros((p_n, n_blk, n_par, n_par))
            rr = np.zeros(p_n)
            nv = np.zeros(p_n)
            sa = np.zeros(p_n)
            sb = np.zeros(p_n)
            saa = np.zeros(p_n)
            sbb = np.zeros(p_n)
            sab = np.zeros(p_n)
        for c0, c1 in blocks:
            ucb = float(cc[c0:c1].mean())
            off0 = sh[:, 0] - th * ucb
            off1 = sh[:, 1]
            k0 = np.floor(2.0 * off0).astype(np.int64)
            k1 = np.floor(2.0 * off1).astype(np.int64)
            f0 = 2.0 * off0 - k0
            f1 = 2.0 * off1 - k1
            keys = (k0 + 4096) * 8192 + (k1 + 4096)
            order = np.argsort(keys, kind="stable")
            uk, starts = np.unique(keys[order], return_index=True)
            bounds = list(starts) + [len(order)]
            for g in range(len(uk)):
                members = order[bounds[g]:bounds[g + 1]]
                kk0 = int(k0[members[0]])
                kk1 = int(k1[members[0]])
                # B rows/columns whose A position (with any fraction) lies inside A.
                i_lo = max(0, -(kk0 // 2))
                i_hi = min(r_n - 1, (2 * r_n - 3 - kk0) // 2)
                j_lo = max(c0, -(kk1 // 2))
                j_hi = min(c1 - 1, (2 * c_n - 3 - kk1) // 2)
                if i_hi < i_lo or j_hi < j_lo:
                    continue
                ni, nj = i_hi - i_lo + 1, j_hi - j_lo + 1
                rs0 = 2 * i_lo + kk0 - 1 + _PAD
                rs1 = 2 * i_hi + kk0 + 2 + _PAD + 1
                cs0 = 2 * j_lo + kk1 - 1 + _PAD
                cs1 = 2 * j_hi + kk1 + 2 + _PAD + 1
                # Plates of A under the samples must be good as well as those of B.
                ra = np.clip(np.arange(i_lo, i_hi + 1) + (kk0 + 1) // 2, 0, r_n - 1)
                ca = np.clip(np.arange(j_lo, j_hi + 1) + (kk1 + 1) // 2, 0, c_n - 1)
                wmask = okf[i_lo:i_hi + 1, j_lo:j_hi + 1] * okf[np.ix_(ra, ca)]
                u0v = rc[i_lo:i_hi + 1, None]
                u1v = cc[None, j_lo:j_hi + 1]
                for s in range(0, len(members), chunk):
                    mem = members[s:s + chunk]
                    m = len(mem)
                    sub = up[ia_all[mem], rs0:rs1, cs0:cs1]
                    wc = _keys_weights(f1[mem].astype(np.float32))
                    tmp = wc[0][:, None, None] * sub[:, :, 0:2 * nj - 1:2]
                    for a in range(1, 4):
                        tmp += wc[a][:, None, None] * sub[:, :, a:a + 2 * nj - 1:2]
                    wr = _keys_weights(f0[mem].astype(np.float32))
                    av = wr[0][:, None, None] * tmp[:, 0:2 * ni - 1:2]
                    for a in range(1, 4):
                        av += wr[a][:, None, None] * tmp[:, a:a + 2 * ni - 1:2]
                    ib = ib_all[mem]
                    bv = z[ib, i_lo:i_hi + 1, j_lo:j_hi + 1]
                    gb0 = g0_all[ib, i_lo:i_hi + 1, j_lo:j_hi + 1]
                    gb1 = g1_all[ib, i_lo:i_hi + 1, j_lo:j_hi + 1]
                    tm = th[mem].astype(np.float32)[:, None, None]
                    # Rotation inside the block, to first order: true A position minus the
                    # one sampled is (-theta (u1 - u1_block), theta u0).
                    av = av - tm * gb0 * (u1v - ucb) + tm * gb1 * u0v
                    r0 = (av - bv) * wmask
                    gs = gscale[mem][:, None, None]
                    cols = [gs * gb0, gs * gb1]
                    if estimate_rotation:
                        cols.append(gs * (gb1 * u0v - gb0 * u1v))
                    cols += [bv, np.broadcast_to(np.float32(1.0), bv.shape)]
                    jac = np.stack([c * wmask for c in cols], axis=1).reshape(m, n_par, -1)
                    r0f = r0.reshape(m, -1)
                    rr_it[mem] += np.einsum("mn,mn->m", r0f, r0f)
                    nv_it[mem] += float(wmask.sum())
                    hess[mem] += np.matmul(jac, np.transpose(jac, (0, 2, 1)))
                    grad[mem] += np.matmul(jac, r0f[..., None])[..., 0]
                    if last:
                        # Scores and Hessians per block of columns, for the cluster-robust
                        # (sandwich) covariance below.
                        jac4 = jac.reshape(m, n_par, ni, nj)
                        r4 = r0f.reshape(m, ni, nj)
                        bid = (np.arange(j_lo, j_hi + 1) // bw).astype(np.int64)
                        starts = np.flatnonzero(np.r_[True, bid[1:] != bid[:-1]])
                        gcol = np.einsum("mpij,mij->mpj", jac4, r4)
                        hcol = np.einsum("mpij,mqij->mpqj", jac4, jac4)
                        bsel = bid[starts]
                        gblk[mem[:, None], bsel[None, :]] += np.transpose(
                            np.add.reduceat(gcol, starts, axis=2), (0, 2, 1))
                        hblk[mem[:, None], bsel[None, :]] += np.transpose(
                            np.add.reduceat(hcol, starts, axis=3), (0, 3, 1, 2))
                        wsum = float(wmask.sum())
                        rr[mem] += np.einsum("mn,mn->m", r0f, r0f)
                        nv[mem] += wsum
                        af = (av * wmask).reshape(m, -1)
                        bf = (bv * wmask).reshape(m, -1)
                        sa[mem] += af.sum(1)
                        sb[mem] += bf.sum(1)
                        saa[mem] += np.einsum("mn,mn->m", af, af)
                        sbb[mem] += np.einsum("mn,mn->m", bf, bf)
                        sab[mem] += np.einsum("mn,mn->m", af, bf)
        tr = np.trace(hess, axis1=1, axis2=2)[:, None, None] + 1e-12
        hreg = hess + np.eye(n_par)[None] * 1e-9 * tr
        gtot = grad
        if prior_px is not None and it > 0:
            # Prior precision in the Hessian's units: residual variance after the previous
            # iteration's fit / prior variance (none in the first iteration, whose residual
            # still holds the misalignment).
            lam = var_prev / prior_px ** 2
            hreg = hreg.copy()
            hreg[:, 0, 0] += lam
            hreg[:, 1, 1] += lam
            gtot = grad.copy()
            gtot[:, :2] += lam[:, None] * (sh - sh0)
        step = -np.linalg.solve(hreg, gtot[..., None])[..., 0]
        if last:
            # Residual sum of squares at the least-squares minimum: r'r - g' H^-1 g.
            rss = np.maximum(rr + np.einsum("mp,mp->m", grad, step), 0.0)
        var_prev = np.maximum(rr_it + np.einsum("mp,mp->m", grad, -np.linalg.solve(
            hess + np.eye(n_par)[None] * 1e-9 * tr, grad[..., None])[..., 0]), 0.0) \
            / np.maximum(nv_it - n_par, 1.0)
        gscale = np.clip(1.0 - step[:, n_par - 2], 0.1, 10.0).astype(np.float32)
        sh += np.clip(step[:, :2], -1.0, 1.0)
        if estimate_rotation:
            th += np.clip(step[:, 2], -0.02, 0.02)

    dof = np.maximum(nv - n_par, 1.0)
    var = rss / dof
    # Covariance of all parameters. White noise alone gives var * H^-1, but the residual of a
    # sharp-edged, aliased texture is structured: it repeats along the ridges, and where the
    # ridges run straight over the strip (the aperture problem) it projects onto the weak
    # direction far more than white noise would. The cluster-robust (sandwich) estimate
    # H^-1 (sum_b g_b g_b^T) H^-1 over blocks of columns, with g_b each block's score at the
    # solution, sees that; a quarter of the white-noise covariance is kept as a floor.
    eye = lambda n: np.eye(n)[None] * 1e-9 * (np.trace(hess, axis1=1, axis2=2)[:, None, None] + 1e-12)
    hinv = np.linalg.inv(hess + eye(n_par))
    gfin = gblk + np.einsum("mbpq,mq->mbp", hblk, step)
    meat = np.einsum("mbp,mbq->mpq", gfin, gfin)
    cov = hinv @ meat @ hinv + 0.25 * var[:, None, None] * hinv
    cov = 0.5 * (cov + np.transpose(cov, (0, 2, 1)))
    with np.errstate(invalid="ignore", over="ignore"):
        info = np.linalg.inv(cov[:, :2, :2] + eye(2) * 1e-12)
    if estimate_rotation:
        ainfo = 1.0 / np.maximum(cov[:, 2, 2], 1e-30)
    else:
        ainfo = np.zeros(p_n)
    nn = np.maximum(nv, 1.0)
    cov_ab = sab - sa * sb / nn
    var_a = saa - sa * sa / nn
    var_b = sbb - sb * sb / nn
    ncc = cov_ab / np.sqrt(np.maximum(var_a * var_b, 1e-24))
    okp = (nv >= max(16, 0.5 * c_n)) & np.isfinite(sh).all(1) & np.isfinite(info).all((1, 2))
    info[~okp] = 0.0
    ainfo[~okp] = 0.0
    # Noise sits in both frames; the residual variance is about twice one frame's.
    return PairEstimates(pairs=pairs, shift=sh, angle_rad=th, info=info, angle_info=ainfo,
                         sigma=np.sqrt(var / 2.0), n_valid=nv.astype(np.int64), ncc=ncc, ok=okp)


def frame_turn(frame_a, frame_b, plate_ok, shift_px, *, max_deg=6.0, step_deg=0.25):
    """In-plane turn of one frame against another over the same patch of finger.

    Finds the rotation d (degrees, about the frame centre) and shift s (px) with
    ``frame_b(u) ~ g frame_a(R(d) u + s) + o`` (u: plate offsets from the centre; gain g and
    offset o free): a grid search over d with s fixed at ``shift_px``, then a joint
    least-squares fit of (s, d, g, o) on frame_a's cubic spline.

    Parameters
    ----------
    frame_a, frame_b : (R, C) ndarray
        Prepared frames (fixed pattern removed), e.g. the first and last frames of a stall.
    plate_ok : (R, C) bool ndarray
        Plates to use.
    shift_px : (2,) array_like
        Starting shift (along, across), px.
    max_deg, step_deg : float
        Range and step of the grid search. Defaults 6 and 0.25 (the fit takes it from there:
        0.25 degrees moves the plates at the ends of a 192-column strip by 0.4 px).

    Returns
    -------
    turn_deg : float
    shift_px : (2,) ndarray
    cost_gain : float
        Residual sum of squares with the turn held at 0 (shift, gain and offset refitted)
        over the one with it free, minus 1: how much the turn explains.

    References
    ----------
    .. [1] M. Unser, "Splines: a perfect fit for signal and image processing", IEEE Signal
           Processing Magazine 16(6), 22-38 (1999) (cubic spline interpolation).
    """
    from scipy import optimize

    za = check_array(frame_a, name="frame_a", shape=(None, None))
    zb = check_array(frame_b, name="frame_b", shape=za.shape)
    if np.shape(plate_ok) != za.shape:
        raise ValueError(f"plate_ok must have the frames' shape {za.shape}; got {np.shape(plate_ok)}")
    ok = np.asarray(plate_ok, dtype=bool)
    shift_px = check_array(shift_px, name="shift_px", shape=(2,))
    r_n, c_n = za.shape
    if r_n < 4 or c_n < 8:
        raise ValueError(f"frame_a must have at least 4 rows and 8 columns; got {za.shape}")
    cf = np.array([(r_n - 1) / 2.0, (c_n - 1) / 2.0])
    u0, u1 = np.meshgrid(np.arange(r_n) - cf[0], np.arange(c_n) - cf[1], indexing="ij")
    spl = ndimage.spline_filter(np.where(ok, za, 0.0), order=3)

    def sample(p0, p1, deg):
        t = np.radians(deg)
        c, s = np.cos(t), np.sin(t)
        q0 = cf[0] + p0 + c * u0 - s * u1
        q1 = cf[1] + p1 + s * u0 + c * u1
        inside = (q0 >= 1) & (q0 <= r_n - 2) & (q1 >= 1) & (q1 <= c_n - 2) & ok
        return ndimage.map_coordinates(spl, [q0, q1], order=3, prefilter=False, mode="nearest"), inside

    def ncc(deg):
        a, w = sample(shift_px[0], shift_px[1], deg)
        if w.sum() < 0.1 * w.size:
            return -1.0
        a = a[w] - a[w].mean()
        b = zb[w] - zb[w].mean()
        den = np.sqrt((a * a).sum() * (b * b).sum())
        return float((a * b).sum() / den) if den > 0 else -1.0

    grid = np.arange(-max_deg, max_deg + 1e-9, step_deg)
    start = float(grid[int(np.argmax([ncc(d) for d in grid]))])

    # The plates compared stay fixed during the fit (a mask that followed the parameters
    # would make the residual jump as plates cross the border): those inside with half a
    # pixel to spare at the starting turn and shift.
    t0 = np.radians(start)
    q0 = cf[0] + shift_px[0] + np.cos(t0) * u0 - np.sin(t0) * u1
    q1 = cf[1] + shift_px[1] + np.sin(t0) * u0 + np.cos(t0) * u1
    keep = (q0 >= 1.5) & (q0 <= r_n - 2.5) & (q1 >= 1.5) & (q1 <= c_n - 2.5) & ok

    def resid(p, turn):
        a, _ = sample(p[0], p[1], p[2] if turn is None else turn)
        return np.where(keep, p[-2] * a + p[-1] - zb, 0.0).ravel()

    # Tolerances of a thousandth of a degree / pixel: the turn is wanted to a few hundredths.
    opts = dict(xtol=1e-6, ftol=1e-6, max_nfev=100)
    free = optimize.least_squares(lambda p: resid(p, None), [shift_px[0], shift_px[1], start, 1.0, 0.0],
                                  x_scale=[0.1, 0.1, 0.1, 0.01, 0.01], **opts)
    held = optimize.least_squares(lambda p: resid(np.r_[p[:2], 0.0, p[2:]], 0.0),
                                  [shift_px[0], shift_px[1], 1.0, 0.0], x_scale=[0.1, 0.1, 0.01, 0.01],
                                  **opts)
    gain = float(np.sum(held.fun ** 2) / max(np.sum(free.fun ** 2), 1e-300) - 1.0)
    return float(free.x[2]), free.x[:2].copy(), gain


def coarse_chain(zn, pairs, *, max_along, max_across, pool=8, penalty=0.005):
    """Coarse shifts of successive frames, pooling evidence over neighbouring pairs.

    Where ridges run straight over the whole strip, a single pair's correlation surface is
    flat along the ridges (the aperture problem) and its peak is a guess. At kHz frame rates
    the finger's velocity hardly changes over a few frames, so the surfaces of the
    ``2 * pool + 1`` neighbouring pairs are averaged and each pair's coarse shift is the
    pooled peak (parabolic sub-pixel fit), with a small quadratic penalty on sideways motion
    (``penalty`` NCC units per px^2: a finger drifts sideways far less than it travels, and
    the penalty decides only between nearly equal peaks). The Gauss-Newton refinement then
    starts from there.

    Returns
    -------
    shift : (P, 2) float64
    score : (P,) float64
        The pair's own NCC at the chosen integer shift.
    pooled_score : (P,) float64
        The pooled NCC at the peak.
    """
    _, _, _, surf = coarse_shifts(zn, pairs, max_along=max_along, max_across=max_across,
                                  return_surfaces=True)
    p_n = len(pairs)
    r_n, c_n = zn.shape[1], zn.shape[2]
    d = np.arange(-max_along, max_along + 1)
    e = np.arange(-max_across, max_across + 1)
    n_ov = (r_n - np.abs(d))[:, None] * (c_n - np.abs(e))[None, :]
    lcb_pen = (2.0 / np.sqrt(n_ov)).astype(np.float32)
    pooled = ndimage.uniform_filter1d(surf, 2 * pool + 1, axis=0, mode="nearest") if pool > 0 \
        else surf
    # Penalised peak on the pooled surface upsampled 4x by cubic interpolation, within +-3 px
    # of the penalised lattice peak: with oblique ridges the correlation is a ridge line
    # between lattice points, and the best point on it (least sideways motion) is rarely a
    # lattice point.
    score_s = pooled - lcb_pen[None]
    side = (penalty * e.astype(np.float32) ** 2)[None, None, :]
    k = np.argmax((score_s - side).reshape(p_n, -1), axis=1)
    kd, ke = np.unravel_index(k, surf.shape[1:])
    idx = np.arange(p_n)
    w = 3
    od = np.arange(-w, w + 1)
    ii = np.clip(kd[:, None] + od[None, :], 0, len(d) - 1)            # (P, 7)
    jj = np.clip(ke[:, None] + od[None, :], 0, len(e) - 1)
    patch = score_s[idx[:, None, None], ii[:, :, None], jj[:, None, :]]  # (P, 7, 7)
    up = 4
    fine = ndimage.zoom(patch, (1, up, up), order=3, mode="nearest", grid_mode=False)
    fo = np.linspace(-w, w, fine.shape[1])
    fd = d[kd][:, None] + fo[None, :]                                   # (P, F)
    fe = e[ke][:, None] + fo[None, :]
    # positions clipped at the surface's edge are not valid candidates
    valid_d = (fd >= d[0]) & (fd <= d[-1])
    valid_e = (fe >= e[0]) & (fe <= e[-1])
    fine = fine - (penalty * fe ** 2)[:, None, :].astype(np.float32)
    fine = np.where(valid_d[:, :, None] & valid_e[:, None, :], fine, -np.inf)
    kk = np.argmax(fine.reshape(p_n, -1), axis=1)
    kfd, kfe = np.unravel_index(kk, fine.shape[1:])
    shift = np.stack([fd[idx, kfd], fe[idx, kfe]], 1)
    # The upsampled grid (4 (2 w + 1) samples over the patch) holds no whole-pixel shift: its
    # nearest to zero are +-0.111 px, where a stall's peak lies. The lattice points compete
    # with it: a pair at a whole-pixel peak starts there. (A stall on a 6x128 strip read
    # (0.111, -0.111) per pair and, the refinement holding its start along the ridges,
    # drifted 14 px across over 240 frames.)
    lat = patch - (penalty * e[jj].astype(np.float32) ** 2)[:, None, :]
    lat_ok = ((kd[:, None] + od[None, :] >= 0) & (kd[:, None] + od[None, :] < len(d)))[:, :, None] \
        & ((ke[:, None] + od[None, :] >= 0) & (ke[:, None] + od[None, :] < len(e)))[:, None, :]
    lat = np.where(lat_ok, lat, -np.inf)
    kl = np.argmax(lat.reshape(p_n, -1), axis=1)
    kld, kle = np.unravel_index(kl, lat.shape[1:])
    # Not on strips of 2 rows: their along steps come from the row delay, and a pair
    # overlapping by a row or less is so weakly determined that the refinement can run off
    # from any start (the suite's 2-row swipe, a faint pair as the finger leaves: from zero
    # it stepped to -1.04 px along, where nothing overlaps, and the failed link read as a
    # gap; from the old grid's 0.111 it held at -0.68 against a true +0.74).
    use_lat = (lat[idx, kld, kle] > fine[idx, kfd, kfe]) & (r_n >= 3)
    shift[use_lat] = np.stack([d[ii[idx, kld]], e[jj[idx, kle]]], 1)[use_lat]
    id0 = np.clip(np.rint(shift[:, 0]).astype(int) - d[0], 0, len(d) - 1)
    ie0 = np.clip(np.rint(shift[:, 1]).astype(int) - e[0], 0, len(e) - 1)
    return shift, surf[idx, id0, ie0].astype(np.float64), pooled[idx, id0, ie0].astype(np.float64)


# --------------------------------------------------------------------------------------
# Speed from the delay between neighbouring rows (strips of very few rows)
# --------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class RowDelay:
    """Speed read from the delay between neighbouring rows (see :func:`row_delay`).

    Attributes
    ----------
    along_px : (T,) float64
        Speed along the swipe, sensor pixels per frame period (NaN where not valid).
    across_px : (T,) float64
        Speed across the swipe, pixels per frame period (NaN where not valid).
    time : (T,) float64
        Time (in frame periods, frame 0 at 0) the estimate refers to: the middle of the frames
        it was read from.
    ncc : (T,) float64
        Normalised correlation at the delay found.
    valid : (T,) bool
    """

    along_px: np.ndarray
    across_px: np.ndarray
    time: np.ndarray
    ncc: np.ndarray
    valid: np.ndarray


def _padded_cumsum(x, pad):
    """Cumulative sums of ``x`` (..., T) along the last axis with a leading zero, padded by
    ``pad`` copies of the first (zero) and last values on either side (see _window_sums)."""
    t_n = x.shape[-1]
    c = np.zeros(x.shape[:-1] + (t_n + 1 + 2 * pad,))
    np.cumsum(x, axis=-1, out=c[..., pad + 1:pad + 1 + t_n])
    c[..., pad + 1 + t_n:] = c[..., pad + t_n:pad + t_n + 1]
    return c


def _window_sums(c, width, t_n, pad):
    """Sums over windows of ``width`` samples starting at t - width // 2 (zero outside), from
    the padded cumulative sums ``c`` of :func:`_padded_cumsum` (two shifted views)."""
    a = pad - width // 2
    return c[..., a + width:a + width + t_n] - c[..., a:a + t_n]


# A delay peak whose weaker neighbour correlates under this share of its height is placed
# by the cosine fit rather than the Gaussian one (see row_delay). At 0.5 the Gaussian fit's
# better readings of broad peaks were lost on two simulated swipes (a 5x300 arch +0.02 ->
# +0.11 % of span); at 0.3 they kept every reading of bench_geometry.py but the fast ones.
_NARROW_PEAK = 0.3


# Penalty (correlation per px^2) on the across offset of the delay's peak away from the
# swipe's line (row_delay's across_slope). Where ridges run straight over a strip of a few
# rows, the correlation over (delay, across offset) is a valley along the ridges, flat to
# within the noise, and its peak slid along it: an across offset of 0.3 px too many read
# the speed 26 % too fast (a 3x192 strip at 6 kHz; bench_geometry.py --seed 301). The
# penalty only decides between nearly equal peaks, as coarse_chain's does. Measured with the
# line from a first, unguided reading (pipeline._delay_along) on simulated swipes drawn at
# random (30 per row count, 2-8 kHz, 96-256 columns, 0.1-0.65 (R - 1) px per frame, 15-40
# dB, six pattern classes, a quarter with a stall; span error median / mean / worst, %):
# 2 rows 0.77 / 1.93 / 14.5 -> 0.69 / 1.53 / 10.2; 3 rows (with bench_rows.py's ten) 0.42
# / 1.98 / 31.4 -> 0.41 / 0.94 / 5.8, another 40 1.03 / 3.94 / 36.3 -> 0.57 / 3.53 / 36.3;
# 4 rows 0.63 / 1.74 / 12.5 -> 0.62 / 1.68 / 10.8; 5 rows 0.72 / 3.53 / 24.5 -> 0.65 /
# 3.19 / 22.8 (at 0.0005 and 0.002 much the same). bench_rows.py within 0.01 % but three:
# 2 rows at 150 mm/s and 4 kHz -2.97 -> -3.52 %, 2 rows turning 3 degrees -1.03 -> -0.78,
# 3 rows human 0.31 -> 0.25; bench_geometry.py a 4x160 strip +0.07 -> -0.19 %, its seed
# 301 the 3x192 strip above +7.66 -> +1.54 % and a 5x300 -0.52 -> -0.21 %.
_DELAY_ACROSS_PENALTY = 0.001


def row_delay(z, plate_ok, *, dt_frames=None, max_lag=64, windows=(16, 32, 64, 128, 256),
              min_ncc=0.5, min_gain=0.02, min_travel_px=4.0, max_drop=0.05, row_step=1,
              min_delay=0.5, across_slope=None, across_penalty=_DELAY_ACROSS_PENALTY):
    """Speed of the finger from the time one row takes to see what its neighbour saw.

    While the finger slides along the swipe by ``v`` pixels per frame, row ``r`` sees at time
    ``t + tau`` what row ``r + 1`` saw at time ``t``, with ``tau = 1 / v`` frames (shifted
    across by the lateral motion over that time). The delay is read by cross-correlation of
    the rows' time series (the unweighted case of the generalised correlation method [1]_),
    summed over the columns and the pairs of neighbouring rows, in sliding windows: lags in
    whole frames and across offsets of -1, 0, 1 column; across, a parabola at each of the
    three lags around the best; along, a three-point Gaussian fit [2]_ to the parabolas'
    heights (a cosine fit [3]_ where the peak is narrower than the lag spacing). Along the time axis the texture is sampled finely whenever ``v < 1``, so nothing
    is interpolated between the strip's few rows: a registration of two frames of a 2-row
    strip overlaps by one row or less and is pulled hard towards zero shift (simulated 2-row
    swipes: spans 22-56 % short), the delay is not.

    Parameters
    ----------
    z : (T, R, C) array
        Prepared frames (fixed pattern removed).
    plate_ok : (R, C) bool array
        Usable plates.
    dt_frames : (T-1,) array, optional
        Time steps in frame periods; windows holding a step that is not one frame (a dropped
        frame) give no estimate. Default: uniform.
    max_lag : int
        Longest delay searched, frames (slowest speed read: ``1 / max_lag`` px/frame).
    windows : sequence of int
        Window lengths tried, frames, shortest first; each estimate comes from the shortest
        window over which the finger travelled at least ``min_travel_px``.
    min_ncc : float
        Smallest correlation at the peak.
    min_gain : float
        The peak must exceed the correlations without delay and at the opposite delay by this
        much: a stalled finger (or ridges running along the swipe) makes the correlation flat
        in the delay.
    min_travel_px : float
        Travel (px) a window must span.
    max_drop : float
        Largest shortfall of an estimate's correlation from the upper quartile of all of them.
    row_step : int
        Rows between the two rows compared (1: neighbours), 1 .. R - 1. Rows ``k`` apart see
        the same texture ``k / v`` frames apart: a longer delay reads faster swipes (the
        delay must be at least ``min_delay``) and more finely, from fewer row pairs.
    across_slope : float, "auto" or None
        The swipe's line: across travel per px along (e.g. from a first placement). Given,
        the across offset of each delay's peak is drawn towards the line's by
        ``across_penalty`` (correlation per px^2), so that along ridges running straight
        over the strip, where the correlation is a flat valley, the peak is not placed
        anywhere along it. "auto": the line is the median across-to-along ratio of a first
        reading without one (from the same correlations; that reading is returned if it
        has fewer than 8 estimates). None (default): each delay's best offset.
    across_penalty : float
        See ``across_slope``. Default 0.001.
    min_delay : float
        Shortest delay read, frames. Under a frame the peak lies between lags 0 and 1, and
        the three-point fit around lag 1 still places it (lag 0 itself is never taken: it
        must beat the correlation without delay by ``min_gain``); the texture is sampled
        finely enough in time as long as a ridge period spans several frames. Default 0.5
        (neighbouring rows read up to 2 px per frame).

    Returns
    -------
    RowDelay

    References
    ----------
    .. [1] C. H. Knapp and G. C. Carter, "The generalized correlation method for estimation
           of time delay", IEEE Trans. Acoustics, Speech and Signal Processing 24(4), 320-327
           (1976). doi:10.1109/TASSP.1976.1162830
    .. [2] C. E. Willert and M. Gharib, "Digital particle image velocimetry", Experiments in
           Fluids 10(4), 181-193 (1991). doi:10.1007/BF00190388 (three-point Gaussian peak fit)
    .. [3] I. Cespedes, Y. Huang, J. Ophir and S. Spratt, "Methods for estimation of subsample
           time delays of digitized echo signals", Ultrasonic Imaging 17(2), 142-171 (1995)
           (cosine fit to three correlation samples; reference from memory)
    """
    z = np.asarray(z)
    if z.ndim != 3 or z.shape[1] < 2 or z.shape[2] < 4:
        raise ValueError(f"z must be a (T, R, C) stack with R >= 2 and C >= 4; got shape {z.shape}")
    t_n, r_n, c_n = z.shape
    ok = np.asarray(plate_ok, dtype=bool)
    if ok.shape != (r_n, c_n):
        raise ValueError(f"plate_ok must have shape {(r_n, c_n)}; got {ok.shape}")
    k_r = check_int(row_step, name="row_step", lo=1, hi=r_n - 1)
    min_delay = check_positive(min_delay, name="min_delay")
    auto = isinstance(across_slope, str)
    if auto and across_slope != "auto":
        raise ValueError(f'across_slope must be a number, "auto" or None; got {across_slope!r}')
    if across_slope is not None and not auto:
        across_slope = float(across_slope)
        if not np.isfinite(across_slope):
            raise ValueError(f"across_slope must be a finite number or None; got {across_slope}")
    if across_slope is not None:
        pen = check_positive(across_penalty, name="across_penalty")
    zn = _row_normalise(z, ok).astype(np.float32)
    # rows r (earlier in the finger's path) and r + k_r; columns 1 .. C-2 so every across
    # offset of -1, 0, 1 has the same columns
    a = zn[:, :-k_r, 1:c_n - 1].reshape(t_n, -1)
    bs = [zn[:, k_r:, 1 + d:c_n - 1 + d].reshape(t_n, -1) for d in (-1, 0, 1)]
    lag_max = int(max(1, min(int(max_lag), (t_n - 1) // 3)))
    lags = np.arange(-lag_max, lag_max + 1)
    n_l = lags.size
    drops = np.zeros(t_n - 1, dtype=bool) if dt_frames is None else \
        np.abs(np.asarray(dt_frames, dtype=np.float64) - 1.0) > 0.25
    n_drop = np.concatenate([[0], np.cumsum(drops)])
    prod = np.zeros((3, n_l, t_n))
    ea = np.zeros((n_l, t_n))
    cnt = np.zeros((n_l, t_n))
    eb = np.stack([np.einsum("ij,ij->i", b, b) for b in bs])            # (3, T)
    aa = np.einsum("ij,ij->i", a, a)
    tt = np.arange(t_n)
    for i, tau in enumerate(lags):
        # product of a at t + tau with b at t, stored at t
        t0, t1 = max(0, -tau), min(t_n, t_n - tau)
        if t1 <= t0:
            continue
        at = a[t0 + tau:t1 + tau]
        for k, b in enumerate(bs):
            prod[k, i, t0:t1] = np.einsum("ij,ij->i", at, b[t0:t1])
        ea[i, t0:t1] = aa[t0 + tau:t1 + tau]
        # no dropped frame between the two frames of the product
        lo = np.minimum(tt[t0:t1], tt[t0:t1] + tau)
        hi = np.maximum(tt[t0:t1], tt[t0:t1] + tau)
        cnt[i, t0:t1] = (n_drop[hi] - n_drop[lo]) == 0
    prod *= cnt
    zero = lag_max
    widths = [w for w in sorted(int(w) for w in windows) if w <= t_n]
    pad = max(widths, default=0)
    c_n = _padded_cumsum(cnt, pad)
    c_ab = _padded_cumsum(prod, pad)
    c_aa = _padded_cumsum(ea * cnt, pad)
    c_bb = _padded_cumsum(eb[:, None, :] * cnt, pad)      # cnt is 0 where a lag has no product
    kw = dict(t_n=t_n, n_l=n_l, k_r=k_r, lags=lags, zero=zero, widths=widths, pad=pad,
              c_n=c_n, c_ab=c_ab, c_aa=c_aa, c_bb=c_bb, tt=tt, min_ncc=min_ncc,
              min_gain=min_gain, min_travel_px=min_travel_px, min_delay=min_delay,
              max_drop=max_drop, pen=pen if across_slope is not None else None)
    if not auto:
        return _read_delay(across_slope, **kw)
    # "auto": the line is the median across-to-along ratio of a reading without one, from
    # the same correlations (the products are most of the cost)
    first = _read_delay(None, **kw)
    ok0 = first.valid & np.isfinite(first.along_px) & np.isfinite(first.across_px) \
        & (np.abs(first.along_px) > 0)
    if ok0.sum() < 8:
        return first
    return _read_delay(float(np.median(first.across_px[ok0] / first.along_px[ok0])), **kw)


def _read_delay(across_slope, *, t_n, n_l, k_r, lags, zero, widths, pad, c_n, c_ab, c_aa, c_bb,
                tt, min_ncc, min_gain, min_travel_px, min_delay, max_drop, pen):
    """The delay read from row_delay's windowed correlation sums, each delay's across offset
    drawn towards ``across_slope`` (None: its own best)."""
    if across_slope is not None:
        # rows k_r apart see the same texture k_r px further along and k_r * slope across
        e_line = float(np.clip(across_slope * k_r, -1.0, 1.0))
    along = np.full(t_n, np.nan)
    across = np.full(t_n, np.nan)
    when = np.full(t_n, np.nan)
    score = np.zeros(t_n)
    done = np.zeros(t_n, dtype=bool)
    decided = np.zeros(t_n, dtype=bool)
    for width in widths:
        n_w = _window_sums(c_n, width, t_n, pad)
        s_ab = _window_sums(c_ab, width, t_n, pad)
        s_aa = _window_sums(c_aa, width, t_n, pad)
        s_bb = _window_sums(c_bb, width, t_n, pad)
        ncc = np.where(n_w[None] >= width - 0.5,
                       s_ab / np.sqrt(np.maximum(s_aa[None] * s_bb, 1e-30)), -np.inf)
        flat = ncc.reshape(3 * n_l, t_n)
        best = np.argmax(flat, axis=0)
        kd, kl = np.divmod(best, n_l)
        q = flat[best, tt]
        inner = (kd == 1) & (kl > 0) & (kl < n_l - 1)
        kl_c = np.clip(kl, 1, n_l - 2)
        # The peak: across, a parabola through the three offsets at each of the three delays
        # around the best one (its vertex and height); then the delay by the three-point
        # Gaussian fit (Willert & Gharib 1991) to those heights. Following the best across
        # offset at each delay matters on oblique ridges, where the peak is a tilted ellipse:
        # fitted at the middle offset only, its tilt reads as a delay error (simulated 2-row
        # strip slanted by 8 degrees: speed off by -4 to +13 % along the swipe).
        with np.errstate(invalid="ignore", divide="ignore"):
            lo3 = np.stack([ncc[0, kl_c + j, tt] for j in (-1, 0, 1)])      # (3 delays, T)
            mid3 = np.stack([ncc[1, kl_c + j, tt] for j in (-1, 0, 1)])
            hi3 = np.stack([ncc[2, kl_c + j, tt] for j in (-1, 0, 1)])
            curv = lo3 - 2.0 * mid3 + hi3
            if across_slope is None:
                vx3 = np.where(curv < 0, 0.5 * (lo3 - hi3) / curv, 0.0)
                top3 = np.where(curv < 0, mid3 - 0.125 * (lo3 - hi3) ** 2 / curv, mid3)
            else:
                # The parabola f(e) = mid + b e + a e^2 less the penalty lam (e - e_line)^2:
                # its vertex and height (a flat valley's vertex goes to the line's offset).
                a2 = 0.5 * curv
                b1 = 0.5 * (hi3 - lo3)
                den = 2.0 * pen - 2.0 * a2
                ok_d = den > 0
                vx3 = np.where(ok_d, (b1 + 2.0 * pen * e_line) / np.where(ok_d, den, 1.0), e_line)
                vx3 = np.clip(vx3, -1.0, 1.0)
                top3 = mid3 + b1 * vx3 + a2 * vx3 ** 2 - pen * (vx3 - e_line) ** 2
            g_m, g_0, g_p = np.log(np.maximum(top3, 1e-6))
            den_l = g_m - 2.0 * g_0 + g_p
            off_l = np.where(den_l < 0, 0.5 * (g_m - g_p) / den_l, np.nan)
            # A peak narrower than the lag spacing (a fast finger: the ridge period spans a
            # few frames, so a neighbouring lag correlates weakly or negatively) is placed by
            # the cosine fit [3]_, exact for a periodic texture, where the logarithms of the
            # Gaussian fit are dominated by the floor (a 4x160 arch at 2.6 px per frame read
            # 2.1 by the Gaussian fit, 2.5-2.7 by the cosine one; span -7.9 -> +1.5 %).
            c_m, c_0, c_p = top3
            cw = (c_m + c_p) / np.where(c_0 > 0, 2.0 * c_0, 1.0)
            om = np.arccos(np.clip(cw, -1.0, 1.0))
            off_c = np.arctan2(c_p - c_m, 2.0 * c_0 * np.sin(om)) / np.where(om > 0, om, 1.0)
            narrow = ((c_0 > 0) & (cw > -1.0) & (cw < 1.0)
                      & (np.minimum(c_m, c_p) < _NARROW_PEAK * c_0))
            off_l = np.where(narrow, off_c, off_l)
            # across offset at the delay found, between the vertices of its two neighbours
            side = np.where(off_l >= 0, 2, 0)
            w_side = np.abs(off_l)
            off_d = (1.0 - w_side) * vx3[1] + w_side * np.take_along_axis(vx3, side[None], 0)[0]
            tau = lags[kl_c] + off_l
            # ... and over the opposite delay (the rows two pixels apart on a moving finger;
            # as alike as at the peak on a stalled one)
            mirror = ncc[kd, np.clip(2 * zero - kl, 0, n_l - 1), tt]
            # all nine correlations around the peak from complete windows (near the ends of
            # the swipe the longer delays have none, and a peak next to them is no peak)
            full = (np.isfinite(lo3) & np.isfinite(mid3) & np.isfinite(hi3)).all(axis=0)
            good = (inner & full & np.isfinite(q) & (q >= min_ncc)
                    & (q - ncc[1, zero, tt] >= min_gain) & (q - mirror >= min_gain)
                    & (np.abs(off_l) <= 0.5) & (np.abs(off_d) <= 1.0) & (np.abs(tau) >= min_delay)
                    & (width * k_r >= min_travel_px * np.abs(tau)))
        # Each time takes the shortest window the finger travelled min_travel_px through: if
        # that one fails, so does the time (a longer window would only reach further into a
        # stall or past a reversal next to it).
        travelled = inner & np.isfinite(tau) & (width * k_r >= min_travel_px * np.abs(tau))
        new = good & ~done & ~decided
        decided |= travelled
        along[new] = k_r / tau[new]
        across[new] = off_d[new] / tau[new]
        when[new] = tt[new] - width // 2 + 0.5 * (width - 1) + 0.5 * tau[new]
        score[new] = q[new]
        done |= new
    if done.any():
        # A window that straddles a sudden change (a stall beginning, a reversal) holds two
        # motions and correlates worse than the windows of one: against the swipe's typical
        # peak (upper quartile), more than max_drop lower is not read.
        ref = float(np.percentile(score[done], 75))
        done &= score >= ref - max_drop
        along[~done] = np.nan
        across[~done] = np.nan
    return RowDelay(along_px=along, across_px=across, time=when, ncc=score, valid=done)
