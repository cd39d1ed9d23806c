"""Synthetic fingertip (simulator stage 1): pattern class and seed in, ridge maps in micrometres out.

The finger is built in four steps, each from a published model or a stated assumption:

1. ridge orientation from the zero-pole model of Sherlock & Monro (1993), with cores and deltas
   placed per pattern class (a smooth analytic arch field for the plain arch);
2. a smooth random ridge-period map around a requested mean;
3. a ridge pattern grown by iterative, space-variant Gabor filtering of noise steered by the two
   maps (Cappelli, Erol, Maio & Maltoni 2000), on a coarse grid, reduced to the cosine of its
   local phase (monogenic signal, Felsberg & Sommer 2001) and interpolated to the fine grid;
4. the physical surface: a rounded ridge height profile, an elliptical contact pad whose size
   grows with pressure, the skin curving away from the sensor off the pad, and the skin
   condition (normal, dry, wet).

:func:`texture_finger` puts a given grey-level image (e.g. a photographic texture) in place of
steps 1-3 and keeps step 4 (normal skin).
"""

from __future__ import annotations

import numbers
from dataclasses import dataclass

import numpy as np
from scipy import fft as sp_fft
from scipy import ndimage

from .._validate import check_array, check_choice, check_in_range, check_positive, check_real

__all__ = ["PATTERNS", "SKINS", "Finger", "make_finger", "orientation_field", "texture_finger",
           "with_crease"]

#: Pattern classes :func:`make_finger` can draw.
PATTERNS = ("arch", "tented_arch", "left_loop", "right_loop", "whorl", "twin_loop")

#: Skin conditions :func:`make_finger` can draw.
SKINS = ("normal", "dry", "wet")

# Modelling constants (assumptions of this module, not measured values; see make_finger Notes).
_N_ORIENT_BINS = 16          # Gabor orientation bins over [0, pi)
_N_FREQ_BINS = 3             # Gabor frequency bins over the period range
_N_ITER = 14                 # growth iterations
_SAMPLES_PER_PERIOD = 7.0    # coarse grid: samples per mean ridge period
_SIGMA_NORMAL = 0.42         # Gabor envelope across the ridges, in periods (Cappelli: ~0.40)
_SIGMA_TANGENT = 0.75        # Gabor envelope along the ridges, in periods (longer: continuity)
_FINGER_RADIUS_UM = 8000.0   # radius of curvature of the fingertip off the pad (assumed)
_PAD_EDGE_UM = 400.0         # half-width of the soft pad edge (assumed)
_INDENT_MIN = 0.15           # skin indentation on the pad at zero pressure, fraction of valley depth (assumed)
_INDENT_SPAN = 0.35          # extra indentation at full pressure (assumed)
_DRY_LIFT_UM = 5.0           # lift of a dry patch (assumed: "a few um")
_DRY_AREA = 0.35             # area fraction of dry patches (assumed)
_WET_LEVEL = (0.25, 0.55)    # moisture level range, as a fraction of the valley depth (assumed)
_CREST_FLATTEN = 0.2         # crest flattening: > 0 gives the crests a small flat top
_RING_RADIUS = 0.8           # orientation-free growth within ~this many periods of a singularity
_RING_GAIN = 1.0             # gain of the ring filter relative to the oriented ones


@dataclass(frozen=True, eq=False)
class Finger:
    """A synthetic fingertip surface sampled on a regular grid.

    Axis 0 runs along the finger (the swipe direction; the fingertip is at row 0), axis 1
    across. Every map has shape ``(H, W)`` and grid spacing ``spacing_um``; coordinates in um
    are measured from the centre of grid cell (0, 0).

    Attributes
    ----------
    pattern : str
        Pattern class, one of :data:`PATTERNS`, or ``"texture"`` (:func:`texture_finger`).
    spacing_um : float
        Grid spacing of every map, micrometres.
    ridge : (H, W) ndarray of float64
        Ridge pattern in [-1, 1]: +1 on a ridge crest, -1 at a valley centre.
    height_um : (H, W) ndarray of float64
        Ridge height above the valley floor, 0 .. ``valley_depth_um`` (a rounded profile,
        ``valley_depth_um * (1 + ridge) / 2``).
    contact : (H, W) ndarray of float64
        Pad footprint in [0, 1]: 1 where the finger is pressed flat on the sensor, 0 off the
        pad, a smooth step between. It does not depend on the skin condition.
    air_gap_um : (H, W) ndarray of float64
        Air gap (>= 0) between a flat sensor surface and the skin when the finger is pressed:
        ``max(valley_depth_um - height_um - indent, 0)`` on the pad, where the indentation
        ``valley_depth_um * (0.15 + 0.35 * pressure)`` flattens the ridge crests into contact
        plateaus (0 where the ridges touch), plus the lift
        of dry patches, plus the lift of the skin curving away from the sensor off the pad
        (growing smoothly to several hundred um).
    fluid_um : (H, W) ndarray of float64
        Moisture thickness in the gap, 0 <= ``fluid_um`` <= ``air_gap_um`` (0 unless the skin
        is wet).
    orientation_rad : (H, W) ndarray of float64
        Ridge orientation used, in [-pi/2, pi/2): the angle of the ridge tangent measured from
        axis 1 (across) towards axis 0 (along), so the tangent is (along, across) =
        (sin theta, cos theta); 0 means ridges running straight across the finger.
    period_um : (H, W) ndarray of float64
        Ridge period map used, micrometres.
    cores_um, deltas_um : (n, 2) ndarray of float64
        Singular points used, (along, across) in um from the centre of cell (0, 0).
    valley_depth_um : float
        Ridge height from valley floor to crest.
    pressure : float
        Pressure in [0, 1] used for the pad footprint.
    skin : str
        Skin condition, one of :data:`SKINS`.
    """

    pattern: str
    spacing_um: float
    ridge: np.ndarray
    height_um: np.ndarray
    contact: np.ndarray
    air_gap_um: np.ndarray
    fluid_um: np.ndarray
    orientation_rad: np.ndarray
    period_um: np.ndarray
    cores_um: np.ndarray
    deltas_um: np.ndarray
    valley_depth_um: float
    pressure: float
    skin: str

    def __post_init__(self):
        maps = ("ridge", "height_um", "contact", "air_gap_um", "fluid_um", "orientation_rad",
                "period_um")
        shape = np.shape(self.ridge)
        if len(shape) != 2:
            raise ValueError(f"ridge must be a 2-D (H, W) array; got shape {shape}")
        for name in maps + ("cores_um", "deltas_um"):
            arr = np.array(getattr(self, name), dtype=np.float64)   # own copy
            if name in maps and arr.shape != shape:
                raise ValueError(f"{name} must have the shape of ridge {shape}; got {arr.shape}")
            if name in ("cores_um", "deltas_um"):
                arr = arr.reshape(-1, 2)
            arr.flags.writeable = False
            object.__setattr__(self, name, arr)
        for name in ("spacing_um", "valley_depth_um", "pressure"):
            object.__setattr__(self, name, float(getattr(self, name)))

    @classmethod
    def _adopt(cls, **fields):
        """Build from freshly made float64 arrays without copying them (internal fast path:
        make_finger owns its arrays, so the copy of __post_init__ would only cost time)."""
        obj = object.__new__(cls)
        for name, value in fields.items():
            if isinstance(value, np.ndarray):
                value = np.ascontiguousarray(value, dtype=np.float64)
                value.flags.writeable = False
            object.__setattr__(obj, name, value)
        return obj

    @property
    def shape(self):
        """(H, W): grid size in cells."""
        return tuple(self.ridge.shape)

    @property
    def size_mm(self):
        """(along, across): extent of the grid in millimetres (cells x spacing)."""
        h, w = self.ridge.shape
        return (h * self.spacing_um / 1000.0, w * self.spacing_um / 1000.0)


