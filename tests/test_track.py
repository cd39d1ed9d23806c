"""Key-frame tracker (stripstitch.track) and the fast mode built on it.

Frames are cut from an analytic band-limited texture (a sum of plane waves, periods of 5 pixels and more
like ridges at 500 ppi), so every frame is exact at any sub-pixel position: the truth is the sampling
itself (Shannon sampling; common practice), not another part of the library.
"""

import cv2
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from stripstitch import stitch
from stripstitch.track import FrameTracker, _coarse, track


def _waves(seed, n=40, fmax=0.15):
    rng = np.random.default_rng(seed)
    f = rng.uniform(-fmax, fmax, size=(n, 2))
    f[:, 0] = np.abs(f[:, 0]) + 0.02            # every wave varies along the swipe too
    ph = rng.uniform(0, 2 * np.pi, n)
    amp = rng.uniform(0.5, 1.0, n)
    return f, ph, amp


def _frames(positions, shape=(8, 96), seed=0, waves=None, noise=0.0):
    """Frames whose plate (r, c) sees texture(r + p0, c + p1) (library convention)."""
    f, ph, amp = _waves(seed) if waves is None else waves
    r_n, c_n = shape
    rr, cc = np.meshgrid(np.arange(r_n), np.arange(c_n), indexing="ij")
    out = np.empty((len(positions), r_n, c_n))
    for t, (p0, p1) in enumerate(positions):
        arg = 2 * np.pi * (f[:, 0, None, None] * (rr + p0) + f[:, 1, None, None] * (cc + p1))
        out[t] = np.tensordot(amp, np.cos(arg + ph[:, None, None]), axes=1)
    if noise:
        out += noise * np.random.default_rng(seed + 1).standard_normal(out.shape)
    return out.astype(np.float32)


def _run(pos, **kw):
    z = _frames(pos, **{k: v for k, v in kw.items() if k in ("shape", "seed", "noise", "waves")})
    opts = {k: v for k, v in kw.items() if k not in ("shape", "seed", "noise", "waves")}
    return track(z, np.ones(z.shape[1:], bool), **opts)


def _err(res, pos):
    est = res.positions - res.positions[0]
    return np.abs(est - (pos - pos[0])).max(axis=0)


def test_steady_subpixel_swipe():
    t = np.arange(200)
    pos = np.stack([0.37 * t, 0.11 * t], 1)
    res = _run(pos)
    assert res.link_ok.all()
    assert (_err(res, pos) < 0.03).all()


def test_slow_swipe_does_not_drift():
    # The drift trap of small steps: 3000 frames at 0.05 px/frame (150 px). Chaining 3000
    # steps with a 1e-3 px bias each would already lose 3 px; key frames keep it to one pair.
    t = np.arange(3000)
    pos = np.stack([0.05 * t, np.zeros_like(t, dtype=float)], 1)
    res = _run(pos, shape=(8, 64))
    assert (_err(res, pos) < 0.05).all()
    assert res.n_keys < 200


def test_varying_speed_stall_and_backtrack():
    # Speed varying from 0 (a stall of 80 frames) to 2 px/frame, then reversing (a backtrack)
    # and going forward again: every frame placed where it belongs.
    v = np.concatenate([np.linspace(0.2, 2.0, 100), np.zeros(80), np.linspace(0.5, -1.0, 60),
                        np.linspace(-1.0, 1.0, 60), np.full(60, 1.0)])
    p0 = np.concatenate([[0.0], np.cumsum(v)])
    p1 = 0.3 * np.sin(np.arange(p0.size) / 40.0)
    pos = np.stack([p0, p1], 1)
    res = _run(pos, sigma_acc_px=0.2)
    assert res.link_ok.all()
    assert (_err(res, pos) < 0.05).all()


def test_fast_steps_near_the_strip_height():
    # 5.5 rows per frame on an 8-row strip: every frame is its own key, so the error of each
    # step (2.5 rows of overlap at half a pixel) adds up; it stays below 0.01 px a step.
    t = np.arange(60)
    pos = np.stack([5.5 * t, -0.2 * t], 1)
    res = _run(pos)
    assert res.link_ok.all()
    inc = np.diff(res.positions, axis=0) - np.diff(pos, axis=0)
    assert np.abs(inc).max() < 0.01
    assert (_err(res, pos) < 0.4).all()


