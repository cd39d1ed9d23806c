"""Tests of stripstitch.evaluate: metrics checked against known answers and outside references."""

from types import SimpleNamespace

import numpy as np
import pytest
from scipy import ndimage as ndi

from stripstitch import Event
from stripstitch import evaluate as ev


# ---------------------------------------------------------------------------------------------
# Helpers: a smooth analytic texture and a stand-in capture cut from it at known positions
# ---------------------------------------------------------------------------------------------

def _texture(r, c):
    """Smooth analytic 2-D signal (sum of oblique sinusoids, ridge-like periods) and gradient."""
    waves = [(9.0, 0.3, 40.0), (11.0, 1.4, 30.0), (14.0, 2.4, 20.0)]
    v = np.zeros(np.broadcast(r, c).shape)
    gr = np.zeros_like(v)
    gc = np.zeros_like(v)
    for period, theta, amp in waves:
        k0, k1 = 2 * np.pi / period * np.cos(theta), 2 * np.pi / period * np.sin(theta)
        ph = k0 * r + k1 * c
        v += amp * np.cos(ph)
        gr += -amp * k0 * np.sin(ph)
        gc += -amp * k1 * np.sin(ph)
    return v + 128.0, gr, gc


def _master(shape, seed, stretch=1.0):
    """Ridge-like random texture: 40 plane waves with periods 7-12 px in random directions and
    phases, evaluated at (r / stretch, c), i.e. exactly stretched by ``stretch`` along axis 0."""
    rng = np.random.default_rng(seed)
    n = 40
    period = rng.uniform(7.0, 12.0, n)
    theta = rng.uniform(0, np.pi, n)
    phase = rng.uniform(0, 2 * np.pi, n)
    rr, cc = np.mgrid[0:shape[0], 0:shape[1]].astype(float)
    k0 = 2 * np.pi * np.cos(theta) / period
    k1 = 2 * np.pi * np.sin(theta) / period
    ph = (rr[..., None] / stretch) * k0 + cc[..., None] * k1 + phase
    return 128.0 + 10.0 * np.cos(ph).sum(axis=-1)


def _fake_capture(n_frames=40, n_rows=8, n_cols=64, step=2, seed=0, snr_db=30.0):
    """Stand-in for simulate.Capture: frames cut from a master at integer along-swipe steps."""
    h = step * (n_frames - 1) + n_rows
    master = _master((h + 20, n_cols), seed)[:h]
    pos = np.stack([step * np.arange(n_frames, dtype=float), np.zeros(n_frames)], axis=1)
    frames = np.stack([master[step * t: step * t + n_rows] for t in range(n_frames)])
    return SimpleNamespace(ideal_frames=frames, frames=frames, positions=pos,
                           angles=np.zeros(n_frames), true_image=master,
                           true_origin_px=np.zeros(2), contact=np.ones(n_frames),
                           events=(Event("stall", 10, 14),), snr_db=snr_db, pitch_um=50.8)


def _perfect_result(cap):
    """Trivial stand-in method: the truth itself."""
    return SimpleNamespace(positions=cap.positions.copy(), angles=cap.angles.copy(),
                           image=cap.true_image.copy(), origin_px=cap.true_origin_px.copy(),
                           pitch_um=np.array([50.8, 50.8]), events=(Event("stall", 11, 13),))


# ---------------------------------------------------------------------------------------------
# Trajectory
# ---------------------------------------------------------------------------------------------

def test_perfect_trajectory_scores_zero():
    cap = _fake_capture()
    err = ev.trajectory_errors(cap.positions, cap.angles, cap.positions, cap.angles)
    assert err.along_rms_px == 0 and err.across_max_px == 0 and err.span_error_pct == 0
    assert err.rotation_max_deg == 0
    np.testing.assert_array_equal(err.increment_rms_px, [0.0, 0.0])