# ---------------------------------------------------------------------------------------------
# orientation


def orientation_field(along_um, across_um, *, cores_um=(), deltas_um=(), theta_inf_rad=0.0):
    """Ridge orientation of the zero-pole model at given points.

    Evaluates theta(z) = theta_inf + 1/2 [sum_k arg(z - c_k) - sum_k arg(z - d_k)] with
    z = across + i * along (Sherlock & Monro 1993), wrapped to [-pi/2, pi/2).

    Parameters
    ----------
    along_um, across_um : array_like
        Coordinates of the points (broadcast against each other), micrometres.
    cores_um, deltas_um : (n, 2) array_like, optional
        Cores c_k and deltas d_k as (along, across) in the same frame. Default is none.
    theta_inf_rad : float, optional
        Orientation far from all singular points. Default is 0.0 (ridges running across).

    Returns
    -------
    theta : ndarray of float64
        Ridge orientation in [-pi/2, pi/2): the angle of the ridge tangent from axis 1
        (across) towards axis 0 (along); tangent (along, across) = (sin theta, cos theta).

    Notes
    -----
    Each core turns the orientation by +pi along a closed loop around it (Poincare index
    +1/2), each delta by -pi (index -1/2). Going round a point counter-clockwise in the
    (across, along) plane, the tangent turns by the same amount.

    References
    ----------
    .. [1] B. G. Sherlock and D. M. Monro, "A model for interpreting fingerprint topology",
       Pattern Recognition 26(7):1047-1055, 1993. doi:10.1016/0031-3203(93)90006-I
       (DOI from memory).

    Examples
    --------
    >>> import numpy as np
    >>> th = orientation_field([0.0, 0.0], [100.0, -100.0], cores_um=[(0.0, 0.0)])
    >>> np.round(np.degrees(th), 6).tolist()   # half the argument: 0 and 90 degrees
    [0.0, -90.0]
    """
    along = check_array(along_um, name="along_um")
    across = check_array(across_um, name="across_um")
    try:
        along, across = np.broadcast_arrays(along, across)
    except ValueError as exc:
        raise ValueError(f"along_um and across_um must broadcast together; got shapes "
                         f"{np.shape(along)} and {np.shape(across)}") from exc
    cores = _points(cores_um, "cores_um")
    deltas = _points(deltas_um, "deltas_um")
    theta_inf = _real(theta_inf_rad, "theta_inf_rad")
    z = across + 1j * along
    total = np.zeros(z.shape)
    for sign, points in ((1.0, cores), (-1.0, deltas)):
        for a, c in points:
            total += sign * np.angle(z - (c + 1j * a))
    return _wrap_half_pi(theta_inf + 0.5 * total)


def _wrap_half_pi(theta):
    return (np.asarray(theta) + np.pi / 2) % np.pi - np.pi / 2


def _points(value, name):
    arr = check_array(value, name=name)
    if arr.size == 0:
        return np.zeros((0, 2))
    if arr.ndim == 1 and arr.shape == (2,):
        arr = arr[None, :]
    if arr.ndim != 2 or arr.shape[1] != 2:
        raise ValueError(f"{name} must have shape (n, 2) of (along, across) points; "
                         f"got {arr.shape}")
    return arr


def _real(value, name):
    return check_real(value, name=name)


def _arch_orientation(along_um, across_um, length_um, width_um):
    """Smooth analytic arch: ridges run across and bulge towards the fingertip in the middle.

    The ridge lines are the level sets of g(a, x) = a + h(a) exp(-x^2 / (2 s^2)): near x = 0
    they bow towards row 0 by up to h, flattening away from the centre line; h peaks in the
    middle of the finger. The tangent is perpendicular to grad g.
    """
    s = 0.20 * width_um
    a0 = 0.55 * length_um
    h = 0.16 * length_um * np.exp(-((along_um - a0) / (0.35 * length_um)) ** 2)
    dh = h * (-2.0 * (along_um - a0) / (0.35 * length_um) ** 2)
    e = np.exp(-across_um ** 2 / (2 * s * s))
    g_a = 1.0 + dh * e                       # dg/d(along)
    g_x = -h * across_um / (s * s) * e       # dg/d(across)
    # tangent t = (along, across) = (-g_x, g_a) / norm;  theta = atan2(t_along, t_across)
    return _wrap_half_pi(np.arctan2(-g_x, g_a))


def _singular_points(pattern, length_um, width_um, rng):
    """Cores and deltas (along, across) in um for a pattern class, jittered by ``rng``."""
    ref = np.array([0.42 * length_um, 0.5 * width_um]) + rng.normal(0.0, 300.0, 2)

    def jit(points):
        points = np.asarray(points, dtype=float).reshape(-1, 2)
        return ref + points * 1000.0 + rng.normal(0.0, 250.0, points.shape)

    if pattern == "arch":
        return np.zeros((0, 2)), np.zeros((0, 2))
    if pattern == "tented_arch":
        return jit([(0.0, 0.0)]), jit([(2.0, 0.0)])
    if pattern in ("left_loop", "right_loop"):
        # The delta sits below the core on the side opposite to the loop's opening.
        side = -1.0 if pattern == "right_loop" else 1.0
        return jit([(0.0, 0.2 * -side)]), jit([(3.2, 2.4 * side)])
    if pattern == "whorl":
        tilt = rng.uniform(-0.3, 0.3)
        return (jit([(-0.65, -tilt), (0.65, tilt)]),
                jit([(3.8, -4.0), (3.8, 4.0)]))
    # twin_loop: two cores offset diagonally, two deltas left and right below
    flip = 1.0 if rng.random() < 0.5 else -1.0
    return (jit([(-1.0, -0.9 * flip), (1.0, 0.9 * flip)]),
            jit([(4.2, -4.2), (4.2, 4.2)]))