def test_steps_agree_with_opencv_ecc_registration():
    # Outside reference: OpenCV's enhanced-correlation-coefficient registration
    # (cv2.findTransformECC, translation; Evangelidis & Psarakis, IEEE PAMI 30(10), 2008) on
    # the same successive frames, at a moderate SNR. ECC finds W with input(W(u)) ~
    # template(u); with template = frames[t + 1] and input = frames[t] that is our step.
    t = np.arange(80)
    pos = np.stack([1.3 * t + 0.2 * np.sin(t / 7.0), 0.25 * t], 1)
    z = _frames(pos, shape=(16, 128), noise=0.05)
    res = track(z, np.ones(z.shape[1:], bool))
    ours = np.diff(res.positions, axis=0)
    crit = (cv2.TERM_CRITERIA_EPS | cv2.TERM_CRITERIA_COUNT, 100, 1e-6)
    ref = []
    for k in range(len(z) - 1):
        w = np.eye(2, 3, dtype=np.float32)
        w[1, 2], w[0, 2] = np.round(ours[k])       # only the whole pixels come from us
        _, w = cv2.findTransformECC(z[k + 1], z[k], w, cv2.MOTION_TRANSLATION, crit, None, 1)
        ref.append((w[1, 2], w[0, 2]))
    ref = np.array(ref)
    assert np.median(np.abs(ours - ref), axis=0).max() < 0.03
    # The tracker is no worse than the pairwise reference against the truth (it also uses
    # the motion model and a second key frame).
    true = np.diff(pos, axis=0)
    assert np.sqrt(np.mean((ours - true) ** 2)) <= 1.1 * np.sqrt(np.mean((ref - true) ** 2))


def test_gap_is_reported_as_a_failed_link():
    # The finger jumps 20 rows between frames 50 and 51: nothing overlaps there.
    p0 = np.concatenate([0.5 * np.arange(51), 20.0 + 0.5 * np.arange(51, 100)])
    pos = np.stack([p0, np.zeros_like(p0)], 1)
    res = _run(pos)
    assert not res.link_ok[50]
    assert res.link_ok[:50].all() and res.link_ok[52:].all()
    assert res.reference[51] == -1 or res.reference[50] == -1


@pytest.mark.parametrize("seed", range(6))
def test_integer_search_keeps_the_row_means(seed):
    # Ridges running across the strip (an arch): nearly all the along-swipe signal is in the
    # rows' means, the other detail is weak. The search the tracker falls back on when its
    # prediction fails must find the whole-pixel shift nearest the true one (Shannon-exact
    # frames; common practice: an NCC peak within half a pixel). Rows normalised one by one
    # lost the means and read -5, 7, -4, -4, 7 rows for 1.2 on five of these six textures.
    rng = np.random.default_rng(seed)
    n = 12
    f = np.stack([rng.uniform(0.09, 0.13, n), rng.uniform(-0.15, 0.15, n)], 1)
    f[:3, 1] = 0.0
    waves = (f, rng.uniform(0, 2 * np.pi, n), np.where(np.arange(n) < 3, 1.0, 0.05))
    z = _frames(np.array([[0.0, 0.0], [1.2, 0.1]]), shape=(8, 64), waves=waves, noise=0.3,
                seed=seed)
    res = np.zeros(5)
    _coarse(z[0], z[1], np.ones((8, 64), np.float32), 7, 8, 0.0, 0.0, False, res)
    assert res[0] == 1.0
    assert abs(res[1] - 0.1) < 1.5            # across is weak here: within the refinement's reach


@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(d=st.integers(-7, 7), e=st.integers(-8, 8), seed=st.integers(0, 1000))
def test_integer_search_finds_whole_pixel_shifts(d, e, seed):
    # Frames a whole number of pixels apart on the sampled texture: the NCC peak is exactly
    # there (the overlap holds the same samples; common practice). The search takes its sums
    # from running sums along the rows when every plate is usable and plate by plate under a
    # mask: one dead plate must not move the shift it reads, nor its score by much.
    z = _frames(np.array([[0.0, 0.0], [float(d), float(e)]]), shape=(8, 64), seed=seed,
                noise=0.05)
    res_full, res_mask = np.zeros(5), np.zeros(5)
    m = np.ones((8, 64), np.float32)
    _coarse(z[0], z[1], m, 7, 8, 0.0, 0.0, False, res_full)
    m[3, 40] = 0.0
    _coarse(z[0], z[1], m, 7, 8, 0.0, 0.0, False, res_mask)
    if abs(d) <= 5:                              # at least 3 rows of overlap: unambiguous
        assert (res_full[0], res_full[1]) == (d, e)
    assert (res_mask[0], res_mask[1]) == (res_full[0], res_full[1])
    assert abs(res_mask[2] - res_full[2]) < 0.02


