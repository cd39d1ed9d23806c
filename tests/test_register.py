"""Pairwise registration against exact Fourier shifts and scikit-image's registration."""

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from skimage.registration import phase_cross_correlation

from conftest import band_texture, cut_frames
from stripstitch import register


def _prep(frames):
    # Global normalisation only: these tests are about the estimator, not the fixed pattern.
    z = ((frames - frames.mean()) / frames.std()).astype(np.float32)
    p = register.prepare(frames)
    return register.Prepared(z=z, plate_ok=np.ones(frames.shape[1:], bool), offset=p.offset,
                             gain=p.gain, contact=np.ones(len(frames), bool),
                             texture=p.texture, noise_sigma=p.noise_sigma)


SHIFTS = np.array([[0.0, 0.0], [0.25, 0.0], [0.5, 0.1], [1.37, 0.21], [2.5, -0.7],
                   [3.8, 0.45], [-1.2, 0.3], [5.1, -1.6]])


def test_refine_recovers_fourier_shifts(texture):
    # Reference: frames shifted exactly by scipy.ndimage.fourier_shift (band-limited texture).
    pos = np.vstack([[0.0, 0.0], SHIFTS + [20.0, 0.0]])
    frames = cut_frames(texture, pos)
    prep = _prep(frames)
    pairs = np.stack([np.zeros(len(SHIFTS), int), np.arange(1, len(SHIFTS) + 1)], 1)
    truth = pos[pairs[:, 1]] - pos[pairs[:, 0]]
    zn = register._row_normalise(prep.z, prep.plate_ok)
    # pairs here are 20 px apart along: compare each shifted frame with a frame 20 px on.
    ref = cut_frames(texture, [[20.0, 0.0]])
    frames2 = np.concatenate([ref, frames[1:]])
    prep = _prep(frames2)
    truth = SHIFTS
    zn = register._row_normalise(prep.z, prep.plate_ok)
    coarse, score, _ = register.coarse_shifts(zn, pairs, max_along=7, max_across=6)
    assert np.abs(coarse - truth).max() < 0.5          # integer search + parabola: within half a pixel
    est = register.refine_shifts(prep, pairs, coarse, iterations=4)
    # Tolerance 0.01 px: Keys interpolation on a twice-upsampled frame (bias ~1e-3 px here).
    np.testing.assert_allclose(est.shift, truth, atol=0.01)
    assert est.ok.all() and (est.ncc > 0.99).all()


def test_more_accurate_than_skimage_phase_correlation(texture):
    # Outside reference: scikit-image's upsampled-DFT phase cross-correlation (Guizar-Sicairos
    # et al., Opt. Lett. 33(2), 2008) on the same frame pairs. It needs more overlap than a
    # strip gives (on 8-row frames it returns about zero, the trap of naive chains), so this
    # comparison uses 32-row frames: skimage must land near the truth (checking the frames and
    # the sign convention) and ours must be at least as close.
    ref = cut_frames(texture, [[20.0, 0.0]], n_rows=32)[0]
    frames = cut_frames(texture, SHIFTS[1:] + [20.0, 0.0], n_rows=32)
    stack = np.concatenate([ref[None], frames])
    pairs = np.stack([np.zeros(len(frames), int), np.arange(1, len(frames) + 1)], 1)
    ours = register.refine_shifts(_prep(stack), pairs, np.round(SHIFTS[1:]), iterations=5).shift
    sk = []
    for f in frames:
        # skimage returns the shift that registers the moving image onto the reference; its
        # gallery example shifts an image by fourier_shift(-d) and recovers +d, which is how
        # these frames are made (f = ref shifted by -d), so it returns +d here.
        # Plain cross-correlation (normalization=None): the phase-normalised form locks onto
        # the frame edges of these non-periodic windows and returns about zero.
        s, _, _ = phase_cross_correlation(ref, f, upsample_factor=100, normalization=None)
        sk.append(s)
    sk = np.array(sk)
    truth = SHIFTS[1:]
    err_sk = np.abs(sk - truth).max(axis=1)
    err_ours = np.abs(ours - truth).max(axis=1)
    assert err_sk.max() < 0.4         # edge effects of the circular correlation
    assert (err_ours <= err_sk + 1e-3).all()
    assert err_ours.max() < 0.01