@pytest.mark.parametrize("k", [0.97, 1.01, 1.05])
def test_stretched_trajectory_reports_factor(k):
    # Known answer by construction: positions scaled by k about frame 0 -> span error
    # 100 (k - 1) %, largest along error (k - 1) * span, increment error (k - 1) * step.
    cap = _fake_capture(n_frames=30, step=3)
    err = ev.trajectory_errors(k * cap.positions, None, cap.positions, None)
    span = 3.0 * 29
    assert err.span_error_pct == pytest.approx(100 * (k - 1), rel=1e-9)
    assert err.along_max_px == pytest.approx(abs(k - 1) * span, rel=1e-9)
    assert err.increment_rms_px[0] == pytest.approx(abs(k - 1) * 3.0, rel=1e-9)
    assert err.across_rms_px == 0


def test_reference_frame_and_mask():
    true = np.stack([np.arange(10.0), np.zeros(10)], axis=1)
    est = true + np.array([5.0, -1.0])       # constant offset
    est[0] = 0.0                              # frame 0 is (0, 0) by convention
    mask = np.arange(10) >= 2
    err = ev.trajectory_errors(est, None, true, None, frames=mask, reference_frame=2)
    assert err.along_max_px == pytest.approx(0.0, abs=1e-12) and err.n_scored == 8
    assert np.isnan(err.position_error_px[0]).all()


def test_reference_frame_removes_the_turn_made_before_it():
    # A turn made before the reference frame (before the finger arrived) is not measurable:
    # an estimate that knows everything but that turn places the frames in the reference
    # frame's axes. Re-referenced to that frame it must score zero; scored against frame 0
    # it is off by the rotation of coordinates, Rot(-a) p (common practice).
    from stripstitch.simulate import make_motion
    m = make_motion("constant", frame_rate_hz=2000.0, speed_mm_s=60.0, length_mm=8.0,
                    skew_deg=2.0, rotation_deg=4.0, rng=3)
    pitch = 50.8
    true, tang = m.positions_px(pitch), m.angles_deg()
    k = len(true) // 4
    a_k = np.radians(m.angle_deg[k])                     # absolute sensor angle at frame k
    d = (m.centre_um - m.centre_um[0]) / pitch
    # Rot(-a_k) d written out: (cos d0 + sin d1, -sin d0 + cos d1)
    est = np.stack([np.cos(a_k) * d[:, 0] + np.sin(a_k) * d[:, 1],
                    -np.sin(a_k) * d[:, 0] + np.cos(a_k) * d[:, 1]], axis=1)
    ang = np.where(np.arange(len(true)) >= k, m.angle_deg - m.angle_deg[k], 0.0)
    scored = np.arange(len(true)) >= k
    assert abs(tang[k]) > 0.1                            # the turn before frame k is real
    err = ev.trajectory_errors(est, ang, true, tang, frames=scored, reference_frame=k)
    assert err.along_max_px < 1e-9 and err.across_max_px < 1e-9
    assert err.rotation_max_deg < 1e-12
    # against frame 0 the same estimate is rotated by the turn before frame k (frame 0 had
    # angle a_0, so relative to frame 0 it is tang[k]): across error -sin(tang[k]) * travel
    err0 = ev.trajectory_errors(est, ang, true, tang, frames=scored, reference_frame=0)
    a = np.radians(tang[k])
    rel = est[scored] - true[scored]
    tr = true[scored]
    expect = -np.sin(a) * tr[:, 0] + (np.cos(a) - 1.0) * tr[:, 1]
    np.testing.assert_allclose(rel[:, 1], expect, atol=1e-6 * np.abs(tr).max())
    assert err0.across_max_px > 0.5


def test_trajectory_rejects_bad_shapes():
    with pytest.raises(ValueError, match=r"true_positions must have shape \(5, 2\)"):
        ev.trajectory_errors(np.zeros((5, 2)), None, np.zeros((4, 2)), None)
    with pytest.raises(ValueError, match=r"frames must be a boolean mask of shape \(5,\)"):
        ev.trajectory_errors(np.zeros((5, 2)), None, np.zeros((5, 2)), None, frames=[True])


# ---------------------------------------------------------------------------------------------
# Cramer-Rao bound
# ---------------------------------------------------------------------------------------------