def test_arch_swipe_on_a_narrow_strip_has_no_false_gap():
    # Simulated 8x64 strip, wet tented arch at 18 dB, speeding up to 1.4 px per frame with a
    # backtrack: the fallback search once put a 1.2-row step at 7 rows, the link was called
    # a gap and the swipe came out 3 % long. Truth: the simulator's positions.
    from stripstitch import evaluate, simulate
    finger = simulate.make_finger("tented_arch", size_mm=(14.0, 10.0), rng=623, skin="wet")
    cap = simulate.swipe("tented_arch", finger=finger, rng=1023, n_rows=8, n_cols=64,
                         frame_rate_hz=1000.0, profile="accel_decel", speed_mm_s=39.15,
                         snr_db=18.17, skew_deg=-5.05, backtracks=((8.1, 0.556),))
    res = stitch(cap.frames, pitch_um=float(cap.pitch_um), frame_rate_hz=1000.0)
    assert not [e for e in res.events if e.kind == "gap"]
    ev = evaluate.evaluate(res, cap, image=False, distortion=False).to_dict()
    assert abs(ev["span_error_pct"]) < 1.0


def test_aperture_direction_keeps_the_prediction():
    # Ridges parallel to the swipe (texture varies only across): the along-swipe motion is
    # not observable; the tracker must not wander along it, and says so in the information.
    rng = np.random.default_rng(3)
    n = 30
    waves = (np.stack([np.zeros(n), rng.uniform(0.05, 0.3, n)], 1), rng.uniform(0, 6.28, n),
             np.ones(n))
    t = np.arange(120)
    pos = np.stack([0.5 * t, 0.1 * t], 1)
    res = _run(pos, waves=waves)
    info = res.info[1:]
    assert np.median(info[:, 0, 0]) < 1e-3 * np.median(info[:, 1, 1])
    est = res.positions - res.positions[0]
    assert np.abs(est[:, 1] - pos[:, 1]).max() < 0.05             # across still exact
    assert np.abs(est[:, 0]).max() < 2.0                             # along: no wild walk


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(v0=st.floats(-4.0, 4.0), v1=st.floats(-1.0, 1.0), seed=st.integers(0, 1000))
def test_random_constant_velocity_recovered(v0, v1, seed):
    t = np.arange(40)
    pos = np.stack([v0 * t, v1 * t], 1)
    res = _run(pos, seed=seed)
    assert res.link_ok.all()
    # Up to 40 key hops, whose errors add as a random walk. The worst speeds hop every frame
    # at a fraction far from a whole pixel; measured over 300 noise seeds: at 3.375 px/frame
    # (0.375 fraction) median 0.146 px after 39 hops, 99th percentile 0.199, largest 0.218
    # (hypothesis drew seed 79, 0.188, against the earlier bound of 0.18); at 3.5 px/frame
    # 0.108 / 0.162 / 0.172; at 3.625 and 2.375 px/frame under 0.09. 135 px of travel, so
    # 0.25 px is 0.19 % of the span, within the 1 % geometric-accuracy target.
    assert (_err(res, pos) < 0.25).all()


def test_gain_and_offset_do_not_matter():
    t = np.arange(60)
    pos = np.stack([0.7 * t, 0.05 * t], 1)
    z = _frames(pos)
    m = np.ones(z.shape[1:], bool)
    a = track(z, m).positions
    b = track(3.0 * z + 7.0, m).positions
    assert np.abs(a - b).max() < 0.01