def test_fractional_shift_bias_below_parabolic_fit():
    # The interpolation bias as a function of the fractional shift. Reference values
    # (REFERENCE-VALUES.md, "extra checks", computed): a 3-point parabolic fit on a cosine
    # correlation peak of period 9.84 px has max |bias| 0.0067 px. Ours must stay below it.
    tex = band_texture((256, 96), period_px=9.84, seed=5)
    fracs = np.linspace(0.0, 1.0, 11)
    pos = np.vstack([[[10.0, 0.0]], np.stack([10.0 + 2.0 + fracs, 0.3 * fracs], 1)])
    frames = cut_frames(tex, pos)
    prep = _prep(frames)
    pairs = np.stack([np.zeros(len(fracs), int), np.arange(1, len(fracs) + 1)], 1)
    truth = pos[1:] - pos[0]
    est = register.refine_shifts(prep, pairs, np.round(truth), iterations=5)
    bias = est.shift - truth
    assert np.abs(bias).max() < 0.0067


@settings(max_examples=25, deadline=None)
@given(d=st.integers(-5, 5), e=st.integers(-4, 4), fd=st.floats(0, 0.99), fe=st.floats(0, 0.99),
       seed=st.integers(0, 50))
def test_random_shifts_recovered_and_antisymmetric(d, e, fd, fe, seed):
    # Translation, gain and offset, as every caller in the library registers pairs (the
    # rotation is read later, against the model of the finger).
    tex = band_texture((128, 96), seed=seed)
    shift = np.array([d + fd, e + fe])
    frames = cut_frames(tex, [[30.0, 0.0], [30.0 + shift[0], shift[1]]])
    prep = _prep(frames)
    zn = register._row_normalise(prep.z, prep.plate_ok)
    fwd_c, _, _ = register.coarse_shifts(zn, np.array([[0, 1]]), max_along=7, max_across=6)
    fwd = register.refine_shifts(prep, np.array([[0, 1]]), fwd_c, iterations=4,
                                 estimate_rotation=False)
    back = register.refine_shifts(prep, np.array([[1, 0]]), -fwd_c, iterations=4,
                                  estimate_rotation=False)
    np.testing.assert_allclose(fwd.shift[0], shift, atol=0.02)
    np.testing.assert_allclose(fwd.shift[0], -back.shift[0], atol=0.02)


def test_rotation_free_registration_converges_on_a_three_row_overlap():
    # With the rotation free (refine_shifts' default) and 3 of 8 rows overlapping, the
    # rotation's across term (theta x row offset) is nearly constant over the overlap and
    # close to the across shift, and Gauss-Newton converges linearly: measured on this pair
    # (found by the property test above when it ran with the rotation free), from a coarse
    # start 0.17 px off, along error 0.068 / 0.030 / 0.014 / 0.0066 / 0.0011 px after 2 / 4 /
    # 6 / 8 / 20 iterations backwards (forwards 0.0053 after 4); without the rotation 0.0053
    # after 4. Exact shifts: scipy.ndimage.fourier_shift of a band-limited texture.
    tex = band_texture((128, 96), seed=4)
    shift = np.array([-5.0, -1.25])
    frames = cut_frames(tex, [[30.0, 0.0], [30.0 + shift[0], shift[1]]])
    prep = _prep(frames)
    start = np.array([[5.1656, 1.2751]])
    back = register.refine_shifts(prep, np.array([[1, 0]]), start, iterations=8)
    np.testing.assert_allclose(back.shift[0], -shift, atol=0.01)


def test_invariant_to_gain_and_offset(texture):
    pos = [[20.0, 0.0], [22.3, 0.4]]
    frames = cut_frames(texture, pos)
    pairs = np.array([[0, 1]])
    a = register.refine_shifts(_prep(frames), pairs, [[2.0, 0.0]], iterations=8).shift
    scaled = frames.copy()
    scaled[1] = 3.0 * scaled[1] + 40.0                  # one frame brighter and offset
    b = register.refine_shifts(_prep(scaled), pairs, [[2.0, 0.0]], iterations=8).shift
    np.testing.assert_allclose(a, b, atol=2e-3)