def test_crb_sinusoid_worked_value():
    # Source: REFERENCE-VALUES.md "extra checks": 1-D sinusoid A = 50, sigma = 5, T = 9.84 px,
    # N = 8 x 192 -> std >= sigma T / (pi A sqrt(2N)) = 0.00565 px, from the Fisher
    # information of Robinson & Milanfar (2004), doi:10.1109/TIP.2004.832923.
    # Tolerance 1 %: 192 px hold a non-integer number of periods (sum of sin^2 != N/2 exactly)
    # and the finite-difference gradient is 0.05 % low (7-point stencil).
    c = np.arange(192.0)
    frame = np.tile(50.0 * np.cos(2 * np.pi * c / 9.84), (8, 1))
    cov = ev.crb_translation(frame, frame, (0.0, 0.0), 5.0, both_noisy=False)
    assert np.sqrt(cov[1, 1]) == pytest.approx(5 * 9.84 / (np.pi * 50 * np.sqrt(2 * 8 * 192)), rel=0.01)
    assert np.sqrt(cov[1, 1]) == pytest.approx(0.00565, rel=0.01)
    assert np.isinf(cov[0, 0]) and cov[0, 1] == 0
    both = ev.crb_translation(frame, frame, (0.0, 0.0), 5.0)     # noise in both: doubled
    assert both[1, 1] == pytest.approx(2 * cov[1, 1], rel=1e-12)


def test_crb_scales_with_sigma_and_overlap():
    # Robinson & Milanfar (2004): J = (1/sigma^2) sum grad grad^T over the overlap, so the
    # bound scales as sigma^2 and grows as the overlap shrinks.
    rr, cc = np.mgrid[0:16, 0:64].astype(float)
    frame = _texture(rr, cc)[0]
    c1 = ev.crb_translation(frame, frame, (0, 0), 1.0, both_noisy=False)
    c3 = ev.crb_translation(frame, frame, (0, 0), 3.0, both_noisy=False)
    np.testing.assert_allclose(c3, 9 * c1, rtol=1e-12)
    c_half = ev.crb_translation(frame, frame, (8, 0), 1.0, both_noisy=False)
    assert c_half[0, 0] > 1.5 * c1[0, 0]
    none = ev.crb_translation(frame, frame, (16, 0), 1.0, both_noisy=False)
    assert np.isinf(none[0, 0]) and np.isinf(none[1, 1])


def _gauss_newton_shift(b, r, c, n_iter=6):
    """Least-squares (Gauss-Newton) shift estimate of noisy frames b (N, R, C) against the
    known noise-free analytic texture: minimise sum (b - I(x + d))^2 over d."""
    d = np.zeros((b.shape[0], 2))
    for _ in range(n_iter):
        v, gr, gc = _texture(r[None] + d[:, 0, None, None], c[None] + d[:, 1, None, None])
        res = (b - v).reshape(len(b), -1)
        g = np.stack([gr.reshape(len(b), -1), gc.reshape(len(b), -1)], axis=-1)
        h = np.einsum("npi,npj->nij", g, g)
        d += np.linalg.solve(h, np.einsum("npi,np->ni", g, res)[..., None])[..., 0]
    return d