def test_dead_plates_masked():
    t = np.arange(80)
    pos = np.stack([0.6 * t, 0.0 * t], 1)
    z = _frames(pos)
    m = np.ones(z.shape[1:], bool)
    m[:, 10] = False                    # a dead column stuck at a high value
    z[:, :, 10] = 50.0
    res = track(z, m)
    assert (_err(res, pos) < 0.05).all()


def test_finger_narrower_than_the_strip():
    # Columns the finger never touched are masked: only the band of usable plates is
    # registered, with its own boundary; the texture's sampling is the truth.
    t = np.arange(120)
    pos = np.stack([0.45 * t, 0.03 * t], 1)
    z = _frames(pos, shape=(8, 128))
    m = np.ones(z.shape[1:], bool)
    m[:, :20] = False
    m[:, 110:] = False
    z[:, :, :20] = 0.0                  # flat, as prepared frames are where nothing touched
    z[:, :, 110:] = 0.0
    res = track(z, m)
    assert res.link_ok.all()
    assert (_err(res, pos) < 0.05).all()
    # the same as tracking the band alone
    band = track(np.ascontiguousarray(z[:, :, 20:110]), np.ones((8, 90), bool))
    assert np.abs(band.positions - res.positions).max() < 1e-6


@pytest.mark.parametrize("kw, exc, msg", [
    (dict(plate_mask=np.ones((3, 3), bool)), ValueError, "plate_mask must be a boolean array of shape"),
    (dict(chain=[3, 2, 5]), ValueError, "chain must hold at least two increasing"),
    (dict(chain=[0.5, 1.5]), TypeError, "chain must be a 1-D integer array"),
    (dict(reach_px=-1.0), ValueError, "reach_px"),
    (dict(iterations=0), ValueError, "iterations"),
    (dict(times=np.zeros(3)), ValueError, "times"),
    (dict(start=99), ValueError, "start"),
    (dict(sideways_acc=1.5), ValueError, "sideways_acc"),
    (dict(prefilter_px=-0.1), ValueError, "prefilter_px"),
    (dict(prefilter_px=5.0), ValueError, "prefilter_px"),
])
def test_bad_input(kw, exc, msg):
    z = _frames(np.stack([np.arange(10) * 0.5, np.zeros(10)], 1))
    args = dict(plate_mask=np.ones(z.shape[1:], bool))
    args.update(kw)
    with pytest.raises(exc, match=msg):
        track(z, **args)


def test_fast_mode_uses_the_tracker_and_hands_short_strips_over():
    t = np.arange(150)
    pos = np.stack([0.6 * t, 0.05 * t], 1)
    res = stitch(_frames(pos, shape=(8, 96)) * 20 + 100, mode="fast")
    assert res.options["placement"] == "key-frame tracker"
    est = res.positions - res.positions[0]
    assert np.abs(est - pos).max() < 0.1
    # Three and four rows: too little overlap per key frame for the tracker (fewer than 5
    # rows); the pairwise path takes over. Five and six rows are tracked.
    for r_n in (5, 6):
        res6 = stitch(_frames(pos, shape=(r_n, 96)) * 20 + 100, mode="fast")
        assert res6.options["placement"] == "key-frame tracker"
        assert np.abs((res6.positions - res6.positions[0]) - pos).max() < 0.1
    for r_n in (3, 4):
        pos3 = np.stack([0.3 * np.arange(150), np.zeros(150)], 1)
        res3 = stitch(_frames(pos3, shape=(r_n, 96)) * 20 + 100, mode="fast")
        assert res3.options["placement"] == "multi-baseline pairs"
        assert np.abs((res3.positions - res3.positions[0]) - pos3).max() < 0.5