def test_information_matches_monte_carlo_scatter(texture):
    # The 2x2 information matrix is the inverse covariance: its prediction must match the
    # Monte-Carlo scatter of the estimate under white noise (within 30 % at 40 trials).
    rng = np.random.default_rng(7)
    clean = cut_frames(texture, [[40.0, 0.0], [41.4, 0.2]])
    ests, pred = [], []
    for _ in range(40):
        noisy = clean + rng.normal(0, 0.1, clean.shape)
        est = register.refine_shifts(_prep(noisy), np.array([[0, 1]]), [[1.4, 0.2]])
        ests.append(est.shift[0])
        pred.append(np.sqrt(np.diag(np.linalg.inv(est.info[0]))))
    scatter = np.std(ests, axis=0)
    np.testing.assert_allclose(scatter, np.mean(pred, axis=0), rtol=0.3)


def test_fixed_pattern_removed_by_prepare():
    # A strong static pattern (the same in every frame) must not survive preparation: after
    # it the per-plate mean over contact frames is flat.
    rng = np.random.default_rng(1)
    tex = band_texture((512, 96), seed=2)
    pos = np.stack([np.arange(120) * 1.5, np.zeros(120)], 1)
    frames = cut_frames(tex, pos) + 2.0 * rng.standard_normal((8, 64))
    prep = register.prepare(frames)
    resid = prep.z.mean(axis=0)
    assert np.abs(resid).max() < 0.5 * np.abs(2.0 * rng.standard_normal((8, 64))).mean() + 0.5
    assert prep.contact.all()


def test_prepare_keeps_the_plates_under_a_finger_narrower_than_the_strip():
    # Exact-shift frames (scipy.ndimage.fourier_shift) of a texture moving 0.6 px per frame
    # over the right half of a 64-column strip; the left half sees noise only (a finger
    # narrower than the strip), 30 dB. The textured plates change from frame to frame by the
    # texture's motion, far more than the bare noise the untouched majority shows: they are
    # no "noisy plates". A really noisy plate among them (ten times the noise) still is.
    rng = np.random.default_rng(5)
    tex = band_texture((512, 96), seed=4)
    pos = np.stack([np.arange(150) * 0.6, np.zeros(150)], 1)
    frames = cut_frames(tex, pos)
    sigma = float(frames.std()) / 10 ** (30 / 20)
    frames[:, :, :36] = 0.0                     # untouched: no texture, noise only
    frames = frames + sigma * rng.standard_normal(frames.shape)
    frames[:, 3, 50] += 10.0 * float(frames[:, :, 40:].std()) * rng.standard_normal(150)
    prep = register.prepare(frames + 100.0)
    textured = np.zeros((8, 64), bool)
    textured[:, 36:] = True
    textured[3, 50] = False
    assert prep.plate_ok[textured].all()
    assert not prep.plate_ok[3, 50]


