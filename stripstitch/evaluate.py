"""Metrics against simulator ground truth: trajectory, Cramer-Rao bound, image, events.

Everything here compares a reconstruction (anything with ``positions``, ``angles``, ``image``,
``origin_px``, ``events``; a :class:`stripstitch.Reconstruction` or a baseline's stand-in) with
a :class:`stripstitch.simulate.Capture` (``positions``, ``angles``, ``ideal_frames``,
``true_image``, ``true_origin_px``, ``events``, ``contact``, ``snr_db``).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any, Mapping

import numpy as np

from ._types import _plain
from ._validate import check_array, check_int, check_positive

__all__ = [
    "TrajectoryErrors",
    "PairBounds",
    "ImageSimilarity",
    "DistortionMap",
    "RidgePeriod",
    "EventScores",
    "Evaluation",
    "trajectory_errors",
    "crb_translation",
    "pair_crb",
    "image_similarity",
    "distortion_map",
    "ridge_period",
    "event_scores",
    "combine_event_scores",
    "evaluate",
    "SCORED_EVENT_KINDS",
]

#: Event kinds scored by :func:`event_scores` by default (the ones the simulator injects and
#: the reconstruction must notice).
SCORED_EVENT_KINDS = ("gap", "stall", "backtrack")


def _freeze(obj, names):
    for name in names:
        value = getattr(obj, name)
        if value is None:
            continue
        arr = np.array(value, dtype=np.float64)
        arr.flags.writeable = False
        object.__setattr__(obj, name, arr)


def _scalars(obj, names):
    for name in names:
        object.__setattr__(obj, name, float(getattr(obj, name)))


def _rms(x, axis=None):
    x = np.asarray(x, dtype=np.float64)
    if x.size == 0:
        return float("nan")
    return np.sqrt(np.mean(x * x, axis=axis))


# ----------------------------------------------------------------------------------------------
# Trajectory
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class TrajectoryErrors:
    """Position, span, rotation and increment errors of an estimated trajectory.

    Attributes
    ----------
    position_error_px : (T, 2) ndarray
        Estimated minus true (along, across) position, sensor pixels (NaN for frames not scored).
    angle_error_deg : (T,) ndarray
        Estimated minus true angle, degrees (NaN for frames not scored).
    increment_error_px : (T-1, 2) ndarray
        Error of each frame-to-frame increment ``positions[t+1] - positions[t]``.
    along_rms_px, along_max_px, across_rms_px, across_max_px : float
        RMS and maximum absolute position error over the scored frames.
    span_true_px, span_est_px : float
        Along-swipe extent (max - min of the along position) of the true and estimated
        trajectory over the scored frames.
    span_error_pct : float
        ``100 * (span_est_px - span_true_px) / span_true_px`` (NaN if the true span is 0).
    rotation_rms_deg, rotation_max_deg : float
        RMS and maximum absolute angle error.
    increment_rms_px : (2,) ndarray
        RMS increment error (along, across) over pairs of scored frames.
    n_scored : int
        Number of frames scored.
    """

    position_error_px: np.ndarray
    angle_error_deg: np.ndarray
    increment_error_px: np.ndarray
    along_rms_px: float
    along_max_px: float
    across_rms_px: float
    across_max_px: float
    span_true_px: float
    span_est_px: float
    span_error_pct: float
    rotation_rms_deg: float
    rotation_max_deg: float
    increment_rms_px: np.ndarray
    n_scored: int

    def __post_init__(self):
        _freeze(self, ("position_error_px", "angle_error_deg", "increment_error_px", "increment_rms_px"))
        _scalars(self, ("along_rms_px", "along_max_px", "across_rms_px", "across_max_px",
                        "span_true_px", "span_est_px", "span_error_pct", "rotation_rms_deg",
                        "rotation_max_deg"))
        object.__setattr__(self, "n_scored", int(self.n_scored))

    def to_dict(self):
        """Scalar summary as plain Python values (JSON-ready)."""
        return _plain({
            "along_rms_px": self.along_rms_px, "along_max_px": self.along_max_px,
            "across_rms_px": self.across_rms_px, "across_max_px": self.across_max_px,
            "span_true_px": self.span_true_px, "span_est_px": self.span_est_px,
            "span_error_pct": self.span_error_pct, "rotation_rms_deg": self.rotation_rms_deg,
            "rotation_max_deg": self.rotation_max_deg,
            "increment_rms_along_px": self.increment_rms_px[0],
            "increment_rms_across_px": self.increment_rms_px[1], "n_scored": self.n_scored})


def _into_axes_of(pos, ang, ref):
    """Positions (T, 2) re-expressed relative to frame ``ref`` and in that frame's axes:
    ``Rot(-a) (p_t - p_ref)`` with ``a = ang[ref] - ang[0]`` (row-vector form), the library's
    convention for frame 0 applied to frame ``ref``."""
    a = float(ang[ref] - ang[0])
    th = np.radians(a) if np.isfinite(a) else 0.0
    c, s = np.cos(th), np.sin(th)
    return (pos - pos[ref]) @ np.array([[c, -s], [s, c]])


def trajectory_errors(positions, angles, true_positions, true_angles, *, frames=None,
                      reference_frame=0):
    """Compare an estimated trajectory with the truth.

    Parameters
    ----------
    positions : (T, 2) array_like
        Estimated (along, across) positions, sensor pixels, relative to frame 0.
    angles : (T,) array_like or None
        Estimated angles in degrees (None: all zero).
    true_positions : (T, 2) array_like
        True positions in the same convention.
    true_angles : (T,) array_like or None
        True angles in degrees (None: all zero).
    frames : (T,) array_like of bool, optional
        Frames to score (e.g. frames with finger contact). Default is None (all frames).
    reference_frame : int, optional
        Both trajectories are re-referenced to this frame before comparing (position and
        angle of that frame subtracted, positions expressed in that frame's axes: each
        trajectory rotated by its own angle of that frame). Default is 0, which removes
        nothing because both are relative to frame 0 already.

    Returns
    -------
    TrajectoryErrors

    Examples
    --------
    >>> import numpy as np
    >>> true = np.stack([np.arange(5.0), np.zeros(5)], axis=1)
    >>> err = trajectory_errors(1.02 * true, None, true, None)
    >>> round(err.span_error_pct, 6), round(err.along_max_px, 6)
    (2.0, 0.08)
    """
    est = check_array(positions, name="positions", shape=(None, 2), finite=False)
    t = est.shape[0]
    tru = check_array(true_positions, name="true_positions", shape=(t, 2))
    ang = np.zeros(t) if angles is None else check_array(angles, name="angles", shape=(t,), finite=False)
    tang = np.zeros(t) if true_angles is None else check_array(true_angles, name="true_angles", shape=(t,))
    if frames is None:
        mask = np.ones(t, dtype=bool)
    else:
        mask = np.asarray(frames, dtype=bool)
        if mask.shape != (t,):
            raise ValueError(f"frames must be a boolean mask of shape ({t},); got shape {mask.shape}")
    ref = check_int(reference_frame, name="reference_frame", lo=0, hi=t - 1)
    # Each trajectory in its own reference frame's axes, not only shifted to it: a frame
    # without finger (frame 0 before the finger arrives) cannot be measured against, so the
    # angle of the reference is removed, and with it the rotation of the whole trajectory
    # that angle implies (subtracting the angle but not rotating the positions counted a
    # turn made before the finger arrived as an across drift of angle x travel).
    est = _into_axes_of(est, ang, ref)
    tru = _into_axes_of(tru, tang, ref)
    ang = ang - ang[ref]
    tang = tang - tang[ref]
    mask = mask & np.isfinite(est).all(axis=1) & np.isfinite(ang)
    perr = np.where(mask[:, None], est - tru, np.nan)
    aerr = np.where(mask, ang - tang, np.nan)
    pair = mask[1:] & mask[:-1]
    ierr = np.where(pair[:, None], np.diff(est, axis=0) - np.diff(tru, axis=0), np.nan)
    n = int(mask.sum())
    if n == 0:
        nan = float("nan")
        return TrajectoryErrors(perr, aerr, ierr, nan, nan, nan, nan, nan, nan, nan, nan, nan,
                                np.full(2, nan), 0)
    pe = perr[mask]
    span_true = float(np.ptp(tru[mask, 0]))
    span_est = float(np.ptp(est[mask, 0]))
    span_pct = 100.0 * (span_est - span_true) / span_true if span_true > 0 else float("nan")
    ae = aerr[mask]
    inc = ierr[pair]
    return TrajectoryErrors(
        position_error_px=perr, angle_error_deg=aerr, increment_error_px=ierr,
        along_rms_px=_rms(pe[:, 0]), along_max_px=np.max(np.abs(pe[:, 0])),
        across_rms_px=_rms(pe[:, 1]), across_max_px=np.max(np.abs(pe[:, 1])),
        span_true_px=span_true, span_est_px=span_est, span_error_pct=span_pct,
        rotation_rms_deg=_rms(ae), rotation_max_deg=np.max(np.abs(ae)),
        increment_rms_px=_rms(inc, axis=0) if inc.size else np.full(2, np.nan), n_scored=n)


# ----------------------------------------------------------------------------------------------
# Cramer-Rao bound for translation
# ----------------------------------------------------------------------------------------------

def _gradient(frames, axis):
    """Derivative along ``axis`` of a stack: 7-point central stencil inside, 5-point next to
    the edges, np.gradient (second order) at the edges.

    For a sinusoid of angular frequency w rad/px the 3-, 5- and 7-point central stencils have
    relative errors w^2/6, w^4/30 and w^6/140 (6.8 %, 0.55 %, 0.05 % at a 9.84 px ridge
    period); common practice (finite-difference tables in any numerical-analysis text).
    """
    g = np.gradient(frames, axis=axis, edge_order=2 if frames.shape[axis] >= 3 else 1)
    n = frames.shape[axis]
    if n < 5:
        return g
    f = np.moveaxis(frames, axis, -1)
    gm = np.moveaxis(g, axis, -1).copy()
    gm[..., 2:-2] = (f[..., :-4] - 8.0 * f[..., 1:-3] + 8.0 * f[..., 3:-1] - f[..., 4:]) / 12.0
    if n >= 7:
        gm[..., 3:-3] = (-f[..., :-6] + 9.0 * f[..., 1:-5] - 45.0 * f[..., 2:-4]
                         + 45.0 * f[..., 4:-2] - 9.0 * f[..., 5:-1] + f[..., 6:]) / 60.0
    return np.moveaxis(gm, -1, axis)


def _invert_information(j):
    """Inverse of (..., 2, 2) symmetric information matrices; inf along unobservable directions."""
    j = np.asarray(j, dtype=np.float64)
    w, v = np.linalg.eigh(j)
    scale = np.maximum(np.abs(w).max(axis=-1, keepdims=True), np.finfo(float).tiny)
    ok = w > 1e-12 * scale
    inv_w = np.where(ok, 1.0 / np.where(ok, w, 1.0), np.inf)
    # cov = sum_k v_k v_k^T / w_k; a component with v_k[i] v_k[j] == 0 contributes 0, not nan
    outer = v[..., :, None, :] * v[..., None, :, :]          # (..., i, j, k)
    with np.errstate(invalid="ignore"):
        terms = np.where(np.abs(outer) > 1e-12, outer * inv_w[..., None, None, :], 0.0)
    return terms.sum(axis=-1)


def crb_translation(ideal_a, ideal_b, shift_px=(0.0, 0.0), noise_sigma=1.0, *, both_noisy=True):
    """Cramer-Rao lower bound on the covariance of a translation estimate between two frames.

    Parameters
    ----------
    ideal_a, ideal_b : (R, C) array_like
        Noise-free frames with ``ideal_b[r, c] ~ ideal_a[r + d, c + e]``.
    shift_px : (2,) array_like, optional
        The true shift (d, e) in pixels; only used to find the overlap (rounded to whole
        pixels). Default is (0, 0).
    noise_sigma : float, optional
        Standard deviation of the white Gaussian noise in each frame, in the frames' units.
        Default is 1.0.
    both_noisy : bool, optional
        Noise in both frames: the bound for a noise-free reference is doubled (see Notes).
        Default is True.

    Returns
    -------
    (2, 2) ndarray
        Lower bound on cov((d_hat, e_hat)) in px^2; ``inf`` on the diagonal for a direction
        the overlap carries no gradient in (e.g. a pattern constant along that axis).

    Notes
    -----
    With a noise-free reference, the Fisher information of the shift is [1]_

    .. math:: J = \\frac{1}{\\sigma^2} \\begin{pmatrix} \\sum I_x^2 & \\sum I_x I_y \\\\
              \\sum I_x I_y & \\sum I_y^2 \\end{pmatrix}

    summed over the overlap, with the gradients of the noise-free frame ``ideal_b`` there, and
    cov >= J^{-1}. When both frames carry independent noise of the same sigma, the linearised
    residual ``b - a ~ grad(I) . v + (n_b - n_a)`` has noise variance 2 sigma^2, so the bound
    is taken as 2 J^{-1} (a first-order approximation, not the exact bound for that case).

    References
    ----------
    .. [1] D. Robinson and P. Milanfar, "Fundamental performance limits in image
           registration", IEEE Trans. Image Processing 13(9), 1185-1199 (2004).
           doi:10.1109/TIP.2004.832923

    Examples
    --------
    >>> import numpy as np
    >>> c = np.arange(192.0)
    >>> frame = np.tile(50.0 * np.cos(2 * np.pi * c / 9.84), (8, 1))
    >>> cov = crb_translation(frame, frame, (0, 0), 5.0, both_noisy=False)
    >>> std = float(np.sqrt(cov[1, 1]))   # sigma T / (pi A sqrt(2N)) = 0.00565 px
    >>> round(std, 4), bool(np.isinf(cov[0, 0]))
    (0.0057, True)
    """
    a = check_array(ideal_a, name="ideal_a", shape=(None, None))
    b = check_array(ideal_b, name="ideal_b", shape=a.shape)
    shift = check_array(shift_px, name="shift_px", shape=(2,))
    sigma = check_positive(noise_sigma, name="noise_sigma")
    j = _information(b[None], shift[None])[0] / sigma ** 2
    cov = _invert_information(j)
    return 2.0 * cov if both_noisy else cov


def _information(frames_b, shifts):
    """Unscaled information sums (T, 2, 2) of frames ``frames_b`` over their overlap with the
    previous frame shifted by ``shifts`` (T, 2); vectorised over T."""
    t, r, c = frames_b.shape
    g0 = _gradient(frames_b, axis=1)
    g1 = _gradient(frames_b, axis=2)
    d = np.rint(np.nan_to_num(shifts, nan=1e9, posinf=1e9, neginf=-1e9))
    rows = np.arange(r)[None, :] + d[:, :1]
    cols = np.arange(c)[None, :] + d[:, 1:]
    rm = ((rows >= 0) & (rows <= r - 1)).astype(np.float64)
    cm = ((cols >= 0) & (cols <= c - 1)).astype(np.float64)
    s00 = np.einsum("tr,trc,tc->t", rm, g0 * g0, cm)
    s01 = np.einsum("tr,trc,tc->t", rm, g0 * g1, cm)
    s11 = np.einsum("tr,trc,tc->t", rm, g1 * g1, cm)
    return np.stack([np.stack([s00, s01], -1), np.stack([s01, s11], -1)], -2)


@dataclass(frozen=True, eq=False)
class PairBounds:
    """Cramer-Rao bounds for every successive frame pair of a capture.

    Attributes
    ----------
    covariance_px2 : (T-1, 2, 2) ndarray
        Lower bound on the covariance of the increment ``positions[t+1] - positions[t]``.
    std_px : (T-1, 2) ndarray
        Square root of its diagonal (along, across), pixels; inf where unobservable.
    noise_sigma : float
        Per-frame noise standard deviation used (frame units).
    both_noisy : bool
        Whether the bound was doubled for noise in both frames.
    """

    covariance_px2: np.ndarray
    std_px: np.ndarray
    noise_sigma: float
    both_noisy: bool

    def __post_init__(self):
        _freeze(self, ("covariance_px2", "std_px"))
        object.__setattr__(self, "noise_sigma", float(self.noise_sigma))
        object.__setattr__(self, "both_noisy", bool(self.both_noisy))


def capture_noise_sigma(capture):
    """Per-plate noise standard deviation of a capture, in code units.

    Uses the simulator's SNR definition, 20 log10(std of the ideal signal over in-contact
    plates / noise rms): sigma = std(ideal frames with contact >= 0.5) / 10^(snr_db / 20).
    """
    if getattr(capture, "ideal_frames", None) is None:
        raise ValueError("capture.ideal_frames must be the noise-free frames; got None (a capture "
                         "saved without them, e.g. to_npz(ideal_frames=False), has no noise "
                         "reference)")
    ideal = np.asarray(capture.ideal_frames, dtype=np.float64)
    contact = np.asarray(getattr(capture, "contact", np.ones(ideal.shape[0])), dtype=np.float64)
    sel = ideal[contact >= 0.5] if np.any(contact >= 0.5) else ideal
    snr = float(capture.snr_db)
    return float(np.std(sel)) / 10.0 ** (snr / 20.0)


def pair_crb(capture, *, noise_sigma=None, both_noisy=True):
    """Cramer-Rao bound on each frame-to-frame increment of a simulated capture.

    Parameters
    ----------
    capture : stripstitch.simulate.Capture
        Needs ``ideal_frames``, ``positions`` (and ``snr_db``, ``contact`` when
        ``noise_sigma`` is None).
    noise_sigma : float, optional
        Per-plate noise std in code units. Default is None: derived from the capture's
        achieved SNR (:func:`capture_noise_sigma`).
    both_noisy : bool, optional
        Double the bound for noise in both frames. Default is True.

    Returns
    -------
    PairBounds

    Notes
    -----
    Each pair uses :func:`crb_translation` with the true increment to find the overlap; the
    small rotation between frames is neglected for the overlap. References: Robinson &
    Milanfar (2004), doi:10.1109/TIP.2004.832923.
    """
    ideal = np.asarray(capture.ideal_frames, dtype=np.float64)
    pos = np.asarray(capture.positions, dtype=np.float64)
    sigma = capture_noise_sigma(capture) if noise_sigma is None else check_positive(
        noise_sigma, name="noise_sigma")
    if ideal.shape[0] < 2:
        raise ValueError(f"capture must hold at least 2 frames; got {ideal.shape[0]}")
    # Rotate increments into frame t's axes (positions are in frame 0's axes).
    ang = np.deg2rad(np.asarray(getattr(capture, "angles", np.zeros(len(pos))), dtype=np.float64))
    inc0 = np.diff(pos, axis=0)
    ca, sa = np.cos(ang[:-1]), np.sin(ang[:-1])
    inc = np.stack([ca * inc0[:, 0] + sa * inc0[:, 1], -sa * inc0[:, 0] + ca * inc0[:, 1]], -1)
    j = _information(ideal[1:], inc) / sigma ** 2
    cov = _invert_information(j) * (2.0 if both_noisy else 1.0)
    std = np.sqrt(np.diagonal(cov, axis1=-2, axis2=-1))
    return PairBounds(cov, std, sigma, both_noisy)


# ----------------------------------------------------------------------------------------------
# Image similarity
# ----------------------------------------------------------------------------------------------

def _place(image, origin_px, shape, true_origin_px, offset=(0.0, 0.0)):
    """Resample ``image`` onto the truth grid (bilinear), NaN outside or where NaN.

    Truth pixel (i, j) shows frame-0 point (i, j) - true_origin; the reconstruction shows that
    point at (i, j) - true_origin + origin + offset.
    """
    from scipy import ndimage as ndi

    img = np.asarray(image, dtype=np.float64)
    valid = np.isfinite(img)
    filled = np.where(valid, img, 0.0)
    d = np.asarray(origin_px, float) - np.asarray(true_origin_px, float) + np.asarray(offset, float)
    if np.allclose(d, np.rint(d)):
        di, dj = (int(v) for v in np.rint(d))
        out = np.full(shape, np.nan)
        ii = np.arange(shape[0]) + di
        jj = np.arange(shape[1]) + dj
        oki = (ii >= 0) & (ii < img.shape[0])
        okj = (jj >= 0) & (jj < img.shape[1])
        sub = img[np.ix_(ii[oki], jj[okj])]
        out[np.ix_(oki, okj)] = sub
        return out
    gi, gj = np.meshgrid(np.arange(shape[0]) + d[0], np.arange(shape[1]) + d[1], indexing="ij")
    vals = ndi.map_coordinates(filled, [gi, gj], order=1, mode="constant", cval=0.0)
    w = ndi.map_coordinates(valid.astype(np.float64), [gi, gj], order=1, mode="constant", cval=0.0)
    return np.where(w > 0.999, vals, np.nan)


def _ncc(a, b):
    a = a - a.mean()
    b = b - b.mean()
    den = np.sqrt(np.sum(a * a) * np.sum(b * b))
    return float(np.sum(a * b) / den) if den > 0 else float("nan")


@dataclass(frozen=True, eq=False)
class ImageSimilarity:
    """Similarity of a reconstruction with the true image after the best global translation.

    Attributes
    ----------
    ncc : float
        Zero-mean normalised cross-correlation over pixels both cover, in [-1, 1].
    ssim : float
        Mean structural similarity (skimage.metrics.structural_similarity) over pixels both
        cover whose whole window lies inside the common region.
    offset_px : (2,) ndarray
        Best global translation (along, across) of the reconstruction relative to its nominal
        placement (origin_px), pixels.
    overlap_fraction : float
        Fraction of the true image covered by the aligned reconstruction.
    aligned : (H, W) ndarray
        The reconstruction resampled onto the truth grid after alignment (NaN where none).
    """

    ncc: float
    ssim: float
    offset_px: np.ndarray
    overlap_fraction: float
    aligned: np.ndarray

    def __post_init__(self):
        _freeze(self, ("offset_px", "aligned"))
        _scalars(self, ("ncc", "ssim", "overlap_fraction"))

    def to_dict(self):
        return _plain({"ncc": self.ncc, "ssim": self.ssim, "offset_along_px": self.offset_px[0],
                       "offset_across_px": self.offset_px[1],
                       "overlap_fraction": self.overlap_fraction})


def image_similarity(image, origin_px, true_image, true_origin_px, *, search_px=8,
                     subpixel=True, win_size=7, match_intensity=True):
    """NCC and SSIM of a reconstruction against the true image after global alignment.

    Parameters
    ----------
    image : (H, W) array_like
        Reconstruction at the sensor pitch, NaN where nothing was seen.
    origin_px : (2,) array_like
        Index of frame 0's plate (0, 0) in ``image``.
    true_image : (H', W') array_like
        True image at the sensor pitch (NaN-free).
    true_origin_px : (2,) array_like
        Index of frame 0's plate (0, 0) in ``true_image``.
    search_px : int, optional
        Largest global translation searched (whole pixels) around the nominal placement, and
        around the best translation of a masked normalised cross-correlation over the whole
        overlap (if it keeps 70 % of the overlap). Default is 8.
    subpixel : bool, optional
        Refine the translation to sub-pixel by a 3-point parabolic fit of the NCC in each
        axis. Default is True.
    win_size : int, optional
        SSIM window (odd). Default is 7 (the scikit-image default).
    match_intensity : bool, optional
        Before SSIM, map the reconstruction's values onto the truth's scale by the least-squares
        gain and offset over the common pixels (reconstructions keep their input units, e.g.
        ADC codes after fixed-pattern correction, while the truth is in ideal codes; NCC is
        invariant to this anyway). Default is True.

    Returns
    -------
    ImageSimilarity

    Notes
    -----
    The integer translation maximises the zero-mean NCC on the common pixels; SSIM is the
    mean of the scikit-image SSIM map [1]_ over common pixels at least ``win_size // 2`` from
    uncovered ones (uncovered pixels are filled with the truth's mean before filtering, so
    they never enter a counted window). ``data_range`` is the truth's range.

    References
    ----------
    .. [1] Z. Wang, A. C. Bovik, H. R. Sheikh and E. P. Simoncelli, "Image quality
           assessment: from error visibility to structural similarity", IEEE Trans. Image
           Processing 13(4), 600-612 (2004). doi:10.1109/TIP.2003.819861
    .. [2] D. Padfield, "Masked object registration in the Fourier domain", IEEE Trans.
           Image Processing 21(5), 2706-2718 (2012). doi:10.1109/TIP.2011.2181402

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> truth = rng.normal(size=(40, 30))
    >>> sim = image_similarity(truth[5:], (0, 0), truth, (5, 0))
    >>> round(sim.ncc, 4), round(sim.ssim, 4)
    (1.0, 1.0)
    """
    from scipy import ndimage as ndi
    from skimage.metrics import structural_similarity

    img = check_array(image, name="image", shape=(None, None), finite=False)
    truth = check_array(true_image, name="true_image", shape=(None, None))
    org = check_array(origin_px, name="origin_px", shape=(2,))
    torg = check_array(true_origin_px, name="true_origin_px", shape=(2,))
    search = check_int(search_px, name="search_px", lo=0)
    win = check_int(win_size, name="win_size", lo=3)
    if win % 2 == 0:
        raise ValueError(f"win_size must be odd; got {win_size}")

    def score(offset):
        placed = _place(img, org, truth.shape, torg, offset)
        m = np.isfinite(placed)
        if m.sum() < 16:
            return -np.inf, placed, m
        return _ncc(placed[m], truth[m]), placed, m

    # Coarse: integer offsets within +-search of the nominal placement, and around the best
    # translation over the whole overlap found by masked normalised cross-correlation
    # (Padfield 2012, via scikit-image) when that lies further out: frames without finger
    # (frame 0 often) are placed by extrapolation, which can move the whole image further
    # than the local window.
    best, best_off = -np.inf, np.zeros(2)
    offs = np.arange(-search, search + 1)

    best_n = 0

    def local(c, min_overlap=0):
        nonlocal best, best_off, best_n
        for di in offs + c[0]:
            for dj in offs + c[1]:
                s, _, mm = score((di, dj))
                n = int(mm.sum())
                if s > best and n >= min_overlap:
                    best, best_off, best_n = s, np.array([di, dj], float), n

    local(np.zeros(2))
    # A distant translation must keep most of the overlap (a small corner of the image
    # matching by chance is no alignment).
    need = int(0.7 * best_n)
    placed0 = _place(img, org, truth.shape, torg)
    m0 = np.isfinite(placed0)
    if m0.sum() >= 16:
        from skimage.registration import phase_cross_correlation

        sh = phase_cross_correlation(truth, np.where(m0, placed0, 0.0),
                                     reference_mask=np.ones(truth.shape, bool), moving_mask=m0,
                                     overlap_ratio=0.3)[0]
        sh = np.rint(np.asarray(sh, float))
        if np.isfinite(sh).all() and np.abs(sh).max() > search:
            local(sh, need)
            local(-sh, need)
    off = best_off.copy()
    if subpixel and np.isfinite(best):
        for ax in range(2):
            e = np.zeros(2)
            e[ax] = 1.0
            sm, sp = score(best_off - e)[0], score(best_off + e)[0]
            den = sm - 2.0 * best + sp
            if np.isfinite(sm) and np.isfinite(sp) and den < 0:
                off[ax] = best_off[ax] + float(np.clip(0.5 * (sm - sp) / den, -0.5, 0.5))
    ncc, placed, m = score(off)
    if not np.isfinite(ncc):
        return ImageSimilarity(float("nan"), float("nan"), off, 0.0, placed)
    fill = float(truth[m].mean())
    a = placed
    if match_intensity:
        gain, offset = np.polyfit(truth[m], placed[m], 1)
        if gain > 0:
            a = (placed - offset) / gain
    a = np.where(m, a, fill)
    drange = float(np.ptp(truth)) or 1.0
    _, smap = structural_similarity(truth, a, win_size=win, data_range=drange, full=True)
    inner = ndi.binary_erosion(m, structure=np.ones((win, win), bool), border_value=0)
    ssim = float(smap[inner].mean()) if inner.any() else float("nan")
    return ImageSimilarity(ncc, ssim, off, float(m.mean()), placed)


# ----------------------------------------------------------------------------------------------
# Local distortion
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class DistortionMap:
    """Block-wise displacement between a reconstruction and the true image.

    Attributes
    ----------
    centres_px : (nb_r, nb_c, 2) ndarray
        Block centres (row, col) on the truth grid.
    displacement_px : (nb_r, nb_c, 2) ndarray
        Where each block's truth content appears in the (aligned) reconstruction relative to
        where it should: ``recon[p + u] ~ truth[p]``; NaN for blocks with too little data or
        texture.
    block_px : int
        Block size (square).
    rms_px, max_px : float
        RMS and maximum displacement length over the valid blocks.
    scale : (2,) ndarray
        Geometric scale of the reconstruction along and across: 1 + slope of a straight-line
        fit of the along (across) displacement against the along (across) block position
        (1 = true size; NaN with fewer than 2 distinct positions).
    """

    centres_px: np.ndarray
    displacement_px: np.ndarray
    block_px: int
    rms_px: float
    max_px: float
    scale: np.ndarray = None

    def __post_init__(self):
        if self.scale is None:
            object.__setattr__(self, "scale", _scale_from(self.centres_px, self.displacement_px))
        _freeze(self, ("centres_px", "displacement_px", "scale"))
        object.__setattr__(self, "block_px", int(self.block_px))
        _scalars(self, ("rms_px", "max_px"))

    def to_dict(self):
        return _plain({"block_px": self.block_px, "rms_px": self.rms_px, "max_px": self.max_px,
                       "scale_along": self.scale[0], "scale_across": self.scale[1]})


def _scale_from(centres, disp):
    centres = np.asarray(centres, float)
    disp = np.asarray(disp, float)
    ok = np.isfinite(disp).all(axis=-1)
    out = np.full(2, np.nan)
    for ax in range(2):
        x = centres[..., ax][ok]
        if np.unique(x).size >= 2:
            out[ax] = 1.0 + np.polyfit(x, disp[..., ax][ok], 1)[0]
    return out


def distortion_map(aligned, true_image, *, block_px=32, step_px=None, min_coverage=0.95,
                   upsample_factor=10):
    """Block-wise displacement of a reconstruction (on the truth grid) against the truth.

    Parameters
    ----------
    aligned : (H, W) array_like
        Reconstruction resampled onto the truth grid, NaN where none (e.g.
        ``image_similarity(...).aligned``).
    true_image : (H, W) array_like
        The true image.
    block_px : int, optional
        Square block size in pixels. Default is 32.
    step_px : int, optional
        Distance between block origins. Default is None (= block_px // 2).
    min_coverage : float, optional
        Blocks with a smaller covered fraction, or without texture, are NaN. Default is 0.95.
    upsample_factor : int, optional
        Sub-pixel resolution 1/upsample_factor of the per-block phase correlation
        (skimage.registration.phase_cross_correlation). Default is 10.

    Returns
    -------
    DistortionMap

    References
    ----------
    .. [1] M. Guizar-Sicairos, S. T. Thurman and J. R. Fienup, "Efficient subpixel image
           registration algorithms", Optics Letters 33(2), 156-158 (2008).
           doi:10.1364/OL.33.000156

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(1)
    >>> truth = rng.normal(size=(64, 64))
    >>> dm = distortion_map(truth, truth, block_px=32)
    >>> dm.displacement_px.shape, round(dm.max_px, 6)
    ((3, 3, 2), 0.0)
    """
    from skimage.registration import phase_cross_correlation

    img = check_array(aligned, name="aligned", shape=(None, None), finite=False)
    truth = check_array(true_image, name="true_image", shape=img.shape)
    b = check_int(block_px, name="block_px", lo=8)
    step = b // 2 if step_px is None else check_int(step_px, name="step_px", lo=1)
    up = check_int(upsample_factor, name="upsample_factor", lo=1)
    h, w = truth.shape
    bs = min(b, h), min(b, w)
    r0 = np.arange(0, max(h - bs[0], 0) + 1, step)
    c0 = np.arange(0, max(w - bs[1], 0) + 1, step)
    cen = np.stack(np.meshgrid(r0 + (bs[0] - 1) / 2, c0 + (bs[1] - 1) / 2, indexing="ij"), -1)
    disp = np.full(cen.shape, np.nan)
    hann = np.outer(np.hanning(bs[0]), np.hanning(bs[1]))
    for i, r in enumerate(r0):
        for j, c in enumerate(c0):
            blk = img[r:r + bs[0], c:c + bs[1]]
            ok = np.isfinite(blk)
            tb = truth[r:r + bs[0], c:c + bs[1]]
            if ok.mean() < min_coverage or np.std(tb) == 0:
                continue
            mb = blk[ok].mean()
            ab = np.where(ok, blk, mb) - mb
            if np.std(ab) == 0:
                continue
            tb = tb - tb.mean()
            shift, _, _ = phase_cross_correlation(tb * hann, ab * hann, upsample_factor=up,
                                                  normalization=None)
            disp[i, j] = -np.asarray(shift, float)   # skimage returns the shift that registers
            # moving onto reference, i.e. minus the displacement of the content
    valid = np.isfinite(disp).all(axis=-1)
    lens = np.hypot(disp[..., 0], disp[..., 1])[valid]
    rms = _rms(lens) if lens.size else float("nan")
    mx = float(lens.max()) if lens.size else float("nan")
    return DistortionMap(cen, disp, b, rms, mx)


# ----------------------------------------------------------------------------------------------
# Ridge period
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class RidgePeriod:
    """Ridge period of an image measured along and across the swipe from its 2-D spectrum.

    Attributes
    ----------
    along_px, across_px : float
        1 / (power-weighted RMS spatial frequency along axis 0 / axis 1) within the ridge
        band: the mean spacing of ridges crossed walking along that axis, pixels.
    overall_px : float
        1 / (power-weighted RMS radial frequency): the ridge period itself, pixels.
    """

    along_px: float
    across_px: float
    overall_px: float

    def __post_init__(self):
        _scalars(self, ("along_px", "across_px", "overall_px"))

    def to_dict(self):
        return _plain({"along_px": self.along_px, "across_px": self.across_px,
                       "overall_px": self.overall_px})


def ridge_period(image, *, band_px=(3.0, 25.0), mask=None):
    """Measure the ridge period along and across the swipe from the 2-D power spectrum.

    Parameters
    ----------
    image : (H, W) array_like
        Image at the sensor pitch, NaN where nothing was seen.
    band_px : (2,) tuple of float, optional
        Periods (min, max) in pixels that count as ridges. Default is (3, 25): the valid
        ridge-frequency range 1/25 to 1/3 cycles/px at 500 ppi (Hong, Wan & Jain 1998, from
        memory; REFERENCE-VALUES.md section 3).
    mask : (H, W) array_like of bool, optional
        Pixels to use (others are set to the mean). Default is None (the finite pixels).

    Returns
    -------
    RidgePeriod

    Notes
    -----
    The bounding box of the used pixels is mean-removed, Hann-windowed and Fourier
    transformed; within the band, f_along = sqrt(sum P f_0^2 / sum P) and likewise across and
    radially. Stretching the image by k along axis 0 scales every f_0 by 1/k, so
    ``along_px`` scales by k while ``across_px`` stays (up to windowing and band edges).
    Being a power-weighted moment, it is also moved by anything that changes where the power
    sits: broadband noise and seams shorten the measured period, blur lengthens it. Compare a
    reconstruction with the truth on the same pixels, and use
    :attr:`DistortionMap.scale` for the purely geometric scale.

    Examples
    --------
    >>> import numpy as np
    >>> r, c = np.mgrid[0:128, 0:128]
    >>> p = ridge_period(np.cos(2 * np.pi * (r + c) / (8.0 * np.sqrt(2))))
    >>> round(p.overall_px, 1), round(p.along_px, 1)
    (8.0, 11.3)
    """
    img = check_array(image, name="image", shape=(None, None), finite=False)
    lo, hi = (float(v) for v in band_px)
    if not (0 < lo < hi):
        raise ValueError(f"band_px must be (min, max) periods with 0 < min < max; got {band_px!r}")
    m = np.isfinite(img)
    if mask is not None:
        mk = np.asarray(mask, dtype=bool)
        if mk.shape != img.shape:
            raise ValueError(f"mask must have the image's shape {img.shape}; got {mk.shape}")
        m &= mk
    if m.sum() < 16:
        nan = float("nan")
        return RidgePeriod(nan, nan, nan)
    rows = np.flatnonzero(m.any(axis=1))
    cols = np.flatnonzero(m.any(axis=0))
    sub = img[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1]
    ms = m[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1]
    mean = sub[ms].mean()
    a = np.where(ms, sub, mean) - mean
    a = a * np.outer(np.hanning(a.shape[0]), np.hanning(a.shape[1]))
    p = np.abs(np.fft.fft2(a)) ** 2
    f0 = np.fft.fftfreq(a.shape[0])[:, None]
    f1 = np.fft.fftfreq(a.shape[1])[None, :]
    fr = np.hypot(f0, f1)
    band = (fr >= 1.0 / hi) & (fr <= 1.0 / lo)
    tot = p[band].sum()
    if tot <= 0:
        nan = float("nan")
        return RidgePeriod(nan, nan, nan)

    def period(f2):
        v = np.sum(p[band] * np.broadcast_to(f2, p.shape)[band]) / tot
        return 1.0 / np.sqrt(v) if v > 0 else float("inf")

    return RidgePeriod(period(f0 ** 2), period(f1 ** 2), period(fr ** 2))


# ----------------------------------------------------------------------------------------------
# Events
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class EventScores:
    """Detection of injected events by frame-range overlap.

    Attributes
    ----------
    counts : Mapping[str, Mapping[str, int]]
        Per kind: ``n_true``, ``n_reported``, ``detected`` (true events overlapped by a
        report), ``correct`` (reports overlapping a true event), ``false`` (reports
        overlapping none), ``missed`` (true events overlapped by none).
    precision, recall : Mapping[str, float]
        Per kind and ``"all"``: correct / n_reported and detected / n_true (NaN if 0/0).
    """

    counts: Mapping[str, Mapping[str, int]]
    precision: Mapping[str, float]
    recall: Mapping[str, float]

    def __post_init__(self):
        object.__setattr__(self, "counts", MappingProxyType(
            {k: MappingProxyType(dict(v)) for k, v in self.counts.items()}))
        object.__setattr__(self, "precision", MappingProxyType(dict(self.precision)))
        object.__setattr__(self, "recall", MappingProxyType(dict(self.recall)))

    def false_count(self, kind):
        """Number of reports of ``kind`` that overlap no true event."""
        return int(self.counts.get(kind, {}).get("false", 0))

    def to_dict(self):
        return _plain({"counts": {k: dict(v) for k, v in self.counts.items()},
                       "precision": dict(self.precision), "recall": dict(self.recall)})


def _event_tuple(e, name):
    if hasattr(e, "kind"):
        return str(e.kind), int(e.first_frame), int(e.last_frame)
    if isinstance(e, Mapping):
        return str(e["kind"]), int(e["first_frame"]), int(e["last_frame"])
    try:
        kind, first, last = tuple(e)[:3]
    except (TypeError, ValueError) as exc:
        raise TypeError(f"{name} must hold Event objects, dicts or (kind, first_frame, last_frame) "
                        f"tuples; got {type(e).__name__}") from exc
    return str(kind), int(first), int(last)


def _ratio(num, den):
    return num / den if den else float("nan")


def _scores_from_counts(counts):
    prec, rec = {}, {}
    tot = dict.fromkeys(("n_true", "n_reported", "detected", "correct"), 0)
    for k, c in counts.items():
        prec[k] = _ratio(c["correct"], c["n_reported"])
        rec[k] = _ratio(c["detected"], c["n_true"])
        for key in tot:
            tot[key] += c[key]
    prec["all"] = _ratio(tot["correct"], tot["n_reported"])
    rec["all"] = _ratio(tot["detected"], tot["n_true"])
    return EventScores(counts, prec, rec)


def event_scores(events, true_events, *, kinds=SCORED_EVENT_KINDS, slack_frames=2):
    """Match reported events to injected ones by frame-range overlap, kind by kind.

    Parameters
    ----------
    events : sequence of Event (or dict / (kind, first, last) tuple)
        Reported events.
    true_events : sequence of Event (or dict / tuple)
        Injected (truth) events.
    kinds : tuple of str, optional
        Kinds to score. Default is ``("gap", "stall", "backtrack")``.
    slack_frames : int, optional
        Ranges count as overlapping when they come within this many frames. Default is 2.

    Returns
    -------
    EventScores

    Examples
    --------
    >>> s = event_scores([("gap", 10, 12), ("gap", 50, 50)], [("gap", 11, 11), ("stall", 5, 9)])
    >>> s.precision["gap"], s.recall["gap"], s.recall["stall"]
    (0.5, 1.0, 0.0)
    """
    slack = check_int(slack_frames, name="slack_frames", lo=0)
    rep = [_event_tuple(e, "events") for e in events]
    tru = [_event_tuple(e, "true_events") for e in true_events]
    counts = {}
    for kind in kinds:
        r = np.array([(a, b) for k, a, b in rep if k == kind], dtype=np.int64).reshape(-1, 2)
        t = np.array([(a, b) for k, a, b in tru if k == kind], dtype=np.int64).reshape(-1, 2)
        ov = ((r[:, None, 0] <= t[None, :, 1] + slack) & (t[None, :, 0] <= r[:, None, 1] + slack))
        counts[kind] = {"n_true": len(t), "n_reported": len(r),
                        "detected": int(ov.any(axis=0).sum()), "correct": int(ov.any(axis=1).sum()),
                        "false": int((~ov.any(axis=1)).sum()), "missed": int((~ov.any(axis=0)).sum())}
    return _scores_from_counts(counts)


def combine_event_scores(scores):
    """Pool :class:`EventScores` over a suite (counts add; precision and recall recomputed).

    Examples
    --------
    >>> a = event_scores([("gap", 1, 2)], [("gap", 1, 1)])
    >>> b = event_scores([], [("gap", 7, 8)])
    >>> combine_event_scores([a, b]).recall["gap"]
    0.5
    """
    total = {}
    for s in scores:
        for kind, c in s.counts.items():
            acc = total.setdefault(kind, dict.fromkeys(c, 0))
            for key, v in c.items():
                acc[key] = acc.get(key, 0) + int(v)
    return _scores_from_counts(total)


# ----------------------------------------------------------------------------------------------
# All together
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class Evaluation:
    """All metrics of one reconstruction against its simulated truth.

    Attributes
    ----------
    trajectory : TrajectoryErrors
    bounds : PairBounds or None
        Cramer-Rao bounds per frame pair (None when ``crb=False``).
    similarity : ImageSimilarity or None
        None when the reconstruction has no image.
    distortion : DistortionMap or None
    period_true, period_est : RidgePeriod or None
        Ridge period of the truth and of the reconstruction on the pixels both cover.
    period_ratio : (2,) ndarray
        ``period_est / period_true`` along and across (1 = preserved).
    events : EventScores
    scored_frames : (T,) ndarray of bool
        Frames the trajectory metrics were computed over.
    info : Mapping
        Case facts (n_frames, n_rows, n_cols, snr_db, ...).
    """

    trajectory: TrajectoryErrors
    bounds: Any
    similarity: Any
    distortion: Any
    period_true: Any
    period_est: Any
    period_ratio: np.ndarray
    events: EventScores
    scored_frames: np.ndarray
    info: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self):
        _freeze(self, ("period_ratio",))
        sf = np.array(self.scored_frames, dtype=bool)
        sf.flags.writeable = False
        object.__setattr__(self, "scored_frames", sf)
        object.__setattr__(self, "info", MappingProxyType(dict(self.info)))

    @property
    def crb_rms_px(self):
        """RMS of the per-pair CRB std (along, across) over scored pairs with a finite bound."""
        if self.bounds is None:
            return np.full(2, np.nan)
        pair = self.scored_frames[1:] & self.scored_frames[:-1]
        s = self.bounds.std_px[pair]
        s = s[np.isfinite(s).all(axis=1)]
        return _rms(s, axis=0) if s.size else np.full(2, np.nan)

    def to_dict(self):
        """Flat dict of the scalar metrics (JSON-ready)."""
        out = dict(self.info)
        out.update(self.trajectory.to_dict())
        crb = self.crb_rms_px
        out["crb_rms_along_px"], out["crb_rms_across_px"] = crb[0], crb[1]
        if self.similarity is not None:
            out.update(self.similarity.to_dict())
        if self.distortion is not None:
            out["distortion_rms_px"] = self.distortion.rms_px
            out["distortion_max_px"] = self.distortion.max_px
            out["scale_along"], out["scale_across"] = self.distortion.scale
        if self.period_true is not None:
            out["period_true_along_px"] = self.period_true.along_px
            out["period_true_across_px"] = self.period_true.across_px
        if self.period_est is not None:
            out["period_est_along_px"] = self.period_est.along_px
            out["period_est_across_px"] = self.period_est.across_px
        out["period_ratio_along"], out["period_ratio_across"] = self.period_ratio
        for kind, c in self.events.counts.items():
            out[f"{kind}_true"] = c["n_true"]
            out[f"{kind}_reported"] = c["n_reported"]
            out[f"{kind}_detected"] = c["detected"]
            out[f"{kind}_false"] = c["false"]
        return _plain(out)


def _on_sensor_grid(result, sensor_pitch_um):
    """Image and origin of a result resampled to the sensor pitch when it differs."""
    image = getattr(result, "image", None)
    if image is None:
        return None, None
    image = np.asarray(image, dtype=np.float64)
    origin = np.asarray(result.origin_px, dtype=np.float64)
    pitch = np.broadcast_to(np.asarray(getattr(result, "pitch_um", sensor_pitch_um), float), (2,))
    scale = pitch / float(sensor_pitch_um)            # output px per sensor px = 1 / scale
    if np.allclose(scale, 1.0):
        return image, origin
    from scipy import ndimage as ndi
    # Sensor-grid pixel k (relative to frame-0 plate 0) sits at output index origin + k / scale.
    n = np.floor((np.array(image.shape) - 1 - origin) * scale).astype(int) + 1
    k0 = np.ceil(-origin * scale).astype(int)
    ki = np.arange(k0[0], n[0])
    kj = np.arange(k0[1], n[1])
    gi, gj = np.meshgrid(origin[0] + ki / scale[0], origin[1] + kj / scale[1], indexing="ij")
    valid = np.isfinite(image)
    vals = ndi.map_coordinates(np.where(valid, image, 0.0), [gi, gj], order=1)
    w = ndi.map_coordinates(valid.astype(float), [gi, gj], order=1)
    return np.where(w > 0.999, vals, np.nan), np.array([-k0[0], -k0[1]], float)


def evaluate(result, capture, *, crb=True, image=True, distortion=True, block_px=32,
             reference_frame=None, min_contact=0.5, search_px=8, slack_frames=2):
    """Score a reconstruction against the simulator's truth.

    Parameters
    ----------
    result : Reconstruction or similar
        Needs ``positions``, ``angles`` (optional), ``events`` (optional), and for the
        image metrics ``image``, ``origin_px`` and ``pitch_um`` (sensor pitch assumed if absent).
    capture : stripstitch.simulate.Capture
        The truth.
    crb : bool, optional
        Compute the per-pair Cramer-Rao bound. Default is True.
    image : bool, optional
        Compute the image metrics (NCC, SSIM, ridge period). Default is True.
    distortion : bool, optional
        Compute the block-wise distortion map (needs ``image``). Default is True.
    block_px : int, optional
        Distortion block size. Default is 32.
    reference_frame : int, optional
        Frame both trajectories are referenced to. Default is None: frame 0 (nothing removed)
        when it has contact >= ``min_contact``, else the first frame that has.
    min_contact : float, optional
        Frames with at least this contact fraction are scored. Default is 0.5. If no frame
        has that much (a finger narrower than the strip), frames with at least this fraction
        of the largest contact are.
    search_px : int, optional
        Global alignment search range for the image metrics. Default is 8.
    slack_frames : int, optional
        Slack for event matching. Default is 2.

    Returns
    -------
    Evaluation
    """
    pos = np.asarray(result.positions, dtype=np.float64)
    tpos = np.asarray(capture.positions, dtype=np.float64)
    if pos.shape != tpos.shape:
        raise ValueError(f"result.positions must have the capture's shape {tpos.shape}; got {pos.shape}")
    t = tpos.shape[0]
    contact = np.asarray(getattr(capture, "contact", np.ones(t)), dtype=np.float64)
    scored = contact >= float(min_contact)
    if not scored.any():
        # A pad that never covers min_contact of the strip (a finger narrower than a wide
        # strip): the frames of at least min_contact of its largest contact, not every frame
        # (those with no contact hold no data, only the method's guess).
        c_max = float(contact.max()) if t else 0.0
        scored = contact >= float(min_contact) * c_max if c_max > 0 else np.ones(t, dtype=bool)
    if reference_frame is None:
        ref = 0 if scored[0] else int(np.flatnonzero(scored)[0])
    else:
        ref = check_int(reference_frame, name="reference_frame", lo=0, hi=t - 1)
    angles = getattr(result, "angles", None)
    traj = trajectory_errors(pos, angles, tpos, getattr(capture, "angles", None),
                             frames=scored, reference_frame=ref)
    # The bound needs the noise-free frames; a capture saved without them is scored without it.
    bounds = pair_crb(capture) if crb and getattr(capture, "ideal_frames", None) is not None \
        else None
    pitch = float(getattr(capture, "pitch_um", 50.8))
    sim = dist = pt = pe = None
    ratio = np.full(2, np.nan)
    if image:
        img, origin = _on_sensor_grid(result, pitch)
        if img is not None and np.isfinite(img).sum() >= 16:
            truth = np.asarray(capture.true_image, dtype=np.float64)
            torg = np.asarray(capture.true_origin_px, dtype=np.float64)
            sim = image_similarity(img, origin, truth, torg, search_px=search_px)
            common = np.isfinite(sim.aligned)
            if common.sum() >= 16:
                pt = ridge_period(truth, mask=common)
                pe = ridge_period(sim.aligned, mask=common)
                ratio = np.array([pe.along_px / pt.along_px, pe.across_px / pt.across_px])
                if distortion:
                    dist = distortion_map(sim.aligned, truth, block_px=block_px)
    ev = event_scores(getattr(result, "events", ()), getattr(capture, "events", ()),
                      slack_frames=slack_frames)
    frames = getattr(capture, "ideal_frames", None)
    info = {"n_frames": t, "reference_frame": ref}
    if frames is not None:
        info["n_rows"], info["n_cols"] = int(frames.shape[1]), int(frames.shape[2])
    if hasattr(capture, "snr_db"):
        info["snr_db"] = float(capture.snr_db)
    return Evaluation(traj, bounds, sim, dist, pt, pe, ratio, ev, scored, info)