def test_frame_tracker_in_pieces_equals_forward_tracking():
    # Fed in pieces of any size (down to single frames), the streaming tracker carries its
    # filter and key frames between pushes: the same placement as tracking the whole swipe
    # forwards from its first frame (track(..., start=0)), and within the texture's truth.
    t = np.arange(300)
    v = 0.4 + 0.3 * np.sin(t / 40.0)
    pos = np.stack([np.cumsum(v) - v[0], 0.02 * t], 1)
    z = _frames(pos, shape=(8, 96), seed=4, noise=0.02)
    m = np.ones((8, 96), bool)
    m[:, :7] = False
    whole = track(z, m, start=0)
    ft = FrameTracker(m)
    outs, k = [], 0
    for size in (1, 1, 2, 5, 17, 3, 40, 1, 100, 130):
        outs.append(ft.push(z[k:k + size]))
        k += size
    assert k == len(z) and ft.n_frames == len(z)
    got = np.concatenate([o["positions"] for o in outs])
    np.testing.assert_allclose(got, whole.positions, rtol=0, atol=1e-9)
    np.testing.assert_array_equal(np.concatenate([o["reference"] for o in outs]), whole.reference)
    np.testing.assert_array_equal(np.concatenate([o["link_ok"] for o in outs])[1:], whole.link_ok)
    assert (np.abs(got - pos).max(axis=0) < 0.1).all()
    with pytest.raises(ValueError, match="frames must have shape"):
        ft.push(np.zeros((2, 8, 95), np.float32))
    with pytest.raises(ValueError, match="times must continue"):
        ft.push(z[:2], times=[3.0, 4.0])


@pytest.mark.parametrize("side", [0.2, 1.0])
@pytest.mark.parametrize("v", [(0.8, 0.0), (0.6, -0.6), (0.2, 1.1), (0.01, 0.02)])
def test_prediction_noise_follows_the_direction_of_travel(v, side):
    # Discrete white-noise acceleration model (Bar-Shalom, Li and Kirubarajan, "Estimation
    # with Applications to Tracking and Navigation", Wiley 2001, sec. 6.3.3; from memory):
    # over dt the position variance grows by dt^4 / 4 q^2, the position-velocity covariance
    # by dt^3 / 2 q^2 and the velocity variance by dt^2 q^2. Here q applies along the
    # velocity and side * q across it (process noise split into along-track and
    # cross-track parts: common practice in target tracking, from memory), and q in every
    # direction while the finger is still.
    from stripstitch.track import _NS, _STILL_PX, _kalman_predict

    dt, q = 2.0, 0.05
    x = np.zeros(_NS)
    x[2:4] = v
    P = np.zeros((_NS, _NS))
    _kalman_predict(x, P, dt, q, side)
    vn = np.hypot(*v)
    if vn > _STILL_PX:
        u = np.asarray(v) / vn
        A = q * q * (np.outer(u, u) + side ** 2 * (np.eye(2) - np.outer(u, u)))
    else:
        A = q * q * np.eye(2)
    np.testing.assert_allclose(x[:2], np.asarray(v) * dt)
    np.testing.assert_allclose(P[:2, :2], dt ** 4 / 4 * A, rtol=1e-12, atol=1e-18)
    np.testing.assert_allclose(P[:2, 2:4], dt ** 3 / 2 * A, rtol=1e-12, atol=1e-18)
    np.testing.assert_allclose(P[2:4, 2:4], dt ** 2 * A, rtol=1e-12, atol=1e-18)
    assert not P[4:].any() and not P[:, 4:].any()


@pytest.mark.parametrize("seed", [7905, 7908])
def test_straight_ridges_do_not_walk_the_path_sideways(seed):
    # A finger wider than the strip (18 x 14 mm, no pad edge in view across) whose lower
    # part carries nearly straight ridges: there the links read the shift along the ridges
    # weakly and biased, and a filter with the same acceleration allowance in every
    # direction walked the across path off (fast mode: 0.70-0.93 px RMS on six noise and
    # motion seeds); held to the finger's direction of travel (common practice in target
    # tracking: process noise split along and across the track) 0.13-0.26 px. Truth: the
    # simulator's positions (exact by construction).
    from stripstitch import evaluate, simulate

    finger = simulate.make_finger("right_loop", size_mm=(18.0, 14.0), rng=7505)
    cap = simulate.swipe(finger=finger, rng=seed, n_rows=16, n_cols=128, frame_rate_hz=2000.0,
                         speed_mm_s=182.0, snr_db=25.0, skew_deg=2.2, backtracks=((8.1, 0.39),))
    res = stitch(cap.frames, pitch_um=float(cap.pitch_um), frame_rate_hz=2000.0, mode="fast")
    d = evaluate.evaluate(res, cap, image=False, distortion=False).to_dict()
    assert d["across_rms_px"] < 0.4
    assert abs(d["span_error_pct"]) < 0.3