def test_prepare_statistics_match_the_formulas():
    # The compiled per-frame and per-plate passes against the same statistics in numpy.
    from stripstitch import register as reg
    rng = np.random.default_rng(2)
    x = rng.integers(0, 255, size=(40, 6, 30)).astype(np.uint8)
    tex, chg = reg._frame_stats(x)
    xf = x.astype(float)
    np.testing.assert_allclose(tex, np.sqrt(np.mean(np.diff(xf, axis=2) ** 2, axis=(1, 2))
                                            + np.mean(np.diff(xf, axis=1) ** 2, axis=(1, 2))))
    np.testing.assert_allclose(chg, np.sqrt(np.mean(np.diff(xf, axis=0) ** 2, axis=(1, 2))))
    wn = rng.uniform(0, 1, 40)
    wn[:5] = 0
    wn /= wn.sum()
    blank = np.zeros(40, bool)
    blank[:10] = True
    used = rng.uniform(size=39) > 0.3
    mean, spread, bmean, pn = reg._plate_stats(x, wn, blank, used)
    m_ref = np.einsum("t,trc->rc", wn, xf)
    np.testing.assert_allclose(mean, m_ref)
    np.testing.assert_allclose(spread, np.sqrt(np.einsum("t,trc->rc", wn, (xf - m_ref) ** 2)))
    np.testing.assert_allclose(bmean, xf[blank].mean(0))
    np.testing.assert_allclose(pn, np.sqrt(np.mean(np.diff(xf, axis=0)[used] ** 2, axis=0) / 2))
    ok = rng.uniform(size=(6, 30)) > 0.1
    off = rng.uniform(0, 50, (6, 30))
    sc = rng.uniform(1, 2, (6, 30))
    z, t2 = reg._normalise(x, off, sc, ok)
    z_ref = ((xf - off) / sc).astype(np.float32)
    z_ref[:, ~ok] = 0
    np.testing.assert_allclose(z, z_ref, rtol=1e-6)
    np.testing.assert_allclose(t2, np.sqrt(np.mean(z_ref[:, ok].astype(float) ** 2, axis=1)), rtol=1e-6)


def _plane_waves(points_y, points_x, seed=3, n=12):
    # A texture known exactly at any point: a sum of plane waves, periods 5-11 px, random
    # directions (the exact value of the rotated pattern is the outside reference).
    rng = np.random.default_rng(seed)
    per = rng.uniform(5.0, 11.0, n)
    ang = rng.uniform(0, np.pi, n)
    ph = rng.uniform(0, 2 * np.pi, n)
    ky, kx = 2 * np.pi * np.cos(ang) / per, 2 * np.pi * np.sin(ang) / per
    return sum(np.cos(ky[k] * points_y + kx[k] * points_x + ph[k]) for k in range(n))


@pytest.mark.parametrize("turn_deg, shift", [(-2.0, (0.3, -0.4)), (0.7, (0.0, 0.0)),
                                             (3.0, (-0.2, 0.6)), (0.0, (0.1, 0.2))])
def test_frame_turn_recovers_a_known_rotation(turn_deg, shift):
    # frame_b(u) = frame_a(R(d) u + s) about the centre of an 8 x 192 strip, the pattern
    # evaluated exactly at the turned plates; 30 dB of noise on both frames.
    r_n, c_n = 8, 192
    u0, u1 = np.meshgrid(np.arange(r_n) - (r_n - 1) / 2, np.arange(c_n) - (c_n - 1) / 2, indexing="ij")
    t = np.radians(turn_deg)
    fa = _plane_waves(u0, u1)
    fb = _plane_waves(shift[0] + np.cos(t) * u0 - np.sin(t) * u1, shift[1] + np.sin(t) * u0 + np.cos(t) * u1)
    rng = np.random.default_rng(1)
    noise = fa.std() / 10 ** (30 / 20)
    fa = fa + noise * rng.standard_normal(fa.shape)
    fb = fb + noise * rng.standard_normal(fb.shape)
    d, s, gain = register.frame_turn(fa, fb, np.ones((r_n, c_n), bool), (0.0, 0.0))
    assert d == pytest.approx(turn_deg, abs=0.03)
    np.testing.assert_allclose(s, shift, atol=0.05)
    # The turn explains the residual only where there is one.
    assert (gain > 1.0) if abs(turn_deg) >= 0.5 else (gain < 0.01)
    # Antisymmetric: b against a is the inverse transform, R(-d) and -R(-d) s.
    d2, s2, _ = register.frame_turn(fb, fa, np.ones((r_n, c_n), bool), (0.0, 0.0))
    assert d2 == pytest.approx(-turn_deg, abs=0.03)
    back = -np.array([[np.cos(t), np.sin(t)], [-np.sin(t), np.cos(t)]]) @ np.asarray(shift)
    np.testing.assert_allclose(s2, back, atol=0.05)


