"""Tests of the synthetic finger (stripstitch.simulate.finger).

The generated ridge image is checked with outside estimators (tests/_singular.py: gradient
structure tensor, Poincare index, crossing number, FFT peak; scikit-image skeletonize and
structure_tensor), not against the maps that produced it.
"""

from __future__ import annotations

import cmath
import dataclasses
import math
import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import ndimage

sys.path.insert(0, str(Path(__file__).parent))
from _singular import (count_minutiae, count_singular_points, estimate_orientation,  # noqa: E402
                       fft_peak_period, poincare_index)

from stripstitch.simulate.finger import (PATTERNS, SKINS, Finger, make_finger,  # noqa: E402
                                         orientation_field, texture_finger, with_crease)

_CACHE = {}


def finger(pattern, **kw):
    """Cached make_finger (the tests only read the read-only result)."""
    key = (pattern, tuple(sorted(kw.items())))
    if key not in _CACHE:
        _CACHE[key] = make_finger(pattern, **kw)
    return _CACHE[key]


# --------------------------------------------------------------------------------------------
# zero-pole orientation model

def _direct_zero_pole(along, across, cores, deltas, theta_inf=0.0):
    # Sherlock & Monro, Pattern Recognition 26(7):1047-1055 (1993):
    # theta(z) = theta_inf + 1/2 [sum arg(z - c_k) - sum arg(z - d_k)], z = x + iy; here
    # x = across, y = along. Evaluated point by point with cmath.phase as an independent check.
    z = complex(across, along)
    s = sum(cmath.phase(z - complex(c[1], c[0])) for c in cores)
    s -= sum(cmath.phase(z - complex(d[1], d[0])) for d in deltas)
    return theta_inf + 0.5 * s


def test_orientation_field_matches_published_formula():
    rng = np.random.default_rng(11)
    cores = rng.uniform(-2000, 2000, (2, 2))
    deltas = rng.uniform(-2000, 2000, (2, 2))
    pts = rng.uniform(-5000, 5000, (25, 2))
    got = orientation_field(pts[:, 0], pts[:, 1], cores_um=cores, deltas_um=deltas,
                            theta_inf_rad=0.3)
    want = np.array([_direct_zero_pole(a, x, cores, deltas, 0.3) for a, x in pts])
    # orientations are defined modulo pi: compare doubled angles
    np.testing.assert_allclose(np.cos(2 * (got - want)), 1.0, atol=1e-12)
    assert np.all((got >= -np.pi / 2) & (got < np.pi / 2))


def test_orientation_field_symmetries():
    # single core at the origin: theta = arg(z)/2 (Sherlock & Monro 1993, eq. for one zero)
    th = orientation_field([0.0, 100.0, 0.0], [100.0, 0.0, -100.0], cores_um=[(0.0, 0.0)])
    np.testing.assert_allclose(th, [0.0, np.pi / 4, -np.pi / 2], atol=1e-12)
    # core above a delta on one vertical line (tented arch): mirror symmetry across that
    # line, theta(a, -x) = -theta(a, x) (follows from arg(conj z) = -arg z)
    rng = np.random.default_rng(5)
    a, x = rng.uniform(-3000, 3000, 50), rng.uniform(-3000, 3000, 50)
    kw = dict(cores_um=[(0.0, 0.0)], deltas_um=[(1500.0, 0.0)])
    left, right = orientation_field(a, -x, **kw), orientation_field(a, x, **kw)
    np.testing.assert_allclose(np.cos(2 * (left + right)), 1.0, atol=1e-12)
    # a balanced core/delta pair leaves the far field at theta_inf
    far = orientation_field([1e9], [1e9], theta_inf_rad=0.2, **kw)
    np.testing.assert_allclose(far, 0.2, atol=1e-6)


def test_orientation_field_poincare_index_of_the_model():
    # Poincare index (Kawagoe & Tojo 1984): +1/2 around a core, -1/2 around a delta
    a, x = np.mgrid[-2000:2001:100.0, -2000:2001:100.0]
    th = orientation_field(a, x, cores_um=[(-650.0, -650.0)], deltas_um=[(650.0, 650.0)])
    idx = poincare_index(th)
    assert np.count_nonzero(np.isclose(idx, 0.5)) == 1
    assert np.count_nonzero(np.isclose(idx, -0.5)) == 1
    assert np.count_nonzero(np.abs(idx) > 1e-9) == 2


# --------------------------------------------------------------------------------------------
# ridge period