def test_crb_matches_monte_carlo_gauss_newton():
    # Robinson & Milanfar (2004), doi:10.1109/TIP.2004.832923: the least-squares (ML for white
    # Gaussian noise) shift estimator is asymptotically efficient, so its covariance over a
    # Monte-Carlo approaches J^-1. Brief: agreement within 20 %. 600 trials give a ~6 %
    # standard error on a variance.
    rng = np.random.default_rng(20240611)
    rr, cc = np.mgrid[0:8, 0:64].astype(float)
    d_true = np.array([0.3, -0.2])
    ideal_a = _texture(rr, cc)[0]
    ideal_b = _texture(rr + d_true[0], cc + d_true[1])[0]
    sigma = 8.0
    noisy_b = ideal_b[None] + rng.normal(scale=sigma, size=(600,) + ideal_b.shape)
    est = _gauss_newton_shift(noisy_b, rr, cc)
    emp = np.cov(est.T)
    bound = ev.crb_translation(ideal_a, ideal_b, d_true, sigma, both_noisy=False)
    np.testing.assert_allclose(np.diag(emp), np.diag(bound), rtol=0.20)
    np.testing.assert_allclose(est.mean(axis=0), d_true, atol=3 * np.sqrt(np.diag(bound)).max())

    # Noise in both frames: linearised least squares b - a ~ grad(I) . d has noise variance
    # 2 sigma^2, so its covariance is twice the single-noisy bound (the doubling stated in
    # crb_translation).
    noisy_a = ideal_a[None] + rng.normal(scale=sigma, size=noisy_b.shape)
    noisy_b2 = ideal_b[None] + rng.normal(scale=sigma, size=noisy_b.shape)
    _, gr, gc = _texture(rr, cc)
    g = np.stack([gr.ravel(), gc.ravel()], axis=1)
    est2 = np.linalg.lstsq(g, (noisy_b2 - noisy_a).reshape(len(noisy_a), -1).T, rcond=None)[0].T
    bound2 = ev.crb_translation(ideal_a, ideal_b, d_true, sigma, both_noisy=True)
    np.testing.assert_allclose(np.diag(np.cov(est2.T)), np.diag(bound2), rtol=0.20)


def test_pair_crb_vectorised_matches_single_pairs():
    cap = _fake_capture(n_frames=12, n_rows=8, step=3, seed=3)
    pb = ev.pair_crb(cap, noise_sigma=2.0)
    assert pb.std_px.shape == (11, 2) and pb.covariance_px2.shape == (11, 2, 2)
    for t in (0, 5, 10):
        cov = ev.crb_translation(cap.ideal_frames[t], cap.ideal_frames[t + 1],
                                 cap.positions[t + 1] - cap.positions[t], 2.0)
        np.testing.assert_allclose(pb.covariance_px2[t], cov, rtol=1e-10)
    assert not pb.std_px.flags.writeable


def test_crb_rejects_bad_input():
    with pytest.raises(ValueError, match="noise_sigma must be a finite number > 0"):
        ev.crb_translation(np.ones((4, 4)), np.ones((4, 4)), (0, 0), 0.0)
    with pytest.raises(ValueError, match=r"ideal_b must have shape \(4, 4\)"):
        ev.crb_translation(np.ones((4, 4)), np.ones((4, 5)), (0, 0), 1.0)


# ---------------------------------------------------------------------------------------------
# Image metrics
# ---------------------------------------------------------------------------------------------

def test_image_similarity_perfect_and_against_reference_libraries():
    from skimage.metrics import structural_similarity

    truth = _master((120, 64), 5)
    sim = ev.image_similarity(truth, (0, 0), truth, (0, 0))
    assert sim.ncc == pytest.approx(1.0, abs=1e-12) and sim.ssim == pytest.approx(1.0, abs=1e-12)
    np.testing.assert_allclose(sim.offset_px, 0.0, atol=1e-12)

    # A degraded copy covering everything: NCC equals numpy's Pearson coefficient
    # (np.corrcoef) and SSIM equals skimage's structural_similarity mean away from the border.
    rng = np.random.default_rng(7)
    noisy = ndi.gaussian_filter(truth, 0.8) + rng.normal(scale=20.0, size=truth.shape)
    sim = ev.image_similarity(noisy, (0, 0), truth, (0, 0), subpixel=False)
    np.testing.assert_array_equal(sim.offset_px, [0, 0])
    assert sim.ncc == pytest.approx(np.corrcoef(noisy.ravel(), truth.ravel())[0, 1], rel=1e-10)
    # match_intensity=False: the scikit-image call as is; with matching, a gain/offset change
    # leaves SSIM unchanged.
    sim = ev.image_similarity(noisy, (0, 0), truth, (0, 0), subpixel=False, match_intensity=False)
    _, smap = structural_similarity(truth, noisy, data_range=np.ptp(truth), full=True)
    assert sim.ssim == pytest.approx(smap[3:-3, 3:-3].mean(), rel=1e-10)
    s1 = ev.image_similarity(noisy, (0, 0), truth, (0, 0), subpixel=False).ssim
    s2 = ev.image_similarity(0.3 * noisy - 40.0, (0, 0), truth, (0, 0), subpixel=False).ssim
    assert s1 == pytest.approx(s2, rel=1e-9)
    assert sim.ssim == pytest.approx(smap[3:-3, 3:-3].mean(), rel=1e-10)
    assert 0.2 < sim.ssim < 0.95