def test_frame_turn_rejects_bad_input():
    a = np.zeros((8, 32))
    ok = np.ones((8, 32), bool)
    with pytest.raises(ValueError, match="frame_b"):
        register.frame_turn(a, np.zeros((8, 31)), ok, (0, 0))
    with pytest.raises(ValueError, match="plate_ok"):
        register.frame_turn(a, a, ok[:4], (0, 0))
    with pytest.raises(ValueError, match="shift_px"):
        register.frame_turn(a, a, ok, (0, 0, 0))
    with pytest.raises(ValueError, match="at least 4 rows"):
        register.frame_turn(np.zeros((2, 32)), np.zeros((2, 32)), np.ones((2, 32), bool), (0, 0))


# ---- speed from the delay between neighbouring rows (register.row_delay) ----
# Reference for all of these: frames cut from a band-limited periodic texture at exact
# sub-pixel positions (scipy.ndimage.fourier_shift, conftest.cut_frames), so row 0 of frame
# t + 1/v holds exactly what row 1 of frame t held; the estimator is the cross-correlation
# time-delay method (Knapp & Carter 1976).

def _rows_moving(along, across, *, n_rows=2, seed=5, noise=0.02):
    tex = band_texture((256, 96), seed=seed)
    pos = np.stack([np.asarray(along, float), np.asarray(across, float)], 1)
    frames = cut_frames(tex, pos, n_rows=n_rows, n_cols=64, origin=(8, 8))
    frames = frames + noise * np.random.default_rng(seed + 1).standard_normal(frames.shape)
    return frames.astype(np.float32), np.ones(frames.shape[1:], bool)


@pytest.mark.parametrize("v", [0.1, 0.25, 0.5, -0.3])
def test_row_delay_recovers_constant_speed(v):
    t = np.arange(400)
    z, ok = _rows_moving(v * t, 0.0 * t)
    rd = register.row_delay(z, ok)
    assert rd.valid.mean() > 0.8
    # within 0.5 % of the speed the frames were cut at, either direction (backtracking: < 0)
    assert abs(np.median(rd.along_px[rd.valid]) / v - 1.0) < 0.005
    assert np.percentile(np.abs(rd.along_px[rd.valid] / v - 1.0), 90) < 0.02
    assert abs(np.median(rd.across_px[rd.valid])) < 0.003


def test_row_delay_reads_lateral_drift_and_three_rows():
    t = np.arange(400)
    z, ok = _rows_moving(0.25 * t, 0.04 * t, n_rows=3)
    rd = register.row_delay(z, ok)
    assert rd.valid.mean() > 0.8
    assert abs(np.median(rd.along_px[rd.valid]) / 0.25 - 1.0) < 0.005
    assert abs(np.median(rd.across_px[rd.valid]) - 0.04) < 0.004


def test_row_delay_line_penalty_leaves_a_textured_reading_alone():
    # The penalty towards the swipe's line (across_slope) only decides between nearly equal
    # peaks: on a texture that fixes both axes, lines from -0.5 to 0.5 px across per px along
    # (the true one 0.16) read the speed within 0.5 % and the drift within 0.005 px/frame.
    t = np.arange(400)
    z, ok = _rows_moving(0.25 * t, 0.04 * t, n_rows=3)
    for slope in (None, 0.16, 0.0, 0.5, -0.5):
        rd = register.row_delay(z, ok, across_slope=slope)
        assert rd.valid.mean() > 0.8
        assert abs(np.median(rd.along_px[rd.valid]) / 0.25 - 1.0) < 0.005
        assert abs(np.median(rd.across_px[rd.valid]) - 0.04) < 0.005
    with pytest.raises(ValueError, match="across_slope"):
        register.row_delay(z, ok, across_slope=float("nan"))
    with pytest.raises(ValueError, match="across_penalty"):
        register.row_delay(z, ok, across_slope=0.1, across_penalty=0.0)
    with pytest.raises(ValueError, match="across_slope"):
        register.row_delay(z, ok, across_slope="median")