def _patch_periods(f, patch_mm=2.5):
    n = int(round(patch_mm * 1000 / f.spacing_um))
    meas, local = [], []
    for i in range(0, f.shape[0] - n + 1, n // 2):
        for j in range(0, f.shape[1] - n + 1, n // 2):
            if f.contact[i:i + n, j:j + n].min() < 1.0:
                continue
            meas.append(fft_peak_period(f.ridge[i:i + n, j:j + n], f.spacing_um))
            local.append(f.period_um[i:i + n, j:j + n].mean())
    return np.array(meas), np.array(local)


@pytest.mark.parametrize("mean, prange", [(460.0, (440.0, 480.0)), (380.0, (365.0, 395.0))])
def test_ridge_period_matches_request(mean, prange):
    # Independent measurement: 2-D FFT magnitude peak of 2.5 mm pad patches (common practice;
    # cf. the frequency image of Hong, Wan & Jain, IEEE TPAMI 20(8), 1998). A narrow range keeps
    # the map close to the mean, so the measured median must be within +-10 % of the request.
    f = finger("right_loop", size_mm=(10.0, 10.0), spacing_um=20.0, mean_period_um=mean,
               period_range_um=prange, pressure=1.0, rng=3)
    meas, _ = _patch_periods(f)
    assert len(meas) >= 9
    assert abs(np.median(meas) / mean - 1.0) < 0.10


def test_ridge_period_follows_varying_map():
    # default range 350-600 um: each patch's measured period follows the local map value
    f = finger("left_loop", size_mm=(10.0, 10.0), spacing_um=20.0, pressure=1.0, rng=4)
    meas, local = _patch_periods(f)
    assert 350.0 <= f.period_um.min() and f.period_um.max() <= 600.0
    np.testing.assert_allclose(f.period_um.mean(), 460.0, rtol=1e-6)
    assert abs(np.median(meas / local) - 1.0) < 0.10
    # and the map does vary (smoothly) within the range
    assert f.period_um.max() - f.period_um.min() > 40.0


# --------------------------------------------------------------------------------------------
# singular points from the image

def _singular_from_image(f):
    # 500 ppi image (every 2nd cell at 25.4 um), blocks of 4 px (0.2 mm); gradient structure
    # tensor orientation (Kass & Witkin 1987; Rao 1990), Poincare index (Kawagoe & Tojo 1984;
    # Handbook of Fingerprint Recognition, Maltoni et al. 2009, ch. 3) over the pad interior
    # with a 0.6 mm margin from the pad edge.
    step = int(round(50.8 / f.spacing_um))
    img = f.ridge[::step, ::step]
    block = 4
    theta, _ = estimate_orientation(img, block=block, sigma_smooth=1.5)
    pad = f.contact[::step, ::step][::block, ::block][: theta.shape[0], : theta.shape[1]] > 0.999
    inner = ndimage.binary_erosion(pad, iterations=3)
    n_core, n_delta, cores, deltas = count_singular_points(theta, inner)
    mm = block * step * f.spacing_um / 1000.0
    return n_core, n_delta, (cores + 1.0) * mm, (deltas + 1.0) * mm


@pytest.mark.parametrize("pattern, n_core, n_delta", [
    ("arch", 0, 0), ("tented_arch", 1, 1), ("left_loop", 1, 1), ("right_loop", 1, 1),
    ("whorl", 2, 2), ("twin_loop", 2, 2)])
@pytest.mark.parametrize("seed", [0, 7])
def test_singular_points_in_generated_image(pattern, n_core, n_delta, seed):
    f = finger(pattern, size_mm=(15.0, 14.0), spacing_um=25.4, pressure=1.0, rng=seed)
    got_core, got_delta, cores, deltas = _singular_from_image(f)
    assert (got_core, got_delta) == (n_core, n_delta)
    # found where the model put them (within 0.6 mm, about one ridge period)
    for found, placed in ((cores, f.cores_um), (deltas, f.deltas_um)):
        for p in placed / 1000.0:
            assert np.min(np.hypot(*(found - p).T)) < 0.6


@pytest.mark.parametrize("pattern, sign", [("right_loop", -1), ("left_loop", +1)])
def test_loop_opens_to_its_side(pattern, sign):
    # A loop's delta lies on the side opposite to the loop's opening (Handbook of Fingerprint
    # Recognition, Maltoni et al. 2009, ch. 5, pattern classes; from memory). Image view,
    # fingertip up: a right loop opens right (larger column index), so its delta is left.
    f = finger(pattern, size_mm=(15.0, 14.0), spacing_um=25.4, pressure=1.0, rng=0)
    _, _, cores, deltas = _singular_from_image(f)
    assert sign * (deltas[0, 1] - cores[0, 1]) > 1.0       # mm
    assert deltas[0, 0] > cores[0, 0] + 1.0                # delta below the core


def test_arch_ridges_run_across():
    # Plain arch: ridges flow from one side to the other, roughly perpendicular to axis 0
    # (Handbook ch. 5; common practice). Estimated orientation, not the input map.
    f = finger("arch", size_mm=(15.0, 14.0), spacing_um=25.4, pressure=1.0, rng=0)
    theta, coh = estimate_orientation(f.ridge[::2, ::2], block=4, sigma_smooth=1.5)
    pad = f.contact[::2, ::2][::4, ::4][: theta.shape[0], : theta.shape[1]] > 0.999
    assert np.median(np.abs(theta[pad])) < np.radians(20)
    assert np.mean(np.abs(theta[pad]) < np.radians(45)) > 0.9


# --------------------------------------------------------------------------------------------
# minutiae and the look of the ridges

def test_minutiae_arise_on_full_finger():
    # Skeleton (skimage.morphology.skeletonize) of the binarised 500 ppi ridge map, crossing
    # number (Arcelli & Baja 1984; Handbook ch. 3). A full print carries some tens of minutiae
    # (Handbook ch. 3; from memory): require tens, not zero, not thousands.
    f = finger("right_loop", rng=2)          # full size: 20 x 14 mm at 12.7 um
    assert f.shape == (1575, 1102)
    img = f.ridge[::4, ::4]
    inner = ndimage.binary_erosion(f.contact[::4, ::4] > 0.999, iterations=10)
    endings, bifurcations = count_minutiae(img > 0, inner)
    assert 5 <= endings <= 300 and 5 <= bifurcations <= 300
    assert 20 <= endings + bifurcations <= 400


def test_ridges_are_continuous_bands_not_blobs():
    # Connected components of the binarised ridges inside the pad (scipy.ndimage.label): no
    # isolated blobs; ridges are long bands (common practice for ridge quality).
    f = finger("whorl", size_mm=(12.0, 12.0), spacing_um=25.4, pressure=1.0, rng=1)
    inner = ndimage.binary_erosion(f.contact > 0.999, iterations=20)
    ridges = (f.ridge > 0) & inner
    lab, n = ndimage.label(ridges)
    sizes = np.bincount(lab.ravel())[1:]
    # components cut by the border of the region are not judged
    cut = np.unique(lab[ndimage.binary_dilation(~inner) & ridges])
    whole = np.setdiff1d(np.arange(1, n + 1), cut)
    area_of_a_dot = (460.0 / f.spacing_um) ** 2            # one period squared
    small = sizes[whole - 1] < area_of_a_dot
    assert n > 5 and small.sum() <= 0.1 * n + 1
    # black/white balance near 50 % (ridges and valleys about as wide; Handbook ch. 3)
    assert 0.35 < ridges.sum() / inner.sum() < 0.65


def test_rounded_cross_section_and_height_range():
    f = finger("left_loop", size_mm=(8.0, 8.0), rng=5)
    assert f.ridge.min() >= -1.0 and f.ridge.max() <= 1.0
    assert f.height_um.min() >= 0.0 and f.height_um.max() <= f.valley_depth_um == 50.0
    # the crests and valley floors are reached ...
    inner = f.contact > 0.999
    assert np.quantile(f.height_um[inner], 0.98) > 49.0
    assert np.quantile(f.height_um[inner], 0.02) < 1.0
    # ... but it is not a square wave: a sizeable share of intermediate heights (a sinusoid
    # has 1/3 of its samples with |value| < 1/2 of the amplitude; a square wave none)
    mid = np.mean(np.abs(f.ridge[inner]) < 0.5)
    assert 0.15 < mid < 0.6
    np.testing.assert_allclose(f.height_um, 25.0 * (1.0 + f.ridge), atol=1e-9)


# --------------------------------------------------------------------------------------------
# footprint, air gap and skin condition

def _contact_extent_mm(f):
    h, w = f.shape
    across = np.count_nonzero(f.contact[h // 2] > 0.5) * f.spacing_um / 1000.0
    along = np.count_nonzero(f.contact[:, w // 2] > 0.5) * f.spacing_um / 1000.0
    return along, across


def test_footprint_grows_with_pressure():
    ext = [_contact_extent_mm(finger("arch", size_mm=(10.0, 8.0), spacing_um=25.4,
                                     pressure=p, rng=1)) for p in (0.0, 0.5, 1.0)]
    along, across = np.array(ext).T
    assert np.all(np.diff(across) > 0.5) and np.all(np.diff(along) > 0.5)
    assert across[-1] <= 8.0 and along[-1] <= 10.0


def test_air_gap_on_and_off_the_pad():
    f = finger("whorl", size_mm=(8.0, 8.0), rng=6)
    inner = f.contact == 1.0
    indent = 50.0 * (0.15 + 0.35 * f.pressure)
    np.testing.assert_allclose(f.air_gap_um[inner],
                               np.maximum(50.0 - f.height_um - indent, 0.0)[inner], atol=1e-9)
    assert np.all(f.air_gap_um >= 0.0)
    crests = inner & (f.ridge > 0.99)
    assert crests.any() and f.air_gap_um[crests].max() < 0.3     # touching crests
    # off the pad the skin curves away: gap grows with the distance from the pad
    assert f.air_gap_um[0, 0] > 300.0 and f.air_gap_um[-1, -1] > 300.0
    mid = f.shape[0] // 2
    off = f.contact[mid] == 0.0
    row = f.air_gap_um[mid] - (50.0 - f.height_um[mid])               # lift only, off the pad
    half = np.where(off, row, np.nan)[: f.shape[1] // 2]
    half = half[np.isfinite(half)]
    assert half.size > 3 and np.all(np.diff(half) <= 1e-9)            # rises towards the edge


def test_pressed_ridges_have_handbook_width():
    # Ridge width 100 (thin) to 300 (thick) um, period about 500 um: Maltoni et al., Handbook
    # of Fingerprint Recognition, 2nd ed. (2009), ch. 3 (REFERENCE-VALUES.md section 3). The
    # pressed contact plateau (air gap ~ 0) must cover a matching fraction of the pad, and
    # grow with pressure.
    fracs = []
    for p in (0.0, 0.5, 1.0):
        f = finger("left_loop", size_mm=(8.0, 8.0), pressure=p, rng=4)
        inner = f.contact == 1.0
        fracs.append(float(np.mean(f.air_gap_um[inner] < 0.5)))
    assert np.all(np.diff(fracs) > 0.03)
    width_um = np.array(fracs) * 460.0
    assert 100.0 <= width_um[1] <= 300.0
    assert width_um[0] >= 60.0 and width_um[2] <= 320.0


    np.testing.assert_array_equal(f.fluid_um, 0.0)


def test_dry_skin_breaks_ridge_contact():
    kw = dict(size_mm=(8.0, 8.0), spacing_um=20.0, rng=8)
    normal, dry = finger("right_loop", **kw), finger("right_loop", skin="dry", **kw)
    np.testing.assert_array_equal(normal.ridge, dry.ridge)             # same ridges
    np.testing.assert_array_equal(normal.contact, dry.contact)         # same footprint
    crests = (normal.contact == 1.0) & (normal.ridge > 0.99)
    touch_n = np.mean(normal.air_gap_um[crests] < 0.5)
    touch_d = np.mean(dry.air_gap_um[crests] < 0.5)
    assert touch_n > 0.99 and 0.3 < touch_d < 0.9
    lift = dry.air_gap_um - normal.air_gap_um
    assert lift.min() >= 0.0 and 2.0 < lift.max() <= 6.0               # "a few um"
    np.testing.assert_array_equal(dry.fluid_um, 0.0)


def test_wet_skin_fills_valleys_partly():
    kw = dict(size_mm=(8.0, 8.0), spacing_um=20.0, rng=8)
    normal, wet = finger("right_loop", **kw), finger("right_loop", skin="wet", **kw)
    np.testing.assert_array_equal(normal.air_gap_um, wet.air_gap_um)
    assert np.all(wet.fluid_um >= 0.0) and np.all(wet.fluid_um <= wet.air_gap_um)
    pad = wet.contact == 1.0
    # upper flanks of the ridges, beside the contact plateaus: gap below a fifth of the depth,
    # i.e. below the lowest moisture level (documented: 25-55 % of the valley depth) -> filled
    flanks = pad & (wet.air_gap_um > 0.5) & (wet.air_gap_um < 0.2 * 50.0)
    valleys = pad & (wet.ridge < -0.99)                # valley centres
    assert np.median(wet.fluid_um[flanks] / wet.air_gap_um[flanks]) > 0.5
    assert np.median(wet.fluid_um[valleys] / wet.air_gap_um[valleys]) < 0.5
    np.testing.assert_array_equal(wet.fluid_um[wet.contact == 0.0], 0.0)


# --------------------------------------------------------------------------------------------
# reproducibility, result type, properties

def test_reproducible_by_seed():
    a = make_finger("twin_loop", size_mm=(5.0, 5.0), skin="dry", rng=42)
    b = make_finger("twin_loop", size_mm=(5.0, 5.0), skin="dry", rng=42)
    c = make_finger("twin_loop", size_mm=(5.0, 5.0), skin="dry", rng=43)
    for name in ("ridge", "height_um", "air_gap_um", "period_um", "cores_um", "deltas_um"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
    assert not np.array_equal(a.ridge, c.ridge)
    assert not np.array_equal(a.cores_um, c.cores_um)
    g = np.random.default_rng(42)
    d = make_finger("twin_loop", size_mm=(5.0, 5.0), skin="dry", rng=g)
    np.testing.assert_array_equal(a.ridge, d.ridge)


def test_result_is_frozen_and_read_only():
    f = finger("left_loop", size_mm=(8.0, 8.0), rng=5)
    with pytest.raises(dataclasses.FrozenInstanceError, match="cannot assign"):
        f.pressure = 1.0
    with pytest.raises(ValueError, match="read-only"):
        f.ridge[0, 0] = 0.0
    assert isinstance(f, Finger) and f.pattern == "left_loop" and f.skin == "normal"
    assert f.size_mm == pytest.approx((f.shape[0] * f.spacing_um / 1000,
                                       f.shape[1] * f.spacing_um / 1000))


@settings(max_examples=15, deadline=None)
@given(pattern=st.sampled_from(PATTERNS), skin=st.sampled_from(SKINS),
       along=st.floats(1.0, 4.0), across=st.floats(1.0, 4.0),
       spacing=st.floats(15.0, 60.0), pressure=st.floats(0.0, 1.0),
       seed=st.integers(0, 2**32 - 1))
def test_properties_small_fingers(pattern, skin, along, across, spacing, pressure, seed):
    f = make_finger(pattern, size_mm=(along, across), spacing_um=spacing, pressure=pressure,
                    skin=skin, rng=seed)
    h, w = round(along * 1000 / spacing), round(across * 1000 / spacing)
    assert f.shape == (h, w)
    for name in ("ridge", "height_um", "contact", "air_gap_um", "fluid_um",
                 "orientation_rad", "period_um"):
        arr = getattr(f, name)
        assert arr.shape == (h, w) and arr.dtype == np.float64 and np.isfinite(arr).all()
    assert f.ridge.min() >= -1.0 and f.ridge.max() <= 1.0
    assert f.height_um.min() >= 0.0 and f.height_um.max() <= f.valley_depth_um
    assert f.contact.min() >= 0.0 and f.contact.max() <= 1.0
    assert f.air_gap_um.min() >= 0.0
    assert np.all(f.fluid_um >= 0.0) and np.all(f.fluid_um <= f.air_gap_um)
    assert np.all(np.abs(f.orientation_rad) <= np.pi / 2)
    assert f.period_um.min() >= 350.0 and f.period_um.max() <= 600.0
    assert f.cores_um.shape[1] == 2 and f.deltas_um.shape[1] == 2


# --------------------------------------------------------------------------------------------
# argument errors

@pytest.mark.parametrize("kwargs, exc, match", [
    (dict(pattern="spiral"), ValueError, r"pattern must be one of .*got 'spiral'"),
    (dict(skin="oily"), ValueError, r"skin must be one of .*got 'oily'"),
    (dict(size_mm=5.0), TypeError, r"size_mm must be a pair"),
    (dict(size_mm=(5.0, 5.0, 1.0)), ValueError, r"size_mm must hold exactly 2 numbers; got 3"),
    (dict(size_mm=(0.5, 5.0)), ValueError, r"size_mm must hold two extents in \[1, 60\] mm"),
    (dict(size_mm=("a", 5.0)), TypeError, r"size_mm must be a real number; got str"),
    (dict(spacing_um=-1.0), ValueError, r"spacing_um must be a finite number > 0; got -1.0"),
    (dict(spacing_um=100.0), ValueError, r"spacing_um must be at most a quarter"),
    (dict(mean_period_um=700.0), ValueError, r"mean_period_um must lie strictly inside"),
    (dict(mean_period_um="460"), TypeError, r"mean_period_um must be a real number"),
    (dict(period_range_um=(600.0, 350.0)), ValueError, r"period_range_um must be \(low, high\)"),
    (dict(valley_depth_um=0.0), ValueError, r"valley_depth_um must be a finite number > 0"),
    (dict(pressure=1.5), ValueError, r"pressure must be in \[0.0, 1.0\]; got 1.5"),
    (dict(pressure=None), TypeError, r"pressure must be a real number; got NoneType"),
    (dict(rng="seed"), TypeError, r"rng must be None, an int seed or a numpy.random.Generator"),
    (dict(size_mm=(60.0, 60.0), spacing_um=5.0), ValueError, r"at most 4e7 cells"),
])
def test_bad_arguments(kwargs, exc, match):
    kw = dict(size_mm=(3.0, 3.0))
    kw.update(kwargs)
    with pytest.raises(exc, match=match):
        make_finger(**kw)


@pytest.mark.parametrize("kwargs, exc, match", [
    (dict(cores_um=[(0, 0, 0)]), ValueError, r"cores_um must have shape \(n, 2\)"),
    (dict(deltas_um="x"), TypeError, r"deltas_um must be array_like of numbers"),
    (dict(theta_inf_rad=float("nan")), ValueError, r"theta_inf_rad must be a finite number"),
    (dict(theta_inf_rad="0"), TypeError, r"theta_inf_rad must be a real number"),
])
def test_orientation_field_bad_arguments(kwargs, exc, match):
    with pytest.raises(exc, match=match):
        orientation_field([0.0], [1.0], **kwargs)


def test_orientation_field_shapes_must_broadcast():
    with pytest.raises(ValueError, match=r"along_um and across_um must broadcast"):
        orientation_field(np.zeros(3), np.zeros(4))
    assert math.isclose(float(orientation_field(0.0, 1.0)), 0.0)


def test_finger_constructor_copies_and_checks_shapes():
    z = np.zeros((4, 5))
    kw = dict(pattern="arch", spacing_um=10.0, ridge=z, height_um=z, contact=z, air_gap_um=z,
              fluid_um=z, orientation_rad=z, period_um=z + 460.0, cores_um=np.zeros((0, 2)),
              deltas_um=np.zeros((0, 2)), valley_depth_um=50.0, pressure=0.5, skin="normal")
    f = Finger(**kw)
    z[0, 0] = 1.0                                   # the caller's array is not shared
    assert f.ridge[0, 0] == 0.0 and not f.ridge.flags.writeable
    assert f.shape == (4, 5) and f.size_mm == pytest.approx((0.04, 0.05))
    with pytest.raises(ValueError, match=r"contact must have the shape of ridge \(4, 5\)"):
        Finger(**{**kw, "contact": np.zeros((3, 5))})
    with pytest.raises(ValueError, match=r"ridge must be a 2-D \(H, W\) array"):
        Finger(**{**kw, "ridge": np.zeros(5)})


# --------------------------------------------------------------------------------------------
# texture_finger: a finger whose ridge map is a given image


def _plane_wave(shape, period_px, theta_rad, phase=0.0):
    # Ridges whose tangent is (along, across) = (sin theta, cos theta): the wave vector is the
    # normal (cos theta, -sin theta) / period, so the Fourier transform of this image is a
    # single pair of impulses at radius 1 / period (analytic).
    a, x = np.mgrid[0:shape[0], 0:shape[1]].astype(float)
    return np.cos(2 * np.pi * (a * np.cos(theta_rad) - x * np.sin(theta_rad)) / period_px + phase)


@pytest.mark.parametrize("period_px, theta_deg", [(8.0, 30.0), (12.5, -60.0), (20.0, 75.0),
                                                  (10.0, 0.0)])
def test_texture_finger_period_and_orientation_of_a_plane_wave(period_px, theta_deg):
    # Analytic: a plane wave has one period (Fourier) and one ridge tangent everywhere.
    th = np.radians(theta_deg)
    f = texture_finger(_plane_wave((192, 160), period_px, th, phase=0.3), pixel_um=20.0)
    np.testing.assert_allclose(f.period_um, period_px * 20.0, rtol=0.02)
    assert np.ptp(f.period_um) == 0.0                          # one period filled everywhere
    inner = f.orientation_rad[48:-48, 48:-48]                  # away from the reflected borders
    err = 0.5 * np.angle(np.exp(2j * (inner - th)))            # orientation difference mod pi
    assert np.abs(err).max() < np.radians(0.5)
    assert f.orientation_rad.min() >= -np.pi / 2 and f.orientation_rad.max() < np.pi / 2


@pytest.mark.parametrize("highpass_px", [16.0, 5.0, None, 0.0])
def test_texture_finger_ridge_map_matches_reference_libraries(highpass_px):
    # Documented ridge map recomputed with other libraries: scikit-image's Gaussian filter for
    # the illumination, scipy.stats.median_abs_deviation(scale="normal") for the robust spread
    # (MAD / Phi^-1(3/4), Hampel 1974), then tanh.
    from scipy.stats import median_abs_deviation
    from skimage import data, filters
    img = data.gravel()[100:196, 200:280].astype(float)
    d = img if not highpass_px else img - filters.gaussian(img, sigma=highpass_px, mode="reflect",
                                                            preserve_range=True)
    d = d - np.median(d)
    want = np.tanh(d / median_abs_deviation(d, axis=None, scale="normal"))
    f = texture_finger(data.gravel()[100:196, 200:280], highpass_px=highpass_px)
    np.testing.assert_allclose(f.ridge, want, rtol=1e-5, atol=1e-9)
    # ridges and valleys cover equal areas (the median is the zero level)
    assert abs(np.mean(f.ridge > 0) - 0.5) < 0.01


def test_texture_finger_surface_relations():
    # Same surface model as make_finger (documented in Finger): height = depth (1 + ridge) / 2;
    # on the full pad the gap is the truncated valley max(depth - height - indent, 0) with
    # indent = depth (0.15 + 0.35 pressure); the gap only grows off the pad.
    from skimage import data
    depth, pressure = 40.0, 0.3
    f = texture_finger(data.grass()[:256, :224], pixel_um=30.0, valley_depth_um=depth,
                       pressure=pressure)
    assert f.shape == (256, 224) and f.spacing_um == 30.0
    assert f.pattern == "texture" and f.skin == "normal"
    assert f.cores_um.shape == (0, 2) and f.deltas_um.shape == (0, 2)
    np.testing.assert_array_equal(f.fluid_um, 0.0)
    assert f.ridge.min() >= -1.0 and f.ridge.max() <= 1.0
    assert f.height_um.min() >= 0.0 and f.height_um.max() <= depth
    np.testing.assert_allclose(f.height_um, depth * (1.0 + f.ridge) / 2.0, atol=1e-12)
    assert f.contact.min() >= 0.0 and f.contact.max() <= 1.0 and f.contact[0, 0] == 0.0
    assert f.air_gap_um.min() >= 0.0
    pad = f.contact == 1.0
    indent = depth * (0.15 + 0.35 * pressure)
    assert pad.sum() > 0.2 * pad.size
    np.testing.assert_allclose(f.air_gap_um[pad],
                               np.maximum(depth - f.height_um - indent * f.contact, 0.0)[pad],
                               atol=1e-12)
    assert np.all(f.air_gap_um >= np.maximum(depth - f.height_um - indent * f.contact, 0.0))
    touch = np.mean(f.air_gap_um[pad] < 0.5)                   # crests pressed flat
    assert 0.15 < touch < 0.6


def test_texture_finger_has_the_pad_of_make_finger():
    # Same grid, same pressure: identical footprint and identical lift off the pad.
    h, w, s, p = 120, 100, 25.4, 0.7
    img = _plane_wave((h, w), 14.0, 0.4)
    t = texture_finger(img, pixel_um=s, pressure=p)
    m = make_finger("arch", size_mm=(h * s / 1000, w * s / 1000), spacing_um=s, pressure=p,
                    rng=0)
    assert m.shape == t.shape
    np.testing.assert_array_equal(t.contact, m.contact)

    def lift(f):
        indent = f.valley_depth_um * (0.15 + 0.35 * f.pressure) * f.contact
        return f.air_gap_um - np.maximum(f.valley_depth_um - f.height_um - indent, 0.0)

    np.testing.assert_allclose(lift(t), lift(m), atol=1e-9)
    assert lift(t).max() > 50.0                                # the skin curves away


@pytest.mark.parametrize("pattern, kwargs, stats", [
    # (contact sum, cells with contact 1, cells with contact 0, air-gap sum, air-gap sum off
    # the pad, height sum) recorded from make_finger BEFORE the pad code was moved into
    # _pad / _pressed_gap (same machine, numpy/scipy of the venv); the refactor must not
    # change them
    ("right_loop", dict(size_mm=(6.0, 5.0), rng=0),
     (85534.29378368516, 55260, 65096, 10851567.802664854, 7840320.18969424,
      4790758.550108615)),
    ("arch", dict(size_mm=(5.0, 7.0), spacing_um=25.4, pressure=1.0, skin="dry", rng=3),
     (38536.16029667659, 28170, 6596, 1537468.5739032922, 660531.1044919156,
      1449346.7887868476)),
])
def test_make_finger_unchanged_by_pad_refactor(pattern, kwargs, stats):
    f = make_finger(pattern, **kwargs)
    c, g = f.contact, f.air_gap_um
    got = (float(c.sum()), int((c == 1).sum()), int((c == 0).sum()), float(g.sum()),
           float(g[c == 0].sum()), float(f.height_um.sum()))
    assert got[1:3] == stats[1:3]
    assert got == pytest.approx(stats, rel=1e-9)


def test_texture_finger_accepts_any_real_dtype():
    from skimage import data
    img = data.brick()[:64, :80]                               # uint8
    ref = texture_finger(img)
    for other in (img.astype(np.int32), img.astype(np.float32), img.tolist()):
        np.testing.assert_allclose(texture_finger(other).ridge, ref.ridge, atol=1e-12)


@pytest.mark.parametrize("image, kwargs, exc, match", [
    (np.zeros(64), {}, ValueError,
     r"image must be a 2-D \(H, W\).*got 1 dimension\(s\), shape \(64,\)"),
    (np.zeros((4, 32, 32)), {}, ValueError, r"image must be a 2-D .*got 3 dimension"),
    (np.full((32, 32), np.nan), {}, ValueError, r"image must be finite; got 1024 NaN or inf"),
    (np.zeros((15, 40)), {}, ValueError,
     r"image must be at least 16 x 16 pixels; got shape \(15, 40\)"),
    (np.zeros((32, 32), complex), {}, TypeError,
     r"image must be a real numeric array .*complex128"),
    ([["a"] * 20] * 20, {}, TypeError, r"image must be a real numeric array"),
    (np.ones((32, 32)), {}, ValueError, r"image must have some contrast .*got a flat 32 x 32"),
    (None, dict(pixel_um=0.0), ValueError, r"pixel_um must be a finite number > 0; got 0.0"),
    (None, dict(pixel_um=250.0), ValueError, r"pixel_um must be in \(0, 200\] um; got 250.0"),
    (None, dict(pixel_um="25.4"), TypeError, r"pixel_um must be a real number; got str"),
    (None, dict(pixel_um=float("inf")), ValueError, r"pixel_um must be a finite number > 0"),
    (None, dict(valley_depth_um=-5.0), ValueError, r"valley_depth_um must be a finite number > 0"),
    (None, dict(pressure=1.5), ValueError, r"pressure must be in \[0.0, 1.0\]; got 1.5"),
    (None, dict(highpass_px=-1.0), ValueError,
     r"highpass_px must be a finite number >= 0; got -1.0"),
])
def test_texture_finger_bad_arguments(image, kwargs, exc, match):
    if image is None:
        image = _plane_wave((32, 32), 8.0, 0.0)
    with pytest.raises(exc, match=match):
        texture_finger(image, **kwargs)


def test_texture_finger_finds_a_single_inf():
    img = _plane_wave((32, 32), 8.0, 0.0)
    img[3, 4] = np.inf
    with pytest.raises(ValueError, match=r"image must be finite; got 1 NaN or inf"):
        texture_finger(img)


def test_texture_finger_gravel_swipe_end_to_end():
    # A real photographic texture (scikit-image's bundled gravel image) at 25.4 um per pixel:
    # single-pixel detail is finer than the 50.8 um sensor pitch. The capture simulator must
    # take it like any finger: entry off the pad, full contact, textured frames.
    from skimage import data
    from stripstitch import simulate
    f = texture_finger(data.gravel()[:256, :224], pixel_um=25.4)
    cap = simulate.swipe(finger=f, n_rows=8, n_cols=48, frame_rate_hz=4000.0,
                         speed_mm_s=200.0, snr_db=30.0, exposure_steps=1, rng=0)
    assert cap.frames.shape[1:] == (8, 48) and cap.frames.dtype == np.uint8
    assert 60 <= cap.frames.shape[0] <= 200
    assert cap.contact[0] == 0.0 and cap.contact.max() == 1.0
    assert cap.snr_db == pytest.approx(30.0, abs=1e-6)
    assert cap.finger is f and cap.finger_info["pattern"] == "texture"
    full = cap.frames[cap.contact == 1.0].astype(float)
    assert full.std(axis=(1, 2)).min() > 5.0                   # texture, not a flat grey


def test_crease_is_a_ridge_free_band_the_plates_see_as_flat():
    # A crease: no ridges in the band, nothing in it touching the sensor. Checked on what the
    # capture makes of it: over the band the noise-free frames are flat (a plate sees the
    # parallel-plate capacitance of a uniform gap, common practice), elsewhere the ridges
    # show; outside the band and its edges the finger is the same array for array.
    from stripstitch import simulate

    f = make_finger("whorl", size_mm=(10.0, 6.0), rng=2)
    g = with_crease(f, at_mm=5.0, width_mm=0.8, edge_um=100.0)
    rows = np.arange(f.ridge.shape[0]) * f.spacing_um
    far = np.abs(rows - 5000.0) > 400.0 + 50.0
    core = np.abs(rows - 5000.0) < 400.0 - 50.0
    for name in ("ridge", "height_um", "air_gap_um", "fluid_um", "contact"):
        np.testing.assert_array_equal(getattr(g, name)[far], getattr(f, name)[far])
    assert (g.height_um[core] == 0.0).all() and (g.ridge[core] == -1.0).all()
    # the gap in the band: the valley floor's plus the valley depth (the default depth)
    np.testing.assert_allclose(g.air_gap_um[core], (f.air_gap_um + f.height_um)[core]
                               + f.valley_depth_um)
    cap = simulate.swipe("whorl", finger=g, n_rows=8, n_cols=64, frame_rate_hz=4000.0,
                         speed_mm_s=100.0, snr_db=None, rng=0)
    spread = np.asarray(cap.ideal_frames, dtype=float).std(axis=(1, 2))
    seen = cap.contact >= 0.9
    typical = np.median(spread[seen])
    assert (spread[seen] < 0.01 * typical).sum() >= 10      # frames that saw only the band


@pytest.mark.parametrize("kwargs, exc, match", [
    (dict(finger=np.zeros((4, 4)), at_mm=1.0), TypeError, "finger must be a Finger"),
    (dict(at_mm=1.0, width_mm=0.0), ValueError, "width_mm"),
    (dict(at_mm=1.0, depth_um=-1.0), ValueError, "depth_um"),
    (dict(at_mm=float("nan")), ValueError, "at_mm"),
])
def test_with_crease_bad_arguments(kwargs, exc, match):
    kw = dict(finger=make_finger("arch", size_mm=(4.0, 4.0), rng=0))
    kw.update(kwargs)
    with pytest.raises(exc, match=match):
        with_crease(kw.pop("finger"), **kw)