def test_image_similarity_finds_global_offset_and_ignores_nan():
    truth = _master((150, 64), 6)
    recon = truth[10:140].copy()                  # recon row i = truth row i + 10
    recon[:, :5] = np.nan                         # uncovered columns
    # Nominal placement claims frame 0 at recon row 3 (it is at row 0): offset -3 px along.
    sim = ev.image_similarity(recon, (3, 0), truth, (10, 0))
    np.testing.assert_allclose(sim.offset_px, [-3, 0], atol=0.05)
    assert sim.ncc > 0.999 and sim.ssim > 0.99
    # 130 x 59 common pixels; a sub-pixel offset costs at most one row and one column.
    assert 129 * 58 / (150 * 64) - 1e-9 <= sim.overlap_fraction <= 130 * 59 / (150 * 64) + 1e-9


def test_ridge_period_known_sinusoid_and_stretch():
    # Period of a plane wave with wave vector at angle theta: T overall, T / |cos theta| along
    # axis 0 and T / |sin theta| along axis 1 (ridge spacing along a line); common practice.
    rr, cc = np.mgrid[0:160, 0:160].astype(float)
    t, th = 9.84, np.deg2rad(30.0)
    img = np.cos(2 * np.pi * (rr * np.cos(th) + cc * np.sin(th)) / t)
    p = ev.ridge_period(img)
    assert p.overall_px == pytest.approx(t, rel=0.02)
    assert p.along_px == pytest.approx(t / np.cos(th), rel=0.03)
    assert p.across_px == pytest.approx(t / np.sin(th), rel=0.03)
    # A texture stretched by k along the swipe (scipy.ndimage.map_coordinates) reports k along
    # and 1 across.
    truth = _master((300, 96), 8)
    k = 1.06
    st = _master((300, 96), 8, stretch=k)
    pt, pe = ev.ridge_period(truth), ev.ridge_period(st)
    assert pe.along_px / pt.along_px == pytest.approx(k, abs=0.015)
    assert pe.across_px / pt.across_px == pytest.approx(1.0, abs=0.015)


def test_distortion_map_shift_and_stretch():
    truth = _master((192, 64), 9)
    # Uniform sub-pixel shift with scipy.ndimage.fourier_shift (the skimage gallery's way of
    # making a known shift): recon(x) = truth(x - u) -> every block reports u.
    u = np.array([1.3, -0.6])
    shifted = np.fft.ifftn(ndi.fourier_shift(np.fft.fftn(truth), u)).real
    dm = ev.distortion_map(shifted[8:-8, 8:-8], truth[8:-8, 8:-8], block_px=32)
    ok = np.isfinite(dm.displacement_px).all(axis=-1)
    assert ok.sum() >= 10
    np.testing.assert_allclose(dm.displacement_px[ok], np.broadcast_to(u, (ok.sum(), 2)), atol=0.1)
    # Stretch by k about row 0: truth point at row p appears at k p, i.e. u_along = (k - 1) p.
    k = 1.02
    st = _master(truth.shape, 9, stretch=k)
    dm = ev.distortion_map(st, truth, block_px=32)
    ok = np.isfinite(dm.displacement_px).all(axis=-1)
    rows = dm.centres_px[..., 0][ok]
    slope = np.polyfit(rows, dm.displacement_px[..., 0][ok], 1)[0]
    assert slope == pytest.approx(k - 1, abs=0.003)
    assert dm.scale[0] == pytest.approx(k, abs=0.003) and dm.scale[1] == pytest.approx(1.0, abs=0.003)
    np.testing.assert_allclose(dm.displacement_px[..., 1][ok], 0.0, atol=0.25)