def test_row_delay_reads_nothing_in_a_stall():
    # moving at 0.3 px/frame for 200 frames, then standing still for 300
    t = np.arange(500)
    along = 0.3 * np.minimum(t, 200)
    z, ok = _rows_moving(along, 0.0 * t)
    rd = register.row_delay(z, ok)
    moving = rd.valid & (rd.time < 190)
    assert moving.sum() > 100 and abs(np.median(rd.along_px[moving]) / 0.3 - 1.0) < 0.005
    # no speed inside the stall: a stalled finger correlates alike at every delay
    assert not (rd.valid & (rd.time > 215)).any()


def test_row_delay_windows_skip_a_dropped_frame():
    # three frames dropped after frame 199: the finger moves 4 steps in one link
    idx = np.concatenate([np.arange(200), np.arange(203, 403)])
    z, ok = _rows_moving(0.25 * idx, 0.0 * idx)
    dt = np.diff(idx).astype(float)
    rd = register.row_delay(z, ok, dt_frames=dt)
    # every estimate read over uniform frames only: none is off by the straddled jump
    assert rd.valid.mean() > 0.6
    assert np.max(np.abs(rd.along_px[rd.valid] / 0.25 - 1.0)) < 0.03
    unaware = register.row_delay(z, ok)
    assert np.max(np.abs(unaware.along_px[unaware.valid] / 0.25 - 1.0)) > 0.03


@settings(max_examples=12, deadline=None)
@given(v=st.floats(0.08, 0.7), seed=st.integers(0, 50))
def test_row_delay_speed_property(v, seed):
    t = np.arange(300)
    z, ok = _rows_moving(v * t, 0.0 * t, seed=seed)
    rd = register.row_delay(z, ok)
    assert rd.valid.sum() > 50
    assert abs(np.median(rd.along_px[rd.valid]) / v - 1.0) < 0.01


def _delay_of_four_rows(v):
    """Exact rows of a 4-row strip moving v px per frame for 300 frames, and the delay read
    between its first and last rows (most of the times read)."""
    t = np.arange(300)
    z, ok = _rows_moving(v * t, 0.0 * t, n_rows=4)
    rd = register.row_delay(z, ok, row_step=3)
    assert rd.valid.mean() > 0.8
    return z, ok, rd


@pytest.mark.parametrize("v", [0.85, 1.2, -1.5])
def test_row_delay_between_rows_further_apart(v):
    # Rows k apart see the same texture k / v frames apart: between the first and last rows
    # of a 4-row strip (k = 3) the delay stays over a frame up to 3 px per frame. Neighbouring
    # rows see it under a frame apart from 1 px per frame: read between lags 0 and 1 by the
    # three-point fit (measured: median speed 0.4 % high at 1.2 px per frame, 1.4 % at 1.5),
    # and not at all when delays under a frame are refused (min_delay=1).
    z, ok, rd = _delay_of_four_rows(v)
    assert abs(np.median(rd.along_px[rd.valid]) / v - 1.0) < 0.005
    assert np.percentile(np.abs(rd.along_px[rd.valid] / v - 1.0), 90) < 0.02
    if abs(v) > 1.0:
        near = register.row_delay(z, ok)
        assert near.valid.mean() > 0.8
        assert abs(np.median(near.along_px[near.valid]) / v - 1.0) < 0.02
        assert register.row_delay(z, ok, min_delay=1.0).valid.mean() < 0.05


@pytest.mark.parametrize("v", [2.6, -2.6])
def test_row_delay_of_a_fast_finger_takes_the_cosine_fit(v):
    # At 2.6 px per frame the texture's ridge period spans about three frames and the delay
    # peak between the first and last rows of a 4-row strip is narrower than the lag
    # spacing; the three-point Gaussian fit read the speed 3.4 % low on these exact rows (the
    # speed they were cut at is the truth), the cosine fit (Cespedes et al. 1995) 1.3 % high.
    _, _, rd = _delay_of_four_rows(v)
    assert abs(np.median(rd.along_px[rd.valid]) / v - 1.0) < 0.02