# ---------------------------------------------------------------------------------------------
# period map


def _smooth_noise(shape, sigma_cells, rng):
    """Zero-mean, unit-std Gaussian-filtered white noise."""
    field = ndimage.gaussian_filter(rng.standard_normal(shape), sigma_cells, mode="wrap")
    std = field.std()
    return (field - field.mean()) / (std if std > 0 else 1.0)


def _period_map(shape, spacing_um, mean_um, range_um, rng, interior):
    """Smooth random ridge period in ``range_um`` whose mean over ``interior`` is ``mean_um``."""
    lo, hi = range_um
    sigma = 3000.0 / spacing_um      # correlation length of a few mm (assumed)
    n = _smooth_noise(shape, sigma, rng)
    n = (n - n[interior].mean()) / max(n[interior].std(), 0.5)
    # tanh keeps the variation smooth and bounded; the amplitude is a fraction of the
    # smaller half-width of the range, and a final shift puts the mean over the visible
    # grid (not the growth margin) on the request.
    amp = 0.8 * min(mean_um - lo, hi - mean_um)
    period = mean_um + amp * np.tanh(0.8 * n)
    period += mean_um - period[interior].mean()
    return np.clip(period, lo, hi)


# ---------------------------------------------------------------------------------------------
# ridge growth (iterative Gabor filtering)