@settings(max_examples=60, deadline=None)
@given(a=st.floats(1.0, 1e4), ratio=st.floats(1e-4, 1.0), ang=st.floats(0.0, np.pi),
       d0=st.floats(-4.0, 4.0), d1=st.floats(-4.0, 4.0))
def test_prediction_gate_ignores_the_undetermined_direction(a, ratio, ang, d0, d1):
    # The gate on a registration's distance from its prediction, checked against numpy's
    # symmetric eigendecomposition (LAPACK; general-purpose reference library): where the
    # information's smaller eigenvalue is under _WEAK_RATIO of the larger, only the distance
    # along the larger one's eigenvector counts, else both axes within 1.5 px.
    from stripstitch.track import _WEAK_RATIO, _near_prediction

    u = np.array([np.cos(ang), np.sin(ang)])
    v = np.array([-u[1], u[0]])
    J = a * np.outer(u, u) + a * ratio * np.outer(v, v)
    res = np.zeros(9)
    res[:2] = (d0, d1)
    res[2:5] = (J[0, 0], J[0, 1], J[1, 1])
    w, e = np.linalg.eigh(J)
    d = np.array([d0, d1])
    if w[0] < _WEAK_RATIO * w[1]:
        expect = abs(d @ e[:, 1]) < 1.5
    else:
        expect = abs(d0) < 1.5 and abs(d1) < 1.5
    margin = (abs(abs(d @ e[:, 1]) - 1.5) if w[0] < _WEAK_RATIO * w[1]
              else min(abs(abs(d0) - 1.5), abs(abs(d1) - 1.5)))
    if margin > 1e-9 and abs(w[0] / w[1] - _WEAK_RATIO) > 1e-9:       # off the boundaries
        assert _near_prediction(res, 0.0, 0.0) == expect


def test_straight_ridges_across_the_strip_do_not_break_the_track():
    # The simulator's default finger (20 x 14 mm, a tented arch) crosses ridges that run
    # straight across the whole 16x128 strip: the links' across shift is undetermined there
    # and the Gauss-Newton steps wander across by more than the 1.5 px a prediction may be
    # off. Counted as failed predictions they broke the track twice (two false gaps, span
    # +10.9 % in fast mode) once the filter held the finger's direction; with an allowance
    # the same in every direction the path had slid 12.6 px across instead. Truth: the
    # simulator's positions (exact by construction).
    from stripstitch import evaluate, simulate

    cap = simulate.swipe("tented_arch", rng=31519, n_rows=16, n_cols=128, frame_rate_hz=2000.0,
                         profile="constant", speed_mm_s=50.0721768069116,
                         snr_db=34.99825227038659, skew_deg=3.4577664712732776)
    res = stitch(cap.frames, pitch_um=float(cap.pitch_um), frame_rate_hz=2000.0, mode="fast")
    d = evaluate.evaluate(res, cap, image=False, distortion=False).to_dict()
    assert not [e for e in res.events if e.kind == "gap"]
    assert abs(d["span_error_pct"]) < 1.0
    assert d["across_rms_px"] < 4.0


def _aliased_waves(seed, n=24):
    """Ridge waves with their 3rd and 5th harmonics (flat-topped ridges, as a finger's
    touching ridges give): the 5th harmonics lie past the plates' Nyquist frequency, so the
    frames alias. Sampled point by point they are still exact: the truth is the sampling."""
    f, ph, amp = _waves(seed, n=n)
    return (np.concatenate([f, 3 * f, 5 * f]), np.concatenate([ph, 3 * ph, 5 * ph]),
            np.concatenate([amp, amp / 3, amp / 5]))