def test_row_delay_bad_input():
    with pytest.raises(ValueError, match=r"z must be a \(T, R, C\) stack"):
        register.row_delay(np.zeros((10, 64)), np.ones((1, 64), bool))
    with pytest.raises(ValueError, match=r"plate_ok must have shape \(2, 16\)"):
        register.row_delay(np.zeros((10, 2, 16)), np.ones((2, 8), bool))
    with pytest.raises(ValueError, match="row_step"):
        register.row_delay(np.zeros((10, 2, 16)), np.ones((2, 16), bool), row_step=2)
    with pytest.raises(ValueError, match="min_delay"):
        register.row_delay(np.zeros((10, 2, 16)), np.ones((2, 16), bool), min_delay=0.0)


def test_coarse_chain_starts_a_stall_at_zero():
    # A stall: every frame the same window of the texture (plus independent noise), so each
    # successive pair's true shift is zero (exact by construction; scikit-image's phase
    # correlation on the same pairs, an outside check, reads zero too). The coarse start
    # must be zero, not the nearest point of an upsampled grid (+-0.111 px), which the
    # refinement keeps along the ridges where they run straight.
    tex = band_texture((64, 160), period_px=9.0, seed=4)
    frames = cut_frames(tex, np.zeros((40, 2)), n_rows=6, n_cols=128)
    rng = np.random.default_rng(1)
    frames = frames + 0.05 * frames.std() * rng.standard_normal(frames.shape)
    prep = _prep(frames)
    zn = register._row_normalise(prep.z, prep.plate_ok)
    pairs = np.stack([np.arange(39), np.arange(1, 40)], 1)
    shift, score, _ = register.coarse_chain(zn, pairs, max_along=5, max_across=12, pool=8)
    np.testing.assert_array_equal(shift, 0.0)
    ref = np.array([phase_cross_correlation(frames[a], frames[b], upsample_factor=20)[0]
                    for a, b in pairs[:5]])
    np.testing.assert_allclose(ref, 0.0, atol=0.1)
    # A moving chain keeps its sub-pixel start: 0.4 px along per frame, within a grid step.
    moving = cut_frames(tex, np.stack([0.4 * np.arange(40), np.zeros(40)], 1), n_rows=6,
                        n_cols=128)
    prep_m = _prep(moving)
    zm = register._row_normalise(prep_m.z, prep_m.plate_ok)
    shift_m, _, _ = register.coarse_chain(zm, pairs, max_along=5, max_across=12, pool=8)
    np.testing.assert_allclose(shift_m[:, 0], 0.4, atol=0.12)
    np.testing.assert_allclose(shift_m[:, 1], 0.0, atol=0.12)


@pytest.mark.parametrize("n", [2, 3, 5, 8, 16])
def test_half_sample_filter_is_lagrange_and_symmetric_up_to_the_ends(n):
    # Lagrange interpolation at the mid-point of equispaced nodes (the interpolating
    # polynomial's weights: Abramowitz & Stegun ch. 25, from memory): six nodes give the classic
    # [3, -25, 150, 150, -25, 3] / 256, four [-1, 9, 9, -1] / 16, two [1, 1] / 2. With
    # ``symmetric`` (the tracker's) every mid-point's window is centred on it (no phase error:
    # the weights' first moment is the mid-point itself), shrinking towards the ends.
    m = register._lagrange_upsample_matrix(n, symmetric=True)
    np.testing.assert_array_equal(m[0::2], np.eye(n))
    # the default keeps the window's size and shifts it inwards at the ends
    legacy = register._lagrange_upsample_matrix(n)[1::2]
    assert all(np.count_nonzero(np.abs(w) > 1e-15) == min(6, n) for w in legacy)
    mid = m[1::2]
    x = np.arange(n)
    for i, w in enumerate(mid):
        np.testing.assert_allclose(w.sum(), 1.0, atol=1e-12)
        np.testing.assert_allclose(w @ x, i + 0.5, atol=1e-12)
        nz = np.flatnonzero(np.abs(w) > 1e-15)
        k = nz.size
        assert k == min(6, 2 * min(i + 1, n - 1 - i))
        ref = {6: np.array([3, -25, 150, 150, -25, 3]) / 256, 4: np.array([-1, 9, 9, -1]) / 16,
               2: np.array([1, 1]) / 2}[k]
        np.testing.assert_allclose(w[nz], ref, atol=1e-12)