def test_image_metric_errors():
    with pytest.raises(ValueError, match="win_size must be odd"):
        ev.image_similarity(np.ones((20, 20)), (0, 0), np.ones((20, 20)), (0, 0), win_size=8)
    with pytest.raises(ValueError, match=r"band_px must be \(min, max\)"):
        ev.ridge_period(np.ones((20, 20)), band_px=(5, 3))
    with pytest.raises(ValueError, match=r"true_image must have shape \(20, 20\)"):
        ev.distortion_map(np.ones((20, 20)), np.ones((20, 21)))


# ---------------------------------------------------------------------------------------------
# Events
# ---------------------------------------------------------------------------------------------

def test_event_scores_worked_example():
    # Hand-worked: reported gaps [10-12], [50-50], [90-95]; true gaps [11-11], [93-99], [200-201];
    # reported stall [30-40] vs true stall [42-45] (2 frames apart, within slack 2).
    rep = [Event("gap", 10, 12), Event("gap", 50, 50), Event("gap", 90, 95), Event("stall", 30, 40)]
    tru = [Event("gap", 11, 11), ("gap", 93, 99), {"kind": "gap", "first_frame": 200, "last_frame": 201},
           Event("stall", 42, 45), Event("skew", 0, 300)]
    s = ev.event_scores(rep, tru)
    assert dict(s.counts["gap"]) == {"n_true": 3, "n_reported": 3, "detected": 2, "correct": 2,
                                     "false": 1, "missed": 1}
    assert s.precision["gap"] == pytest.approx(2 / 3) and s.recall["gap"] == pytest.approx(2 / 3)
    assert s.recall["stall"] == 1.0 and np.isnan(s.precision["backtrack"])
    assert ev.event_scores(rep, tru, slack_frames=0).recall["stall"] == 0.0
    assert s.false_count("gap") == 1
    pooled = ev.combine_event_scores([s, ev.event_scores([], [Event("gap", 1, 2)])])
    assert pooled.counts["gap"]["n_true"] == 4 and pooled.recall["gap"] == pytest.approx(0.5)


def test_event_scores_rejects_junk():
    with pytest.raises(TypeError, match="events must hold Event objects"):
        ev.event_scores([3.0], [])


# ---------------------------------------------------------------------------------------------
# evaluate() on a stand-in method
# ---------------------------------------------------------------------------------------------

def test_evaluate_perfect_stand_in_scores_perfectly():
    cap = _fake_capture(n_frames=40, step=2, seed=11)
    e = ev.evaluate(_perfect_result(cap), cap)
    d = e.to_dict()
    assert d["along_rms_px"] == 0 and d["span_error_pct"] == 0 and d["rotation_max_deg"] == 0
    assert d["ncc"] == pytest.approx(1.0, abs=1e-12) and d["ssim"] == pytest.approx(1.0, abs=1e-12)
    assert d["distortion_max_px"] == pytest.approx(0.0, abs=1e-9)
    assert d["period_ratio_along"] == pytest.approx(1.0, abs=1e-12)
    assert d["stall_detected"] == 1 and d["stall_false"] == 0
    assert d["crb_rms_along_px"] > 0 and np.isfinite(d["crb_rms_along_px"])
    import json
    json.dumps(d)                                         # JSON-ready


def test_evaluate_capture_without_ideal_frames_skips_the_bound():
    # A capture saved without its noise-free frames (demo data are) is still scored; the
    # Cramer-Rao bound needs them and is left out, and asking for it names the missing field.
    cap = _fake_capture(n_frames=40, step=2, seed=11)
    bare = SimpleNamespace(**{**vars(cap), "ideal_frames": None})
    d = ev.evaluate(_perfect_result(cap), bare).to_dict()
    assert d["along_rms_px"] == 0 and d["span_error_pct"] == 0
    assert d["crb_rms_along_px"] is None or not np.isfinite(d["crb_rms_along_px"])
    with pytest.raises(ValueError, match="ideal_frames"):
        ev.pair_crb(bare)