@pytest.mark.parametrize("seed, v", [(0, 0.98), (1, 0.98), (2, 0.73), (3, 0.5)])
def test_prefilter_takes_out_pixel_locking(seed, v):
    # Aliased frames make registrations lock towards whole pixels (peak locking; common
    # practice in image registration), and where the finger moves a near-constant fraction of
    # a pixel per frame every link locks the same way: a steady 16x96 swipe at 0.98 px per
    # frame came out 0.3-0.4 % long, 0.29-0.38 px along RMS (0.5-0.73 px per frame: 0.1-0.25 %).
    # Smoothed by a Gaussian of 0.7 px before registering: within 0.07 % and 0.07 px.
    t_n = 160
    pos = np.stack([v * np.arange(t_n), 0.01 * np.arange(t_n)], 1)
    fr = _frames(pos, shape=(16, 96), waves=_aliased_waves(seed), noise=0.02)
    mask = np.ones((16, 96), bool)
    rms = {}
    for pre in (0.0, 0.7):
        res = track(fr, mask, prefilter_px=pre)
        err = res.positions - pos
        rms[pre] = float(np.sqrt(np.mean(err[:, 0] ** 2)))
        span = 100 * (res.positions[-1, 0] - pos[-1, 0]) / pos[-1, 0]
        if pre:
            assert abs(span) < 0.1 and rms[pre] < 0.08
            assert np.sqrt(np.mean(err[:, 1] ** 2)) < 0.06
    assert rms[0.7] < rms[0.0] / 3


def test_prefilter_is_a_masked_gaussian():
    # With every plate usable the smoothing is scipy's Gaussian filter (outside reference),
    # edges replicated; a bad plate's value enters none of its neighbours; the strip's first
    # and last rows and columns are left out of the mask.
    from scipy import ndimage

    from stripstitch.track import _prefiltered
    z = np.random.default_rng(3).standard_normal((4, 10, 40)).astype(np.float32)
    full = np.ones((10, 40), bool)
    out, keep = _prefiltered(z, full, 0.7)
    ref = ndimage.gaussian_filter(z, sigma=(0, 0.7, 0.7), mode="nearest")
    assert np.allclose(out, ref, atol=1e-5)
    assert not keep[[0, -1]].any() and not keep[:, [0, -1]].any() and keep[1:-1, 1:-1].all()
    bad = full.copy()
    bad[5, 20] = False
    z2 = z.copy()
    z2[:, 5, 20] = 1e6
    a, _ = _prefiltered(z, bad, 0.7)
    b, kb = _prefiltered(z2, bad, 0.7)
    assert np.allclose(a, b) and not kb[5, 20]


@pytest.mark.parametrize("rows, mode", [(8, "fast"), (8, "stream"), (6, "fast"), (6, "default")])
@pytest.mark.parametrize("photo", ["camera", "rocket", "hubble_deep_field"])
def test_fine_photographic_texture_on_few_rows_is_not_stretched(photo, rows, mode):
    # scikit-image's bundled photographs swiped as fingers (detail finer than the plates,
    # each plate the mean over its area; simulator truth), 8x192 and 6x192 at 4 kHz, 100 mm/s human
    # profile, 25 dB, fast mode (the tracker's placement is final) and the streaming
    # stitcher (the same tracker fed frame by frame, no model passes). Every frame's overlap
    # with its key lies within three rows of a frame edge; the one-sided half-sample filter
    # there and the along slope taken a row and a half from the first row read the shifts
    # long. Fast mode: span +0.87 / +2.07 / +1.64 %, along RMS 0.67 / 2.12 / 1.96 px before
    # the edge-symmetric filters; now -0.10 / +0.06 / -0.02 %. The stream kept the one-sided
    # filters until it chose them the same way (on the finger's arrival): +1.04 / +2.20 /
    # +1.52 %, along 0.89 / 2.27 / 1.74 px before; now -0.21 / +0.04 / -0.07 %, along 0.28 /
    # 0.05 / 0.11 px. On 6 rows (the filters chosen per swipe since, as on 8): fast mode
    # +1.92 / +4.86 / +3.85 %, along 1.57 / 4.91 / 4.64 px before, now +0.06 / -0.06 / -0.20 %;
    # default mode, whose model passes start from the tracker, along 0.12 / 0.24 / 0.19 px
    # before, now 0.03 / 0.02 / 0.02 px.
    from conftest import photo_finger

    from stripstitch import StreamingStitcher
    from stripstitch import evaluate as ev
    from stripstitch import simulate

    cap = simulate.swipe(finger=photo_finger(photo), rng=11, n_rows=rows, n_cols=192, frame_rate_hz=4000.0,
                         profile="human", speed_mm_s=100.0, snr_db=25.0)
    if mode == "stream":
        s = StreamingStitcher(frame_rate_hz=4000.0)
        for f in cap.frames:
            s.push(f)
        res = s.finish()
    else:
        res = stitch(cap.frames, frame_rate_hz=4000.0, mode=mode)
    d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
    limit = {"fast": 0.25, "stream": 0.35, "default": 0.1}[mode]
    assert abs(d["span_error_pct"]) < 0.3 and d["along_rms_px"] < limit