def _gabor_bank(shape, d_along, d_across, freqs, n_orient):
    """Real, even Gabor transfer functions (n_orient, n_freq, H, W//2+1) for rfft2 grids.

    Orientation bin o has ridge tangent angle theta_o = o*pi/n_orient; the filter passes the
    wave vector +-f*n with n = (cos theta, -sin theta) (along, across), the ridge normal.
    """
    ka = sp_fft.fftfreq(shape[0], d=d_along)[:, None]      # cycles/um along
    kx = sp_fft.rfftfreq(shape[1], d=d_across)[None, :]    # cycles/um across
    bank = np.empty((n_orient, len(freqs), shape[0], shape[1] // 2 + 1))
    for o in range(n_orient):
        th = o * np.pi / n_orient
        n_a, n_x = np.cos(th), -np.sin(th)
        k_n = ka * n_a + kx * n_x               # component along the ridge normal
        k_t = ka * np.sin(th) + kx * np.cos(th)  # component along the ridge tangent
        for i, f in enumerate(freqs):
            s_n = 1.0 / (2 * np.pi * _SIGMA_NORMAL / f)   # frequency-domain std
            s_t = 1.0 / (2 * np.pi * _SIGMA_TANGENT / f)
            tang = np.exp(-k_t ** 2 / (2 * s_t ** 2))
            g = (np.exp(-(k_n - f) ** 2 / (2 * s_n ** 2))
                 + np.exp(-(k_n + f) ** 2 / (2 * s_n ** 2))) * tang
            # remove the (small) DC and low-frequency leak so that no blobs can grow
            g *= 1.0 - np.exp(-(ka ** 2 + kx ** 2) / (2 * (0.35 * f) ** 2))
            bank[o, i] = g
    return bank


def _bin_weights(value, n_bins, periodic):
    """Linear interpolation weights (n_bins, ...) of a continuous bin coordinate."""
    lo = np.floor(value)
    w1 = value - lo
    lo = lo.astype(int)
    hi = lo + 1
    if periodic:
        lo %= n_bins
        hi %= n_bins
    else:
        lo = np.clip(lo, 0, n_bins - 1)
        hi = np.clip(hi, 0, n_bins - 1)
    weights = np.zeros((n_bins,) + np.shape(value))
    for b in range(n_bins):
        weights[b] = np.where(lo == b, 1.0 - w1, 0.0) + np.where(hi == b, w1, 0.0)
    return weights


def _grow_ridges(theta, period_um, d_along, d_across, rng, isotropic=None):
    """Iterative Gabor growth on the (coarse) grid of ``theta`` and ``period_um``.

    ``isotropic`` (same shape, in [0, 1]) blends in a ring (orientation-free) band-pass
    filter: near singular points the orientation turns faster than an elongated Gabor
    filter can follow, and letting the pattern choose its own orientation there makes the
    ridges turn round the core instead of converging on it.
    """
    shape = theta.shape
    p_lo, p_hi = float(period_um.min()), float(period_um.max())
    if _N_FREQ_BINS > 1 and p_hi > p_lo * 1.02:
        freqs = np.geomspace(1.0 / p_hi, 1.0 / p_lo, _N_FREQ_BINS)
    else:
        freqs = np.array([1.0 / np.mean(period_um)])
    fshape = (sp_fft.next_fast_len(shape[0], real=True), sp_fft.next_fast_len(shape[1], real=True))
    bank = _gabor_bank(fshape, d_along, d_across, freqs, _N_ORIENT_BINS)
    # per-cell blending weights between neighbouring bins
    w_o = _bin_weights((theta % np.pi) / (np.pi / _N_ORIENT_BINS), _N_ORIENT_BINS, True)
    if len(freqs) > 1:
        fpos = np.log(1.0 / period_um / freqs[0]) / np.log(freqs[1] / freqs[0])
        w_f = _bin_weights(np.clip(fpos, 0, len(freqs) - 1), len(freqs), False)
    else:
        w_f = np.ones((1,) + shape)
    used = [o for o in range(_N_ORIENT_BINS) if w_o[o].any()]
    sig_norm = 1.0 * np.mean(period_um) / np.sqrt(d_along * d_across)  # ~1 period, in cells

    if isotropic is not None and np.any(isotropic > 0):
        ka = sp_fft.fftfreq(fshape[0], d=d_along)[:, None]
        kx = sp_fft.rfftfreq(fshape[1], d=d_across)[None, :]
        kr = np.hypot(ka, kx)
        rings = np.array([np.exp(-(kr - f) ** 2 / (2 * (f / (2 * np.pi * _SIGMA_NORMAL)) ** 2))
                          * (1.0 - np.exp(-kr ** 2 / (2 * (0.35 * f) ** 2))) for f in freqs])
    else:
        isotropic = None

    x = rng.standard_normal(shape)
    for it in range(_N_ITER):
        spec = sp_fft.rfft2(x, s=fshape)
        out = np.zeros(shape)
        for o in used:
            acc = np.zeros(shape)
            for i in range(len(freqs)):
                y = sp_fft.irfft2(spec * bank[o, i], s=fshape)[: shape[0], : shape[1]]
                acc += w_f[i] * y
            out += w_o[o] * acc
        if isotropic is not None:
            iso = np.zeros(shape)
            for i in range(len(freqs)):
                iso += w_f[i] * sp_fft.irfft2(spec * rings[i], s=fshape)[: shape[0], : shape[1]]
            # ring filters pass every orientation: scale to the oriented filters' gain on
            # a pattern that fits (about the tangential width ratio)
            out = (1.0 - isotropic) * out + isotropic * iso * _RING_GAIN
        # local contrast normalisation (unit local rms), then a soft clip: the growth
        # saturates to ridge/valley plateaus like the clipping step of Cappelli et al.
        rms = np.sqrt(ndimage.gaussian_filter(out * out, sig_norm, mode="reflect"))
        out /= rms + 1e-6 * rms.max() + 1e-300
        gain = 1.5 if it < _N_ITER - 1 else 1.0
        x = np.tanh(gain * out)
    return out   # the last filtered, normalised field (smooth, ~unit rms)


def _monogenic(field):
    """(field, R1 field, R2 field): the field and its two Riesz transforms, by FFT.

    Felsberg & Sommer, "The monogenic signal", IEEE Trans. Signal Processing 49(12):3136-3144,
    2001: R_j has transfer function -i k_j / |k|; for a locally 1-D band-pass pattern
    A cos(phi), sqrt(f^2 + R1^2 + R2^2) = A.
    """
    shape = field.shape
    fshape = (sp_fft.next_fast_len(shape[0], real=True), sp_fft.next_fast_len(shape[1], real=True))
    spec = sp_fft.rfft2(field, s=fshape)
    k0 = sp_fft.fftfreq(fshape[0])[:, None]
    k1 = sp_fft.rfftfreq(fshape[1])[None, :]
    mod = np.hypot(k0, k1)
    mod[0, 0] = 1.0
    r = [sp_fft.irfft2(spec * (-1j * k / mod), s=fshape)[: shape[0], : shape[1]]
         for k in (k0, k1)]
    return field, r[0], r[1]


# ---------------------------------------------------------------------------------------------
# pad footprint and pressed air gap (shared by make_finger and texture_finger)


def _pad(h, w, spacing, pressure):
    """(contact, lift) of the elliptical contact pad centred on an (h, w) grid of ``spacing`` um.

    contact is 1 on the pad, 0 off it, a smoothstep across a 0.4 mm edge; lift (um) is the
    skin curving away from the sensor past the start of the edge, s^2 / (2 R), R = 8 mm.
    """
    length_um, width_um = h * spacing, w * spacing
    fa = (np.arange(h) * spacing)[:, None]
    fx = (np.arange(w) * spacing)[None, :]
    half_x = 0.5 * width_um * (0.55 + 0.4 * pressure)
    half_a = 0.5 * length_um * (0.6 + 0.35 * pressure)
    ya = fa - 0.5 * (length_um - spacing)
    yx = fx - 0.5 * (width_um - spacing)
    u, v = yx / half_x, ya / half_a
    rho = np.sqrt(u * u + v * v)
    grad = np.sqrt((u / half_x) ** 2 + (v / half_a) ** 2)
    # first-order distance to the ellipse, exact on its axes; finite at the centre
    dist = np.where(rho > 1e-9, (rho - 1.0) * rho / np.maximum(grad, 1e-30),
                    -min(half_x, half_a))
    t = np.clip((dist + _PAD_EDGE_UM) / (2 * _PAD_EDGE_UM), 0.0, 1.0)
    contact = 1.0 - t * t * (3.0 - 2.0 * t)                        # smoothstep
    lift = np.maximum(dist + _PAD_EDGE_UM, 0.0) ** 2 / (2 * _FINGER_RADIUS_UM)
    return contact, lift


def _pressed_gap(height, depth, pressure, contact, lift):
    """Air gap (um) of normal skin pressed on a flat sensor: truncated valleys plus the lift.

    Pressed skin flattens where the undeformed surface would pass through the flat sensor
    (truncation model of a soft surface on a rigid flat, as in Greenwood & Williamson's
    treatment of contact; from memory): on the pad the skin is pushed in by an indentation
    that grows with pressure, so ridge crests become contact plateaus. At pressure 0.5 the
    plateaus are about 40 % of the ridge period (about 180 um at 460 um), inside the 100 to
    300 um ridge widths of the Handbook of Fingerprint Recognition (2nd ed., ch. 3).
    """
    indent = depth * (_INDENT_MIN + _INDENT_SPAN * pressure) * contact
    return np.maximum((depth - height) - indent, 0.0) + lift


# ---------------------------------------------------------------------------------------------
# public generator


def make_finger(pattern="right_loop", *, size_mm=(20.0, 14.0), spacing_um=12.7,
                mean_period_um=460.0, period_range_um=(350.0, 600.0), valley_depth_um=50.0,
                pressure=0.5, skin="normal", rng=None):
    """Grow a synthetic fingertip surface of a given pattern class.

    Parameters
    ----------
    pattern : str, optional
        Pattern class, one of :data:`PATTERNS`: ``"arch"``, ``"tented_arch"``,
        ``"left_loop"``, ``"right_loop"`` (loops named by the side they open towards, as seen
        in the image with the fingertip at the top), ``"whorl"``, ``"twin_loop"``.
        Default is ``"right_loop"``.
    size_mm : (float, float), optional
        Extent (along, across) of the grid in mm, each in [1, 60]. Default is (20.0, 14.0).
    spacing_um : float, optional
        Grid spacing in um; at most a quarter of the smallest period. Default is 12.7
        (4x oversampling of the 50.8 um, 500 ppi pitch).
    mean_period_um : float, optional
        Mean ridge period in um, strictly inside ``period_range_um``. Default is 460.0.
    period_range_um : (float, float), optional
        Range (low, high) of the smooth random period variation, um, 100 <= low < high <= 2000.
        Default is (350.0, 600.0).
    valley_depth_um : float, optional
        Ridge height from valley floor to crest, um. Default is 50.0.
    pressure : float, optional
        Pressure in [0, 1]; the contact pad grows with it. Default is 0.5.
    skin : str, optional
        ``"normal"``, ``"dry"`` (random patches along the ridges lifted by a few um, so ridge
        contact is broken) or ``"wet"`` (valleys near the ridge contact partly filled with
        moisture, ``fluid_um > 0``). Default is ``"normal"``.
    rng : None, int or numpy.random.Generator, optional
        Seed or generator for every random draw. Default is None (fresh entropy).

    Returns
    -------
    Finger
        The maps and the parameters used.

    Raises
    ------
    ValueError
        For a value out of range (the message names the argument).
    TypeError
        For an argument of the wrong kind.

    Notes
    -----
    *Orientation*: the zero-pole model [1]_ (:func:`orientation_field`, theta_inf = 0, ridges
    running across far from the singular points), cores and deltas placed per class near the
    middle of the finger and jittered by the seed; the plain arch uses a smooth analytic arch
    field instead. *Ridges*: iterative Gabor filtering of white noise [2]_: each pass filters
    the field with 16 orientation x 3 frequency Gabor filters by FFT, blends the outputs per
    cell by linear interpolation between neighbouring bins, normalises the local contrast and
    soft-clips with tanh; within about 0.8 period of a core or delta the oriented output is
    blended (Gaussian weight) with a ring band-pass filter, so that the pattern turns round
    the singular point instead of converging on it (our addition). The pattern is grown on a
    coarse grid of about 7 samples per mean period and interpolated (bicubic) to the fine
    grid. Ridge endings and bifurcations arise
    where the growing pattern cannot follow the maps with continuous ridges.
    *Surface*: the grown field y and its two Riesz transforms (the monogenic signal [4]_) give
    the local ridge phase; ``ridge`` is its cosine c = y / sqrt(y^2 + R1^2 + R2^2) (unit
    contrast everywhere, sharp minutiae), reshaped by sin(pi/2 clip(c + 0.05 (1 + c)^2, -1, 1)):
    the valleys stay cosine-round, the crests get a small flat top like pressed skin, and the
    slope is continuous. The height is ``valley_depth_um (1 + ridge) / 2``. The 50 um default
    depth is a common modelling choice, not a measured value (no source found). The pad is an
    ellipse centred on the grid, half-widths (0.55 + 0.4 pressure) W/2 across and
    (0.6 + 0.35 pressure) H/2 along, with a 0.4 mm soft edge; beyond it the skin lifts as
    s^2 / (2 R) with R = 8 mm and s the distance past the start of the edge (assumptions).
    Dry skin: smooth random patches over about 35 % of the area lifted by 5 um. Wet skin:
    where the air gap is below a smooth random moisture level (25-55 % of the valley depth)
    the gap is filled, with a soft transition above; only on the pad.

    References
    ----------
    .. [1] B. G. Sherlock and D. M. Monro, "A model for interpreting fingerprint topology",
       Pattern Recognition 26(7):1047-1055, 1993.
    .. [2] R. Cappelli, A. Erol, D. Maio and D. Maltoni, "Synthetic fingerprint-image
       generation", Proc. 15th ICPR, vol. 3, pp. 471-474, 2000.
       doi:10.1109/ICPR.2000.903586 (DOI from memory).
    .. [3] D. Maltoni, D. Maio, A. K. Jain and S. Prabhakar, Handbook of Fingerprint
       Recognition, 2nd ed., Springer 2009, ch. 3 (ridge period about 500 um) and ch. 6.
    .. [4] M. Felsberg and G. Sommer, "The monogenic signal", IEEE Trans. Signal Processing
       49(12):3136-3144, 2001. doi:10.1109/78.969520 (DOI from memory).

    Examples
    --------
    >>> f = make_finger("whorl", size_mm=(6.0, 5.0), rng=1)
    >>> f.shape, tuple(round(v, 3) for v in f.size_mm)
    ((472, 394), (5.994, 5.004))
    >>> bool(f.height_um.min() >= 0.0 and f.height_um.max() <= f.valley_depth_um)
    True
    """
    pattern = check_choice(pattern, PATTERNS, name="pattern")
    skin = check_choice(skin, SKINS, name="skin")
    size = _pair(size_mm, "size_mm")
    for v in size:
        if not 1.0 <= v <= 60.0:
            raise ValueError(f"size_mm must hold two extents in [1, 60] mm; got {size_mm!r}")
    p_lo, p_hi = _pair(period_range_um, "period_range_um")
    if not (100.0 <= p_lo < p_hi <= 2000.0):
        raise ValueError("period_range_um must be (low, high) with 100 <= low < high <= 2000 um; "
                         f"got {period_range_um!r}")
    mean_p = check_positive(mean_period_um, name="mean_period_um")
    if not p_lo < mean_p < p_hi:
        raise ValueError(f"mean_period_um must lie strictly inside period_range_um "
                         f"{(p_lo, p_hi)}; got {mean_period_um!r}")
    spacing = check_positive(spacing_um, name="spacing_um")
    if spacing > p_lo / 4.0:
        raise ValueError(f"spacing_um must be at most a quarter of the smallest period "
                         f"({p_lo / 4.0:g} um for period_range_um low {p_lo:g}); got {spacing_um!r}")
    depth = check_positive(valley_depth_um, name="valley_depth_um")
    pressure = check_in_range(pressure, 0.0, 1.0, name="pressure")
    h = int(round(size[0] * 1000.0 / spacing))
    w = int(round(size[1] * 1000.0 / spacing))
    if h * w > 40_000_000:
        raise ValueError(f"size_mm / spacing_um give {h} x {w} cells; at most 4e7 cells are "
                         f"allowed (use a coarser spacing_um or a smaller size_mm)")
    try:
        gen = np.random.default_rng(rng)
    except (TypeError, ValueError) as exc:
        raise TypeError(f"rng must be None, an int seed or a numpy.random.Generator; "
                        f"got {type(rng).__name__} {rng!r}") from exc

    length_um, width_um = h * spacing, w * spacing
    cores, deltas = _singular_points(pattern, length_um, width_um, gen)

    # coarse grid with a margin of 1.5 periods all round (the Gabor support: FFT wrap-around
    # stays in the margin), covering the fine grid's cell area
    # exactly so that a centre-aligned resize maps one onto the other
    d_c = min(mean_p / _SAMPLES_PER_PERIOD, p_lo / 4.5, length_um / 8, width_um / 8)
    d_c = max(d_c, spacing)
    hc = max(int(round(length_um / d_c)), 8)
    wc = max(int(round(width_um / d_c)), 8)
    da, dx = length_um / hc, width_um / wc            # exact coarse spacings (um)
    m = int(np.ceil(1.5 * p_hi / min(da, dx)))
    ca = (np.arange(-m, hc + m) + 0.5) * da - 0.5 * spacing   # coarse centres in fine coords
    cx = (np.arange(-m, wc + m) + 0.5) * dx - 0.5 * spacing
    theta_c = _orientation(pattern, ca[:, None], cx[None, :], cores, deltas, length_um, width_um)
    interior = (slice(m, m + hc), slice(m, m + wc))
    period_c = _period_map(theta_c.shape, min(da, dx), mean_p, (p_lo, p_hi), gen, interior)
    singular = np.concatenate([cores, deltas]) if len(cores) + len(deltas) else np.zeros((0, 2))
    near = np.zeros(theta_c.shape)
    for a0, x0 in singular:
        d2 = (ca[:, None] - a0) ** 2 + (cx[None, :] - x0) ** 2
        near = np.maximum(near, np.exp(-d2 / (2 * (_RING_RADIUS * mean_p) ** 2)))
    grown = _grow_ridges(theta_c, period_c, da, dx, gen, isotropic=near)
    # monogenic signal (Riesz transform): its amplitude is the local ridge contrast, so the
    # ratio field / amplitude is the cosine of the local ridge phase -- unit contrast
    # everywhere, crisp at minutiae (phase singularities) instead of a grey contrast dip
    parts = [a[m:m + hc, m:m + wc] for a in _monogenic(grown)]
    period_c = period_c[m:m + hc, m:m + wc]

    import cv2   # only this step needs OpenCV

    y, r1, r2 = (cv2.resize(np.ascontiguousarray(a, dtype=np.float64), (w, h),
                            interpolation=cv2.INTER_CUBIC) for a in parts)
    period = cv2.resize(np.ascontiguousarray(period_c), (w, h), interpolation=cv2.INTER_LINEAR)
    amp = np.sqrt(y * y + r1 * r1 + r2 * r2)
    cos_phase = y / np.maximum(amp, 1e-12 * max(float(amp.max()), 1e-300))
    # rounded profile: u = c + a (1 + c)^2 / 4 leaves the valleys (c = -1) unchanged and lifts
    # the crests past 1, so after the clip they are slightly flattened like pressed skin;
    # the sine keeps the slope continuous (0 where the flat top begins)
    u = cos_phase + _CREST_FLATTEN * 0.25 * (1.0 + cos_phase) ** 2
    ridge = np.sin(0.5 * np.pi * np.clip(u, -1.0, 1.0))
    del y, r1, r2, amp, cos_phase, u

    fa = (np.arange(h) * spacing)[:, None]
    fx = (np.arange(w) * spacing)[None, :]
    theta = _orientation(pattern, fa, fx, cores, deltas, length_um, width_um)
    height = depth * 0.5 * (1.0 + ridge)

    # contact pad, the skin curving away off it, and the crests flattened on it
    contact, lift = _pad(h, w, spacing, pressure)
    air_gap = _pressed_gap(height, depth, pressure, contact, lift)
    fluid = np.zeros((h, w))
    if skin == "dry":
        # patches about a ridge width across (150 um correlation length, assumed), drawn on
        # the coarse grid (several samples per patch) and interpolated
        noise = cv2.resize(_smooth_noise((hc, wc), 150.0 / min(da, dx), gen), (w, h),
                           interpolation=cv2.INTER_CUBIC)
        thr = np.quantile(noise, 1.0 - _DRY_AREA)
        patches = 0.5 * (1.0 + np.tanh((noise - thr) / 0.15))
        air_gap = air_gap + _DRY_LIFT_UM * patches
    elif skin == "wet":
        level_c = _smooth_noise((hc, wc), 2000.0 / min(da, dx), gen)
        lo, hi = _WET_LEVEL
        level_c = depth * (lo + (hi - lo) * 0.5 * (1.0 + np.tanh(level_c)))
        level = cv2.resize(level_c, (w, h), interpolation=cv2.INTER_LINEAR)
        soft = 0.1 * depth
        fill = 0.5 * (1.0 - np.tanh((air_gap - level) / soft))
        fluid = np.clip(air_gap * fill * contact, 0.0, air_gap)
    return Finger._adopt(pattern=pattern, spacing_um=spacing, ridge=ridge, height_um=height,
                         contact=contact, air_gap_um=np.maximum(air_gap, 0.0), fluid_um=fluid,
                         orientation_rad=theta, period_um=period, cores_um=cores,
                         deltas_um=deltas, valley_depth_um=depth, pressure=pressure, skin=skin)


# ---------------------------------------------------------------------------------------------
# fingers from a given texture


_MAD_TO_STD = 1.4826          # MAD of a normal distribution x 1.4826 = its std (1 / Phi^-1(3/4))
_MAX_PIXEL_UM = 200.0         # coarsest accepted texture pixel (4 sensor pitches of 50.8 um)
_MIN_IMAGE_PX = 16            # smallest accepted image side
_SPECTRUM_CROP_PX = 1024      # the period is estimated on a central crop at most this big


def with_crease(finger, *, at_mm, width_mm=0.6, depth_um=None, edge_um=100.0):
    """The same finger with a flexion crease: a band across it without ridges.

    A crease (the skin folding at a joint, or a scar) is a groove: no ridges, the skin a
    little below the valley floor, so nothing in it touches the sensor. Within the band the
    ridges fade out (cosine edges of ``edge_um``) and the air gap becomes the valley floor's
    plus ``depth_um``. A band at least as wide as a strip's rows leaves frames with no texture
    at all in the middle of a swipe.

    Parameters
    ----------
    finger : Finger
        From :func:`make_finger` or :func:`texture_finger`.
    at_mm : float
        Centre of the band along the finger (axis 0), mm from the centre of the first grid row.
    width_mm : float, optional
        Width of the ridge-free band (between the edges' midpoints), mm, > 0. Default is 0.6.
    depth_um : float or None, optional
        Depth of the groove below the valley floor, um, >= 0. None: the finger's valley depth.
    edge_um : float, optional
        Width of each cosine edge, um, >= 0. Default is 100.

    Returns
    -------
    Finger

    Examples
    --------
    >>> f = make_finger("arch", size_mm=(8.0, 6.0), rng=0)
    >>> g = with_crease(f, at_mm=4.0, width_mm=0.8)
    >>> mid = int(round(4000.0 / f.spacing_um))
    >>> bool(g.height_um[mid].max() == 0.0 and (g.air_gap_um[mid] >= f.valley_depth_um).all())
    True
    >>> bool(np.array_equal(g.air_gap_um[:100], f.air_gap_um[:100]))
    True
    """
    if not isinstance(finger, Finger):
        raise TypeError(f"finger must be a Finger (from make_finger or texture_finger); "
                        f"got {type(finger).__name__}")
    at = check_real(at_mm, name="at_mm") * 1000.0
    width = check_positive(width_mm, name="width_mm") * 1000.0
    depth = finger.valley_depth_um if depth_um is None else check_positive(
        depth_um, name="depth_um", allow_zero=True)
    edge = check_positive(edge_um, name="edge_um", allow_zero=True)
    y = np.arange(finger.ridge.shape[0], dtype=np.float64)[:, None] * finger.spacing_um
    # 1 inside the band, 0 outside, cosine ramps of ``edge`` centred on its limits
    d = np.abs(y - at) - 0.5 * width
    ramp = np.clip(0.5 - d / edge, 0.0, 1.0) if edge > 0 else (d <= 0).astype(np.float64)
    w = 0.5 - 0.5 * np.cos(np.pi * ramp)
    floor = finger.air_gap_um + finger.height_um          # the valley floor's gap
    gap = (1.0 - w) * finger.air_gap_um + w * (floor + depth)
    fields = {name: getattr(finger, name) for name in finger.__dataclass_fields__}
    fields.update(ridge=(1.0 - w) * finger.ridge - w, height_um=(1.0 - w) * finger.height_um,
                  air_gap_um=gap, fluid_um=np.minimum(finger.fluid_um, gap))
    return Finger(**fields)


def texture_finger(image, *, pixel_um=25.4, valley_depth_um=50.0, pressure=0.5, highpass_px=16.0):
    """Build a fingertip surface whose ridge map is a given grey-level image.

    The image (e.g. a photographic texture such as ``skimage.data.gravel()``) replaces the
    grown ridge pattern of :func:`make_finger`; the pad footprint, the skin lifting off the pad,
    the indentation and the air gap are those of :func:`make_finger`, for normal skin.

    Parameters
    ----------
    image : (H, W) array_like of real numbers
        Grey levels, bright = ridge crest; rows (axis 0) run along the finger, i.e. along the
        swipe, row 0 at the fingertip. Any real dtype (uint, int, float), finite, at least
        16 x 16, at most 4e7 pixels.
    pixel_um : float, optional
        Size of one image pixel on the finger, um, in (0, 200]; it is the grid spacing of the
        result (one pixel = one grid cell). Default is 25.4 (half the 50.8 um, 500 ppi pitch,
        so single-pixel detail is finer than the sensor pitch).
    valley_depth_um : float, optional
        Height from the darkest valley floor to the brightest crest, um. Default is 50.0.
    pressure : float, optional
        Pressure in [0, 1]; the contact pad grows with it. Default is 0.5.
    highpass_px : float or None, optional
        Std of the Gaussian blur, in pixels, subtracted to remove slow illumination changes
        (structure coarser than about 2 pi ``highpass_px`` pixels is suppressed). None or 0
        keeps the image as it is (only its median is removed). Default is 16.0.

    Returns
    -------
    Finger
        ``pattern="texture"``, ``skin="normal"``, ``spacing_um=pixel_um``, ``fluid_um`` all
        zero, no cores or deltas; ``orientation_rad`` and ``period_um`` estimated from the
        image (see Notes).

    Raises
    ------
    ValueError
        For an image of the wrong shape, too small or too big, with NaN or inf or without
        contrast, or a number out of range (the message names the argument).
    TypeError
        For a non-numeric image or an argument of the wrong kind.

    Notes
    -----
    *Ridge map*: the image minus its Gaussian blur of std ``highpass_px`` (reflected borders),
    minus the median, divided by the robust spread 1.4826 x MAD (median absolute deviation,
    the consistent estimate of a normal std [2]_; the plain std if the MAD is 0), squashed
    smoothly into [-1, 1] by tanh: one robust std maps to tanh(1) = 0.76. Half of the pixels
    lie on each side of 0, so ridges and valleys cover about equal areas as on a finger.
    The height is ``valley_depth_um (1 + ridge) / 2``, the convention of :func:`make_finger`.
    *Surface*: the elliptical pad centred on the grid, its soft edge, the lift of the skin off
    it and the flattening of the crests by the pressure-dependent indentation are exactly
    those of :func:`make_finger` (shared code); skin condition normal only.
    *Orientation*: the gradient structure tensor [1]_ of the high-passed image (Gaussian
    derivatives of std 1 pixel, tensor averaged with a Gaussian of std one dominant period,
    bounded to 2..32 pixels), in the convention of :class:`Finger` (ridge tangent from axis 1
    towards axis 0, in [-pi/2, pi/2)). On an isotropic texture the orientation is defined
    but carries little meaning; where the image is flat it is arbitrary (-pi/2).
    *Period*: one dominant period filled everywhere: the peak of the radially averaged power
    spectrum of the Hann-windowed, high-passed image (central crop of at most 1024 x 1024
    pixels; the two lowest frequency rings are skipped), refined by the power-weighted mean
    radial frequency within two rings of the peak; accurate to about 1 % on a sinusoid.

    Such a finger is a test object for the stitcher on real, irregular texture, including
    detail finer than the sensor pitch; like every synthetic print of this module it is for
    testing only.

    References
    ----------
    .. [1] J. Bigun and G. H. Granlund, "Optimal orientation detection of linear symmetry",
       Proc. 1st International Conference on Computer Vision (ICCV), London, 1987,
       pp. 433-438 (details from memory).
    .. [2] F. R. Hampel, "The influence curve and its role in robust estimation", Journal of
       the American Statistical Association 69(346):383-393, 1974 (details from memory).

    Examples
    --------
    A sinusoid of period 16 pixels whose ridges run at 30 degrees from axis 1 towards axis 0:

    >>> import numpy as np
    >>> a, x = np.mgrid[0:64, 0:64]
    >>> th = np.radians(30.0)
    >>> f = texture_finger(np.cos(2 * np.pi * (a * np.cos(th) - x * np.sin(th)) / 16.0))
    >>> f.shape, f.pattern, f.spacing_um
    ((64, 64), 'texture', 25.4)
    >>> round(float(f.period_um[0, 0] / f.spacing_um)), round(float(np.degrees(
    ...     np.median(f.orientation_rad[16:48, 16:48]))))      # period (pixels), angle (deg)
    (16, 30)

    A photographic texture bundled with scikit-image:

    >>> from skimage import data
    >>> g = texture_finger(data.gravel()[:128, :128], pixel_um=25.4)
    >>> g.size_mm, bool(g.air_gap_um.min() >= 0.0 and g.fluid_um.max() == 0.0)
    ((3.2512, 3.2512), True)
    """
    img = _texture_image(image)
    spacing = check_positive(pixel_um, name="pixel_um")
    if spacing > _MAX_PIXEL_UM:
        raise ValueError(f"pixel_um must be in (0, {_MAX_PIXEL_UM:g}] um; got {pixel_um!r}")
    depth = check_positive(valley_depth_um, name="valley_depth_um")
    pressure = check_in_range(pressure, 0.0, 1.0, name="pressure")
    sigma = check_positive(highpass_px, name="highpass_px", allow_zero=True, allow_none=True)
    h, w = img.shape

    # remove the slow illumination (reflected borders: no dark frame around the image)
    if sigma:
        img = img - ndimage.gaussian_filter(img, sigma, mode="reflect")
    z = img - np.median(img)
    spread = _MAD_TO_STD * float(np.median(np.abs(z)))
    if not spread > 0.0:
        spread = float(z.std())     # e.g. a two-level image with one level in the majority
    if not spread > 0.0:
        raise ValueError("image must have some contrast (after the high-pass of highpass_px="
                         f"{highpass_px!r}); got a flat {h} x {w} image")
    z /= spread
    ridge = np.tanh(z)              # smooth and bounded: heights stay in [0, depth]
    height = depth * 0.5 * (1.0 + ridge)

    contact, lift = _pad(h, w, spacing, pressure)
    air_gap = _pressed_gap(height, depth, pressure, contact, lift)

    period_px = _dominant_period_px(z)
    theta = _structure_orientation(z, min(max(period_px, 2.0), 32.0))
    return Finger._adopt(pattern="texture", spacing_um=spacing, ridge=ridge, height_um=height,
                         contact=contact, air_gap_um=air_gap, fluid_um=np.zeros((h, w)),
                         orientation_rad=theta, period_um=np.full((h, w), period_px * spacing),
                         cores_um=np.zeros((0, 2)), deltas_um=np.zeros((0, 2)),
                         valley_depth_um=depth, pressure=pressure, skin="normal")


def _texture_image(image):
    """The image as a float64 (H, W) array, after checking kind, shape, size and finiteness."""
    arr = np.asarray(image)
    if arr.dtype.kind not in "uif":
        raise TypeError(f"image must be a real numeric array (uint, int or float); got dtype "
                        f"{arr.dtype} ({type(image).__name__})")
    if arr.ndim != 2:
        raise ValueError(f"image must be a 2-D (H, W) grey-level array with rows along the "
                         f"finger; got {arr.ndim} dimension(s), shape {arr.shape}")
    if min(arr.shape) < _MIN_IMAGE_PX:
        raise ValueError(f"image must be at least {_MIN_IMAGE_PX} x {_MIN_IMAGE_PX} pixels; "
                         f"got shape {arr.shape}")
    if arr.size > 40_000_000:
        raise ValueError(f"image must have at most 4e7 pixels; got shape {arr.shape}")
    arr = arr.astype(np.float64)     # own copy, also for float64 input
    if not np.isfinite(arr).all():
        n_bad = int(arr.size - np.count_nonzero(np.isfinite(arr)))
        raise ValueError(f"image must be finite; got {n_bad} NaN or inf value(s)")
    return arr


def _dominant_period_px(field):
    """Dominant period (pixels): peak of the radially averaged power spectrum of ``field``."""
    h, w = field.shape
    ch, cw = min(h, _SPECTRUM_CROP_PX), min(w, _SPECTRUM_CROP_PX)
    a = field[(h - ch) // 2:(h - ch) // 2 + ch, (w - cw) // 2:(w - cw) // 2 + cw]
    # Hann window against leakage from the borders; remove the windowed mean so DC is 0
    win = np.outer(np.hanning(ch), np.hanning(cw))
    a = (a - (a * win).sum() / win.sum()) * win
    power = (np.abs(sp_fft.rfft2(a)) ** 2).ravel()
    r = np.hypot(sp_fft.fftfreq(ch)[:, None], sp_fft.rfftfreq(cw)[None, :]).ravel()
    dr = 1.0 / min(ch, cw)                       # ring width: the coarser frequency step
    ring = np.rint(r / dr).astype(np.intp)
    n_ring = int(0.5 / dr) + 1                   # up to Nyquist along the shorter side
    keep = ring < n_ring
    profile = (np.bincount(ring[keep], power[keep], n_ring)
               / np.maximum(np.bincount(ring[keep], minlength=n_ring), 1))
    # rings 0 and 1 hold the DC and the Hann main lobe around it
    k = 2 + int(np.argmax(profile[2:]))
    near = keep & (np.abs(r / dr - k) <= 2.0)
    f = float((r[near] * power[near]).sum() / max(float(power[near].sum()), 1e-300))
    return 1.0 / f if f > 0.0 else 1.0 / (k * dr)


def _structure_orientation(field, sigma_px):
    """Ridge orientation (Finger convention) from the gradient structure tensor of ``field``."""
    g_a = ndimage.gaussian_filter(field, 1.0, order=(1, 0), mode="reflect")
    g_x = ndimage.gaussian_filter(field, 1.0, order=(0, 1), mode="reflect")
    j_xx = ndimage.gaussian_filter(g_x * g_x, sigma_px, mode="reflect")
    j_aa = ndimage.gaussian_filter(g_a * g_a, sigma_px, mode="reflect")
    j_ax = ndimage.gaussian_filter(g_a * g_x, sigma_px, mode="reflect")
    # doubled angle of the dominant gradient (from axis 1 towards axis 0): averaging the
    # tensor, not the gradients, keeps opposite gradients across a ridge from cancelling
    phi = 0.5 * np.arctan2(2.0 * j_ax, j_xx - j_aa)
    return _wrap_half_pi(phi + 0.5 * np.pi)     # ridges run perpendicular to the gradient


def _orientation(pattern, along, across, cores, deltas, length_um, width_um):
    if pattern == "arch":
        return _arch_orientation(along, across - 0.5 * width_um, length_um, width_um)
    return orientation_field(along, across, cores_um=cores, deltas_um=deltas)


def _pair(value, name):
    try:
        items = tuple(value)
    except TypeError:
        raise TypeError(f"{name} must be a pair of numbers (along, across) or (low, high); "
                        f"got {type(value).__name__} {value!r}") from None
    if len(items) != 2:
        raise ValueError(f"{name} must hold exactly 2 numbers; got {len(items)} ({value!r})")
    return tuple(check_positive(v, name=name) for v in items)