def test_evaluate_scores_frames_of_a_narrow_pad_not_blank_frames():
    # Worked example: a pad covering at most 40 % of the strip. The frames of at least half
    # that contact are placed exactly and the blank ones 10 px off: span and position errors
    # are those of the scored frames (zero), not of the blank frames' guesses (span over all
    # frames would read 20 px on 78: +25.6 %).
    cap = _fake_capture(n_frames=40, step=2, seed=11)
    cap.contact = np.where((np.arange(40) >= 5) & (np.arange(40) < 35), 0.4, 0.0)
    cap.contact[5:8] = 0.1                   # the fingertip arriving: under half of 0.4
    res = _perfect_result(cap)
    res.positions[:5, 0] -= 10.0
    res.positions[35:, 0] += 10.0
    res.positions[5:8, 1] += 3.0
    d = ev.evaluate(res, cap, crb=False, image=False).to_dict()
    assert d["span_error_pct"] == 0 and d["along_rms_px"] == 0 and d["across_rms_px"] == 0
    # Scored over every frame, the same result would read the blank frames' error.
    every = ev.trajectory_errors(res.positions, None, cap.positions, None)
    assert every.span_error_pct == pytest.approx(100 * 20 / 78)


def test_evaluate_stretched_stand_in_reports_factor():
    # A reconstruction stretched by k along the swipe (positions k * truth, image stretched
    # by k about frame 0) reports span error 100 (k - 1) % and an along period ratio ~ k.
    cap = _fake_capture(n_frames=120, step=2, seed=12, n_cols=64)
    k = 1.04
    res = _perfect_result(cap)
    res.positions = k * cap.positions
    res.image = _master((int(cap.true_image.shape[0] * k), cap.true_image.shape[1]), 12, stretch=k)
    e = ev.evaluate(res, cap, search_px=4)
    assert e.trajectory.span_error_pct == pytest.approx(4.0, rel=1e-9)
    assert e.period_ratio[0] == pytest.approx(k, abs=0.015)
    assert e.period_ratio[1] == pytest.approx(1.0, abs=0.015)
    assert e.distortion.max_px > 2.0
    assert e.distortion.scale[0] == pytest.approx(k, abs=0.005)


def test_evaluate_resamples_other_output_pitch():
    # Output pitch half the sensor pitch: the image is resampled back before comparing.
    cap = _fake_capture(n_frames=30, step=2, seed=13)
    res = _perfect_result(cap)
    t = cap.true_image
    gi, gj = np.meshgrid(np.arange(2 * t.shape[0] - 1) / 2, np.arange(2 * t.shape[1] - 1) / 2,
                         indexing="ij")
    res.image = ndi.map_coordinates(t, [gi, gj], order=1)
    res.pitch_um = np.array([25.4, 25.4])
    e = ev.evaluate(res, cap, distortion=False)
    assert e.similarity.ncc == pytest.approx(1.0, abs=1e-9)


def test_evaluate_rejects_mismatched_result():
    cap = _fake_capture(n_frames=10)
    res = SimpleNamespace(positions=np.zeros((9, 2)))
    with pytest.raises(ValueError, match=r"result.positions must have the capture's shape \(10, 2\)"):
        ev.evaluate(res, cap)


# ---------------------------------------------------------------------------------------------
# Plots (optional extra "plot")
# ---------------------------------------------------------------------------------------------

def test_report_page_and_plots_draw(tmp_path):
    pytest.importorskip("matplotlib")
    from stripstitch import plots

    cap = _fake_capture(n_frames=60, step=2, seed=14)
    cap.times_s = np.arange(60) / 4000.0
    res = _perfect_result(cap)
    res.positions = 1.01 * cap.positions
    e = ev.evaluate(res, cap)
    path = tmp_path / "report.png"
    fig = plots.report_page(res, cap, e, path)
    with open(path, "rb") as fh:
        assert fh.read(8) == b"\x89PNG\r\n\x1a\n"                # PNG signature (ISO/IEC 15948)
    assert len(fig.axes) >= 6
    line = plots.plot_speed_profile(res, cap).axes[0].lines
    # true speed: 2 px per frame at 4 kHz and 50.8 um pitch = 406.4 mm/s; estimate 1 % more
    np.testing.assert_allclose(line[0].get_ydata(), 406.4, rtol=1e-9)
    np.testing.assert_allclose(line[1].get_ydata(), 1.01 * 406.4, rtol=1e-9)