def _band_swipe(step=(1.37, 0.21), t_n=240):
    """Frames of the tests' smooth band-limited texture (ring of 9 px period) at a constant
    step, 8x64, by exact Fourier shifts (scipy.ndimage.fourier_shift, outside reference)."""
    from conftest import band_texture, cut_frames

    tex = band_texture((700, 96), seed=3)
    pos = np.arange(t_n)[:, None] * np.asarray(step)[None, :]
    return pos, cut_frames(tex, pos + [20.0, 8.0], origin=(8, 0))


def test_edge_filters_chosen_by_the_residual():
    # track(symmetric_edges="auto") returns one of the two placements unchanged: the one whose
    # registrations leave the smaller mean squared residual over the frames both registered
    # (a likelihood comparison of two interpolation models of the same frames).
    pos, frames = _band_swipe()
    mask = np.ones(frames.shape[1:], bool)
    forced = {sym: track(frames, mask, symmetric_edges=sym) for sym in (True, False)}
    auto = track(frames, mask, symmetric_edges="auto")
    both = (forced[True].reference >= 0) & (forced[False].reference >= 0)
    res2 = {sym: float(np.mean(r.sigma[both] ** 2)) for sym, r in forced.items()}
    assert auto.symmetric_edges == (res2[True] < res2[False])
    assert np.array_equal(auto.positions, forced[auto.symmetric_edges].positions)
    assert forced[True].symmetric_edges and not forced[False].symmetric_edges
    with pytest.raises(ValueError, match="symmetric_edges"):
        track(frames, mask, symmetric_edges="both")
    with pytest.raises(ValueError, match="symmetric_edges"):
        FrameTracker(mask, symmetric_edges="auto")


def test_smooth_band_limited_texture_keeps_the_shifted_windows():
    # On a smooth texture (a ring spectrum at 9 px, nothing near the plates' Nyquist) the
    # shorter centred windows' amplitude error at the edges (the 2-tap mid-point reads
    # cos(pi f) = 0.94 of a 9 px wave) costs more than the one-sided windows' phase error:
    # with the edge-symmetric filters forced, fast mode read this swipe at 0.135 / 0.056 px
    # along / across RMS; chosen by the residual, the shifted windows, 0.014 / 0.027 px.
    # Truth: the exact shifts.
    pos, frames = _band_swipe()
    res = stitch(frames, mode="fast")
    err = res.positions - pos
    assert np.sqrt(np.mean(err[:, 0] ** 2)) < 0.03
    assert np.sqrt(np.mean(err[:, 1] ** 2)) < 0.05
    assert not track(frames, np.ones(frames.shape[1:], bool), symmetric_edges="auto").symmetric_edges


def test_five_row_strips_are_tracked():
    # A 5x256 strip at 4 kHz, 0.9 px per frame, human profile with a 40 ms stall, 33 dB
    # (simulator truth; bench_few_rows.py's draw 21). With the key frames' edge filters
    # chosen per swipe the tracker's overlaps of a few rows no longer read the shifts long,
    # and it beats the multi-baseline pairs on 5 rows (span median 1.14 -> 0.41 % over 60
    # such swipes; DEVELOPERS.md). This one: pairs -4.75 %, along RMS 4.2 px; tracker -0.04 %.
    from stripstitch import evaluate as ev
    from stripstitch import simulate

    finger = simulate.make_finger("left_loop", size_mm=(12.0, 10.0), rng=5521)
    cap = simulate.swipe("left_loop", finger=finger, rng=5921, n_rows=5, n_cols=256,
                         frame_rate_hz=4000.0, speed_mm_s=181.87, snr_db=33.08, profile="human",
                         skew_deg=-1.236, stalls=((4.0, 0.04),))
    res = stitch(cap.frames, frame_rate_hz=4000.0)
    assert res.options["placement"] == "key-frame tracker"
    d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
    assert abs(d["span_error_pct"]) < 0.5 and d["along_rms_px"] < 0.5
    assert d["stall_true"] == d["stall_detected"] == 1
