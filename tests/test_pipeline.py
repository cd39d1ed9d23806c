"""stitch(): trajectories and images against ground truth built by construction, events, errors.

Frames are cut from a band-limited periodic texture at known positions by exact Fourier
shifts (scipy.ndimage.fourier_shift, an outside reference), so the truth is exact.
"""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import stripstitch
from conftest import band_texture, cut_frames
from stripstitch import ReconstructionError, stitch


@pytest.fixture(scope="module")
def tex():
    return band_texture((700, 96), seed=3)


def _run(tex, steps, **kw):
    pos = np.vstack([[0.0, 0.0], np.cumsum(np.asarray(steps, float), 0)])
    pos[:, 0] += -pos[:, 0].min()
    pos -= pos[0]
    frames = cut_frames(tex, pos + [max(0.0, -np.min(pos[:, 0])) + 20.0, 0.0])
    return pos, frames, stitch(frames, **kw)


def _span_error(res, pos):
    return np.ptp(res.positions[:, 0]) / np.ptp(pos[:, 0]) - 1.0


def test_whole_pixel_speed_rebuilds_the_source(tex):
    pos, frames, res = _run(tex, np.tile([2.0, 0.0], (79, 1)))
    assert res.positions.dtype == np.float64 and res.positions[0].tolist() == [0.0, 0.0]
    np.testing.assert_allclose(res.positions, pos, atol=0.03)
    # The image equals the texture window it came from (Pearson correlation, numpy).
    # frame 0 plate (0, 0) is texture pixel (28, 8) (cut_frames origin (8, 8), +20 along)
    # and image pixel origin_px.
    r0, c0 = np.round(res.origin_px).astype(int)
    img = res.image[r0:, c0:c0 + 64]
    src = tex[28:28 + img.shape[0], 8:8 + img.shape[1]]
    ok = np.isfinite(img)
    assert ok.mean() > 0.95
    # 0.99: bilinear splatting blurs slightly (a tent kernel of one pixel).
    assert np.corrcoef(img[ok], src[ok])[0, 1] > 0.99
    assert res.report.verdict == "usable"


@pytest.mark.parametrize("dtype", [np.float32, np.float64, np.uint16, np.uint8])
def test_subpixel_speed_any_dtype(tex, dtype):
    steps = np.tile([1.37, 0.21], (149, 1))
    pos = np.vstack([[0.0, 0.0], np.cumsum(steps, 0)])
    frames = cut_frames(tex, pos + [20.0, 0.0])
    raw = (frames - frames.min()) / np.ptp(frames)
    scale = {np.uint8: 250.0, np.uint16: 4000.0}.get(dtype, 1.0)
    res = stitch((raw * scale).astype(dtype))
    # Geometric-accuracy yardstick: the interim 500 ppi scanner spec allows 1.5 % over long
    # distances (EFTS Appendix G, REFERENCE-VALUES.md section 4); we ask for 0.2 %.
    assert abs(_span_error(res, pos)) < 0.002
    tol = 0.15 if dtype is np.uint8 else 0.1       # 8-bit quantisation adds noise
    err = res.positions - pos
    assert np.sqrt((err ** 2).mean(0)).max() < tol
    assert np.isfinite(res.image[res.weight >= 0.05]).all()


def test_slow_swipe_does_not_drift(tex):
    # 0.05 px per frame for 800 frames: a chain of successive estimates would accumulate
    # its per-step bias 800 times; references at whole-pixel baselines keep the error small.
    pos, frames, res = _run(tex, np.tile([0.05, 0.0], (799, 1)))
    err = res.positions - pos
    assert np.abs(err).max() < 0.25                     # measured: 0.18 px after 800 frames
    assert abs(_span_error(res, pos)) < 0.01


def test_stall_and_backtrack_reported(tex):
    steps = np.concatenate([np.tile([1.0, 0.0], (60, 1)), np.zeros((150, 2)),
                            np.tile([1.0, 0.0], (40, 1)), np.tile([-0.8, 0.0], (20, 1)),
                            np.tile([1.0, 0.0], (60, 1))])
    pos, frames, res = _run(tex, steps, frame_rate_hz=4000.0)
    err = res.positions - pos
    assert np.sqrt((err ** 2).mean(0)).max() < 0.3
    assert np.abs(err).max() < 0.8          # measured 0.65 px (across, after the backtrack)
    stalls = res.events_of("stall")
    backs = res.events_of("backtrack")
    assert len(stalls) == 1 and 50 <= stalls[0].first_frame <= 80 and 190 <= stalls[0].last_frame <= 220
    assert len(backs) == 1 and 240 <= backs[0].first_frame <= 260
    assert backs[0].details["distance_px"] == pytest.approx(16.0, abs=2.0)
    # The backtracked stretch is placed where it belongs: positions revisit earlier rows.
    assert res.positions[270, 0] < res.positions[250, 0]


def test_too_fast_gap_reported_not_invented(tex):
    # A jump of 12 rows between two frames of an 8-row strip: no overlap, 4 rows never seen.
    steps = np.concatenate([np.tile([1.5, 0.0], (40, 1)), [[12.0, 0.0]], np.tile([1.5, 0.0], (40, 1))])
    pos, frames, res = _run(tex, steps)
    gaps = res.events_of("gap")
    assert len(gaps) == 1 and gaps[0].first_frame == 40 and gaps[0].last_frame == 41
    assert gaps[0].details["reason"] == "too_fast"
    # The size of the jump cannot be measured: the frames after it are placed at least a
    # strip's height (8 rows) on, never overlaid on rows they did not share, and the swipe
    # is reported unusable.
    step = res.positions[41, 0] - res.positions[40, 0]
    assert step >= 8.0 - 1e-9
    assert res.report.verdict == "unusable" and "too fast" in res.report.reasons[0]
    np.testing.assert_allclose(np.diff(res.positions[:41, 0]), 1.5, atol=0.05)
    np.testing.assert_allclose(np.diff(res.positions[41:, 0]), 1.5, atol=0.05)


def test_dropped_frames_with_timestamps(tex):
    steps = np.tile([1.0, 0.1], (99, 1))
    pos = np.vstack([[0.0, 0.0], np.cumsum(steps, 0)])
    frames = cut_frames(tex, pos + [20.0, 0.0])
    keep = np.setdiff1d(np.arange(100), [50, 51, 52])
    ts = keep / 4000.0
    res = stitch(frames[keep], timestamps_s=ts)
    gaps = res.events_of("gap")
    assert gaps and gaps[0].details["reason"] == "dropped_frames" and gaps[0].details["dropped_frames"] == 3
    err = res.positions - (pos[keep] - pos[keep][0])
    assert np.abs(err).max() < 0.1
    assert res.frame_rate_hz == pytest.approx(4000.0)


def test_slanted_swipe_reported_as_skew(tex):
    ang = np.deg2rad(12.0)
    pos, frames, res = _run(tex, np.tile([1.2 * np.cos(ang), 1.2 * np.sin(ang)], (149, 1)))
    sk = res.events_of("skew")
    assert len(sk) == 1 and sk[0].details["skew_deg"] == pytest.approx(12.0, abs=0.5)
    assert res.report.skew_deg == pytest.approx(12.0, abs=0.5)


def test_output_pitch_resamples_to_500_ppi(tex):
    steps = np.tile([1.5, 0.0], (79, 1))
    pos = np.vstack([[0.0, 0.0], np.cumsum(steps, 0)])
    frames = cut_frames(tex, pos + [20.0, 0.0])
    native = stitch(frames, pitch_um=50.0)
    res = stitch(frames, pitch_um=50.0, output_pitch_um=50.8)
    np.testing.assert_allclose(res.ppi, 500.0)          # 25400 / 50.8 (definition of ppi)
    ratio = res.image.shape[0] / native.image.shape[0]
    assert ratio == pytest.approx(50.0 / 50.8, abs=0.02)


def test_public_api_and_result_is_frozen(tex):
    assert stripstitch.stitch is stitch
    pos, frames, res = _run(tex, np.tile([1.0, 0.0], (39, 1)))
    with pytest.raises(ValueError, match="read-only"):
        res.positions[0, 0] = 1.0
    d = res.report.to_dict()
    assert d["verdict"] in ("usable", "unusable") and "swipe_length_mm" in d
    assert all(e.to_dict()["kind"] for e in res.events) or not res.events


def test_no_finger_raises():
    rng = np.random.default_rng(0)
    with pytest.raises(ReconstructionError, match="no finger"):
        stitch(np.full((50, 8, 64), 14.0) + 0.0 * rng.standard_normal((50, 8, 64)))


@pytest.mark.parametrize("frames, kw, match", [
    (np.zeros((8, 64)), {}, r"frames must have shape \(n_frames"),
    (np.zeros((1, 8, 64)), {}, "at least 2 frames"),
    (np.zeros((5, 1, 64)), {}, "at least 2 rows"),
    (np.full((5, 8, 64), np.nan), {}, "NaN or inf"),
    (np.zeros((5, 8, 64)), {"mode": "turbo"}, "mode must be one of"),
    (np.zeros((5, 8, 64)), {"pitch_um": -1.0}, "pitch_um must be a finite number > 0"),
    (np.zeros((5, 8, 64)), {"timestamps_s": [0, 1, 1, 2, 3]}, "strictly increasing"),
    (np.zeros((5, 8, 64)), {"timestamps_s": [0, 1, 2]}, r"timestamps_s must have shape \(5\)"),
    (np.zeros((5, 8, 64)), {"model_passes": -1}, r"model_passes must be an integer in \[0, 50\]; got -1"),
    (np.zeros((5, 8, 64)), {"model_passes": 2.5}, "model_passes must be an integer; got float 2.5"),
])
def test_bad_input_errors(frames, kw, match):
    with pytest.raises((ValueError, TypeError), match=match):
        stitch(frames, **kw)


def test_simulated_swipe_span_within_one_percent():
    # Span within 1 %: the 500 ppi geometric-accuracy requirement allows 1 to 1.5 % over long
    # distances (EFTS Appendix G / F, REFERENCE-VALUES.md section 4).
    from stripstitch import simulate
    cap = simulate.swipe("right_loop", rng=2, n_cols=64, finger_size_mm=(12.0, 8.0), snr_db=30.0)
    res = stitch(cap.frames, frame_rate_hz=cap.frame_rate_hz)
    c = cap.contact > 0.5
    span = np.ptp(res.positions[c, 0]) / np.ptp(cap.positions[c, 0]) - 1.0
    assert abs(span) < 0.01


@settings(max_examples=8, deadline=None)
@given(v=st.floats(0.25, 2.5), lateral=st.floats(-0.2, 0.2))
def test_random_constant_motion_recovered(tex, v, lateral):
    # Property over speeds from a quarter pixel to 2.5 px per frame and slants up to about
    # 40 degrees: positions and span against the exact (Fourier-shift) truth, and no NaN
    # where the image has weight.
    t_n = int(150 / v)
    pos = np.stack([v * np.arange(t_n), lateral * np.arange(t_n)], 1)
    res = stitch(cut_frames(tex, pos + [20.0, 40.0]))
    err = res.positions - pos
    assert np.sqrt(np.mean(err ** 2, axis=0)).max() < 0.15
    # 0.2 %: well inside the 1 % geometric-accuracy requirement for 500 ppi scanners
    # (EFTS Appendix F, REFERENCE-VALUES.md section 4).
    assert abs(_span_error(res, pos)) < 0.002
    assert np.isfinite(res.image[res.weight >= 0.05]).all()


def test_simulated_too_fast_stretch_reported_as_gap():
    # A swipe that jumps 1 mm in one frame on a 16-row strip (simulator truth: a gap with
    # missing rows). Fast frames blur within the exposure, and frame-to-frame differences
    # are mostly motion: neither may hide the gap.
    from stripstitch import simulate

    cap = simulate.swipe("whorl", n_rows=16, n_cols=96, finger_size_mm=(9.0, 6.0),
                         frame_rate_hz=2000.0, speed_mm_s=100.0, snr_db=30.0,
                         too_fast=((4.0, 1.0),), rng=3)
    truth = [e for e in cap.events if e.kind == "gap"]
    assert truth and truth[0].details["missing_rows"] > 0
    res = stitch(cap.frames, frame_rate_hz=cap.frame_rate_hz, timestamps_s=cap.times_s)
    found = [e for e in res.events_of("gap") if e.details["reason"] == "too_fast"]
    assert len(found) == 1 and abs(found[0].first_frame - truth[0].first_frame) <= 2
    assert res.report.verdict == "unusable"


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_long_stall_at_low_snr_reports_no_gap(seed):
    # A 14 dB swipe that stalls for over a third of its frames, with blank frames where the
    # finger arrives and leaves (simulator truth: a stall, no gap). Measured: before the
    # texture test took its static level over the finger's length rather than its duration,
    # 3 of these 3 swipes reported false gaps at the fingertip (up to 9).
    from stripstitch import simulate

    finger = simulate.make_finger("right_loop", size_mm=(12.0, 10.0), rng=40 + seed)
    cap = simulate.swipe("right_loop", finger=finger, rng=seed, n_rows=8, n_cols=192,
                         frame_rate_hz=4000.0, speed_mm_s=150.0, snr_db=14.0,
                         stalls=((3.4, 0.045),))
    assert not cap.events_of("gap") and cap.events_of("stall")
    res = stitch(cap.frames, frame_rate_hz=cap.frame_rate_hz, timestamps_s=cap.times_s)
    assert not res.events_of("gap")
    assert res.events_of("stall")


def test_gap_found_when_the_jump_blurs_its_frames():
    # Simulator truth: a jump of 17.3 rows on a 16-row strip (a gap of 1.3 rows); the frame
    # taken during the jump is blurred by the motion and shows faint texture. The frames on
    # both sides of the run of failed links decide, not the blurred one (measured: with the
    # rule per link the gap was missed).
    from stripstitch import simulate

    finger = simulate.make_finger("tented_arch", size_mm=(12.0, 10.0), rng=9957)
    cap = simulate.swipe("tented_arch", finger=finger, rng=9977, n_rows=16, n_cols=128,
                         frame_rate_hz=2000.0, profile="human", speed_mm_s=148.5,
                         snr_db=39.2, too_fast=((5.163, 1.404),), stalls=((7.73, 0.0412),))
    truth = cap.events_of("gap")
    assert len(truth) == 1 and truth[0].details["missing_rows"] > 0
    res = stitch(cap.frames, frame_rate_hz=cap.frame_rate_hz, timestamps_s=cap.times_s)
    found = res.events_of("gap")
    assert len(found) == 1 and abs(found[0].first_frame - truth[0].first_frame) <= 2


def test_gap_links_judge_each_run_of_failed_links_by_its_sides():
    from stripstitch.pipeline import _gap_links

    strong = np.array([0, 1, 1, 1, 0, 1, 1, 1, 1, 1, 1], bool)   # frame 4 blurred by a jump
    ok = np.ones(10, bool)
    ok[3:5] = False                  # links 3-4 and 4-5 fail: the run's sides 2, 3 | 5, 6
    np.testing.assert_array_equal(np.flatnonzero(_gap_links(ok, strong)), [3, 4])
    ok = np.ones(10, bool)
    ok[0] = False                    # at the first frame: no frame outward, not a gap
    assert not _gap_links(ok, strong).any()
    ok = np.ones(10, bool)
    ok[1] = False                    # side 0, 1: frame 0 is faint (the fingertip)
    assert not _gap_links(ok, strong).any()
    ok = np.ones(10, bool)
    ok[8] = False                    # 7, 8 | 9, 10: all clear
    np.testing.assert_array_equal(np.flatnonzero(_gap_links(ok, strong)), [8])
    ok[9] = False                    # the run 8-9 now ends at the last frame: no frame outward
    assert not _gap_links(ok, strong).any()
    ok = np.ones(10, bool)
    ok[4] = False                    # 4 | 5, 6: frame 4 blurred by the jump but registered
    np.testing.assert_array_equal(np.flatnonzero(_gap_links(ok, strong)), [4])   # with 3; 3, 2 clear
    faint2 = strong.copy()
    faint2[2] = False                # ... but not if a frame further out is faint too
    assert not _gap_links(ok, faint2).any()
    tip = np.array([0, 0, 1, 1, 1, 1], bool)
    ok = np.array([1, 0, 1, 1, 1], bool)   # 1 | 2, 3: frame 1 faint, its outward neighbour too
    assert not _gap_links(ok, tip).any()


def test_gap_links_need_full_texture_on_each_side():
    # A link failing while the fingertip's edge fades in (frames clear but weak, none with
    # full texture between it and the swipe's start) is no gap; the same link with a full
    # frame on each side is.
    from stripstitch.pipeline import _gap_links

    strong = np.ones(12, bool)
    full = np.array([0, 0, 0, 0, 1, 1, 1, 1, 1, 1, 1, 1], bool)
    ok = np.ones(11, bool)
    ok[2] = False                              # frames 0-2 | 3-11: no full frame on the left
    assert _gap_links(ok, strong)[2]           # the clear-texture test alone calls it a gap
    assert not _gap_links(ok, strong, full).any()
    ok = np.ones(11, bool)
    ok[6] = False                              # full frames on both sides
    np.testing.assert_array_equal(np.flatnonzero(_gap_links(ok, strong, full)), [6])
    full_end = full.copy()
    full_end[7:] = False                       # ... but none from frame 7 to the end
    assert not _gap_links(ok, strong, full_end).any()


def test_failed_links_among_blank_end_frames_are_carried_not_pushed():
    # Frames 0-5 blank (the fixed pattern's rest only), 6-19 clear at 0.8 px per frame; the
    # links 3-4 and 4-5 failed and were pushed a strip length (8 px) each. Carried instead:
    # frames 0-4 continue frame 5's track backwards at the clear frames' speed, the links
    # are no longer failed, the carried frames' confidence falls, frame 0 stays the origin.
    from stripstitch.pipeline import _carry_blank_ends

    t_n = 20
    times = np.arange(t_n, dtype=float)
    true = np.stack([0.8 * times, 0.05 * times], 1)
    positions = true.copy()
    positions[4:] += [8.0, 0.0]
    positions[5:] += [8.0, 0.0]
    positions -= positions[0]
    link_failed = np.zeros(t_n - 1, bool)
    link_failed[3:5] = True
    clear = np.ones(t_n, bool)
    clear[:6] = False
    confidence = np.ones(t_n)
    chain = np.arange(t_n)
    _carry_blank_ends(chain, 6, t_n, clear, positions, confidence, link_failed, times, 8)
    np.testing.assert_allclose(positions, true - true[0], atol=1e-9)
    assert not link_failed.any()
    assert (confidence[:5] < 0.5).all() and (confidence[5:] == 1.0).all()
    # a failed link between clear frames is left alone
    link_failed[10] = True
    before = positions.copy()
    _carry_blank_ends(chain, 6, t_n, clear, positions, confidence, link_failed, times, 8)
    np.testing.assert_array_equal(positions, before)
    assert link_failed[10]


@pytest.mark.parametrize("photo, rows, cols, rate, mode", [
    ("page", 8, 192, 4000.0, "default"),
    ("page", 8, 192, 4000.0, "fast"),
    ("shepp_logan_phantom", 16, 128, 2000.0, "fast"),
])
def test_weak_texture_at_the_ends_is_no_gap(photo, rows, cols, rate, mode):
    # Simulator truth (no gap: 100 mm/s, under 1.3 px per frame) on scikit-image's text page
    # and Shepp-Logan phantom, whose ridge maps are flat over wide areas. The page's finger
    # edge fades in over a dozen frames at a third to half of the median texture: a link
    # failed three frames after the contact began, was called a gap and pushed those frames
    # 8 px away. The phantom's frames before the finger's texture show only the fixed
    # pattern's rest, which read as texture against the swipe's median pattern (0.4-0.55 of
    # the median): links failed among them and each was pushed a strip length, a gap
    # reported, span +10.8 %, 14.8 px along RMS. Now no gap and within 0.5 %.
    import skimage.data
    from stripstitch import evaluate as ev
    from stripstitch import simulate

    finger = simulate.texture_finger(getattr(skimage.data, photo)(), pixel_um=25.4)
    cap = simulate.swipe(finger=finger, rng=11, n_rows=rows, n_cols=cols, frame_rate_hz=rate,
                         profile="human", speed_mm_s=100.0, snr_db=25.0)
    assert not cap.events_of("gap")
    res = stitch(cap.frames, pitch_um=float(cap.pitch_um), frame_rate_hz=rate, mode=mode)
    assert not [e for e in res.events if e.kind == "gap"]
    d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
    assert abs(d["span_error_pct"]) < 0.5 and d["along_rms_px"] < 0.5
    assert res.positions[0].tolist() == [0.0, 0.0]


def test_long_stall_does_not_turn_or_slide_a_swipe():
    # Simulator truth: no rotation; the swipe stalls for 38 % of its frames and backs up.
    # Measured: when the twist was read on the frames around the stall (concentrated
    # phases, their model made of the stall's repeats) the swipe came out turned by 2.2
    # degrees; now not at all.
    from stripstitch import simulate

    finger = simulate.make_finger("left_loop", size_mm=(12.0, 10.0), rng=7602)
    cap = simulate.swipe("left_loop", finger=finger, rng=8002, n_rows=8, n_cols=192,
                         frame_rate_hz=4000.0, speed_mm_s=96.5, snr_db=18.4,
                         stalls=((3.77, 0.0698),), backtracks=((5.16, 0.216),))
    assert np.ptp(cap.angles) == 0.0
    res = stitch(cap.frames, frame_rate_hz=cap.frame_rate_hz, timestamps_s=cap.times_s)
    assert np.ptp(res.angles) < 0.5
    # Fast mode on the same swipe: the stall's frames, changing by noise alone, counted as
    # new finger in the fixed-pattern estimate, and the tracker slid as the finger left
    # (measured span error -7.5 %; now -1.2 %, against the simulator's travelled length).
    fast = stitch(cap.frames, frame_rate_hz=cap.frame_rate_hz, timestamps_s=cap.times_s,
                  mode="fast")
    scored = cap.contact >= 0.5
    span = np.ptp(fast.positions[scored, 0]) / np.ptp(cap.positions[scored, 0]) - 1.0
    assert abs(span) < 0.03


def test_turn_made_while_stalled_is_found():
    # Simulator truth: the finger turns by 3.4 degrees over the swipe, 1.3 of them during a
    # 53 ms stall (frames 154-260), where the twist (read against travel) sees nothing.
    # Measured: rotation RMS 1.90 degrees and no turn at all when the stall was not measured;
    # 0.25 now, and the stall is reported.
    from stripstitch import evaluate as ev
    from stripstitch import simulate

    finger = simulate.make_finger("whorl", size_mm=(12.0, 10.0), rng=9001)
    cap = simulate.swipe("whorl", finger=finger, rng=9401, n_rows=16, n_cols=128,
                         frame_rate_hz=2000.0, profile="human", speed_mm_s=65.27, snr_db=30.41,
                         skew_deg=-3.96, rotation_deg=-3.363, stalls=((5.559, 0.0534),))
    res = stitch(cap.frames, frame_rate_hz=cap.frame_rate_hz, timestamps_s=cap.times_s)
    d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
    assert d["rotation_rms_deg"] < 0.5
    assert d["stall_detected"] == 1


def test_stall_of_a_turning_finger_is_reported():
    # Simulator truth: a whorl turning by 3.9 degrees over the swipe, 1.3 of them during a
    # 24 ms stall (frames 66-160) at 19 dB. The stalled frames all sample one phase, so the
    # refinement cannot re-place them, and the placement without their turn drifts across by
    # 0.015 px per frame (3 mm/s): the plain speed rule took that for motion and reported no
    # stall; the finger makes no progress along the swipe, which is what a stall is.
    from stripstitch import evaluate as ev
    from stripstitch import simulate

    finger = simulate.make_finger("whorl", size_mm=(16.0, 12.0), rng=9644)
    cap = simulate.swipe("whorl", finger=finger, rng=10044, n_rows=8, n_cols=192,
                         frame_rate_hz=4000.0, profile="human", speed_mm_s=192.706,
                         snr_db=19.478, skew_deg=2.419, rotation_deg=3.8846,
                         stalls=((3.4417, 0.023869),))
    res = stitch(cap.frames, frame_rate_hz=cap.frame_rate_hz, timestamps_s=cap.times_s)
    d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
    assert d["stall_detected"] == 1 and d["stall_false"] == 0
    stall = [e for e in res.events if e.kind == "stall"][0]
    assert 60 <= stall.first_frame <= 90 and 140 <= stall.last_frame <= 165


def _turning_stall_swipe(photo, turn_deg, seed=1):
    """8-bit frames of a photograph bundled with scikit-image (the finger) swiped at 0.77 px
    per frame over an 8x192 strip, standing still for frames 80-250 while it turns by
    ``turn_deg`` about the strip's centre; each plate the mean of 2 x 2 point samples at its
    turned position (scipy.ndimage.map_coordinates, bilinear), 20 dB. The generator is
    outside the library. Returns frames, true positions (frame 0's axes), angles (degrees),
    and the stall's first and last frames."""
    import skimage.data
    from scipy import ndimage

    rng = np.random.default_rng(seed)
    img = getattr(skimage.data, photo)().astype(np.float64)
    tex = (img - img.min()) / np.ptp(img)            # 2 texture pixels per plate
    t_n, r_n, c_n, v, a, b = 330, 8, 192, 0.77, 80, 250
    t = np.arange(t_n)
    y = np.concatenate([[0.0], np.cumsum(np.where((t[1:] > a) & (t[1:] <= b), 0.0, v))])
    th = np.radians(turn_deg) * np.clip((t - a) / (b - a), 0.0, 1.0)
    u0, u1 = np.meshgrid(np.arange(r_n) - (r_n - 1) / 2, np.arange(c_n) - (c_n - 1) / 2,
                         indexing="ij")
    frames = np.zeros((t_n, r_n, c_n))
    for k in range(t_n):
        c, s = np.cos(th[k]), np.sin(th[k])
        for da in (-0.25, 0.25):
            for db in (-0.25, 0.25):
                q0 = 30.0 + y[k] + c * (u0 + da) - s * (u1 + db)
                q1 = 20.0 + (c_n - 1) / 2 + s * (u0 + da) + c * (u1 + db)
                frames[k] += ndimage.map_coordinates(tex, [2 * q0, 2 * q1], order=1) / 4.0
    codes = 40 + 150 * (frames + rng.normal(size=frames.shape) * frames.std() / 10.0)
    return (np.clip(np.round(codes), 0, 255).astype(np.uint8), np.stack([y, 0 * y], axis=1),
            np.degrees(th), (a, b))


@pytest.mark.parametrize("unit", [1e-15, 1e-9, 1e-300, 1e12, 1e300])
def test_frames_in_any_unit_are_placed_alike(texture, unit):
    # Float frames in physical units (a plate's capacitance changes by about 1e-15 F between
    # ridge and valley, from memory) or far from ADC codes either way: the placement is
    # invariant to a global gain and offset, so the same frames scaled by ``unit`` (plus an
    # offset) must be placed as in their own units, and the image scales with them. Before:
    # "no finger found" at 1e-9 and below (1e-20: an error from numpy's histogram), an error
    # about NaN values that were not there at 1e100 and above. Truth: exact Fourier shifts
    # (scipy.ndimage.fourier_shift).
    pos = np.stack([1.3 * np.arange(120), 0.05 * np.arange(120)], axis=1)
    frames = cut_frames(texture, pos) + 3.0
    ref = stitch(frames)
    got = stitch(frames * unit)
    assert np.abs(got.positions - pos).max() < 0.1
    np.testing.assert_allclose(got.positions, ref.positions, rtol=0, atol=1e-5)
    np.testing.assert_allclose(got.image, ref.image * unit, rtol=1e-5, atol=1e-5 * unit)
    assert got.report.verdict == ref.report.verdict


@pytest.mark.parametrize("photo, turn_deg", [("grass", 2.0), ("gravel", -2.0)])
def test_finger_setting_off_after_turning_in_a_stall_is_placed_from_its_last_still_frame(
        photo, turn_deg):
    # Fast mode (the key-frame tracker alone, no rotation): the frames after a stall in which
    # the finger turned were registered against the key it stalled on, turned 2 degrees away
    # and a few rows back; the first ten frames after it came out 1.34 (grass) / 0.56
    # (gravel) px short along. The step from the stall's last frame to ten frames later,
    # compared in that frame's axes (the true step turned by the stall's turn).
    frames, pos, ang, (a, b) = _turning_stall_swipe(photo, turn_deg)
    res = stitch(frames, frame_rate_hz=4000.0, mode="fast")
    th = np.radians(ang[b])
    rot = np.array([[np.cos(th), np.sin(th)], [-np.sin(th), np.cos(th)]])
    err = (res.positions[b + 10] - res.positions[b]) - rot @ (pos[b + 10] - pos[b])
    assert np.abs(err).max() < 0.25
    assert len(res.events_of("stall")) == 1


@pytest.mark.parametrize("photo, turn_deg", [("grass", 2.0), ("gravel", -2.0)])
def test_turn_made_in_a_stall_keeps_the_swipe_whole(photo, turn_deg):
    # Default mode on the same swipes: measured before the tracker's stall rules and the
    # stall's shift from the turn-free fit (_stall_turns) span error -0.66 / +0.03 %, along
    # RMS 0.43 / 0.24 px; now -0.04 / +0.03 %, 0.04 / 0.02 px.
    frames, pos, ang, _ = _turning_stall_swipe(photo, turn_deg)
    res = stitch(frames, frame_rate_hz=4000.0)
    span = (res.positions[-1, 0] - res.positions[0, 0]) / (pos[-1, 0] - pos[0, 0]) - 1.0
    assert abs(span) < 0.0015
    assert np.sqrt(np.mean((res.positions[:, 0] - pos[:, 0]) ** 2)) < 0.1
    assert np.ptp(res.angles) == pytest.approx(abs(turn_deg), abs=0.3)


def test_default_mode_takes_a_long_stall_out_of_the_fixed_pattern():
    # The brick photograph (scikit-image) over an 8x192 strip that stands still for half of
    # its 330 frames, no blank frame, 20 dB: the per-plate means hold the stalled texture, a
    # static pattern that pulls every registration towards zero shift. Default mode's refit
    # against the fused image alone left it 1.11 % short (along RMS 0.56 px); estimated first
    # with the frames weighted by their tracked travel, as fast mode does: -0.12 %, 0.15 px.
    frames, pos, _, _ = _turning_stall_swipe("brick", 0.0)
    res = stitch(frames, frame_rate_hz=4000.0)
    span = (res.positions[-1, 0] - res.positions[0, 0]) / (pos[-1, 0] - pos[0, 0]) - 1.0
    # EFTS Appendix G's 1.5 % (REFERENCE-VALUES.md section 4) is the yardstick; we ask 0.4 %.
    assert abs(span) < 0.004
    assert np.sqrt(np.mean((res.positions[:, 0] - pos[:, 0]) ** 2)) < 0.3


def test_blank_frames_at_the_ends_are_no_contact_for_the_report():
    # Simulator truth: a whorl arriving on an 8x192 strip at 12 dB; the first 12 frames see no
    # finger and the next 20 only its edge (under 30 % of the plates). At that SNR the contact
    # test finds no split between blank and textured frames and counts every frame; the
    # blank ones match only noise, are placed as if still, and the step to the moving
    # frames read as a 1.06 px backtrack. Frames at the ends with under a tenth of the
    # typical texture are no contact for the report: no backtrack, a no_contact event there.
    from stripstitch import evaluate as ev
    from stripstitch import simulate

    finger = simulate.make_finger("whorl", size_mm=(16.0, 12.0), rng=9614)
    cap = simulate.swipe("whorl", finger=finger, rng=10014, n_rows=8, n_cols=192,
                         frame_rate_hz=4000.0, profile="human", speed_mm_s=109.009,
                         snr_db=12.286, skew_deg=2.575, stalls=((7.2698, 0.07216),))
    res = stitch(cap.frames, frame_rate_hz=cap.frame_rate_hz, timestamps_s=cap.times_s)
    d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
    assert d["backtrack_false"] == 0 and d["stall_detected"] == 1 and d["stall_false"] == 0
    starts = [e for e in res.events if e.kind == "no_contact" and e.first_frame == 0]
    assert starts and 8 <= starts[0].last_frame <= 40
    assert abs(d["span_error_pct"]) < 0.5


def test_wide_strip_under_a_narrow_finger_keeps_its_links():
    # Simulator truth; the finger surface is scikit-image's grass photograph (25.4 um per
    # image pixel, about 13 mm wide) under an 8x400 strip (20.3 mm) at 8 kHz, 30 dB: half
    # the columns never see the finger. Their bare noise had become the yardstick of the
    # noisy-plate test, which then dropped most plates under the moving finger: the links
    # failed wherever under 45 % of the strip was touched, a false gap, span +16 %,
    # unusable. Now within 0.1 %.
    import skimage.data
    from stripstitch import evaluate as ev
    from stripstitch import simulate

    finger = simulate.texture_finger(skimage.data.grass(), pixel_um=25.4)
    cap = simulate.swipe(finger=finger, rng=1207, n_rows=8, n_cols=400, frame_rate_hz=8000.0,
                         profile="human", speed_mm_s=144.52, snr_db=30.4, skew_deg=6.45)
    res = stitch(cap.frames, frame_rate_hz=cap.frame_rate_hz)
    d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
    assert abs(d["span_error_pct"]) < 0.1 and d["gap_false"] == 0
    assert res.report.verdict == "usable"


def test_soft_finger_edge_of_a_fast_swipe_stays_in_contact():
    # Simulator truth: a 16x128 strip at 2 kHz, a finger speeding past 1 px per frame, 35 dB.
    # The contact test splits blank from touched frames, and the frames next to the split
    # (a quarter of the strip touched) read no texture on the bridge's measure, whose noise
    # estimate the motion inflates: they stay contact for the report (trimmed, the reported
    # length fell from 16.0 to 14.3 mm).
    from stripstitch import register
    from stripstitch import simulate

    cap = simulate.swipe(pattern="left_loop", profile="accel_decel", n_rows=16, n_cols=128,
                         frame_rate_hz=2000.0, speed_mm_s=200.0, snr_db=35.0,
                         too_fast=[(8.0, 3.0)], drop_frames=[40, 41], rng=20260103)
    res = stitch(cap.frames, frame_rate_hz=cap.frame_rate_hz, timestamps_s=cap.times_s)
    contact = np.flatnonzero(register.prepare(cap.frames).contact)
    assert 0 < contact[0] and contact[-1] < cap.n_frames - 1      # the test split both ends
    first, last = res.report.frames_in_contact
    assert abs(first - contact[0]) <= 2 and abs(last - contact[-1]) <= 2
    assert res.report.swipe_length_mm > 15.5


def _events_of(pos, frame_rate_hz, n_rows=8):
    """report.find_events on a trajectory (T, 2) known by construction: every frame in
    contact, no failed link, no dropped frame, 50.8 um pitch."""
    from stripstitch import report
    t_n = len(pos)
    return report.find_events(positions=pos, angles_deg=np.zeros(t_n), confidence=np.ones(t_n),
                              contact=np.ones(t_n, bool), link_failed=np.zeros(t_n - 1, bool),
                              link_dt_frames=np.ones(t_n - 1),
                              times_s=np.arange(t_n) / frame_rate_hz,
                              frame_rate_hz=frame_rate_hz, n_rows=n_rows, pitch_um=50.8)


def _stalls_of(pos):
    """(first, last) of the stalls found on a 4 kHz trajectory (see _events_of)."""
    return [(e.first_frame, e.last_frame) for e in _events_of(pos, 4000.0) if e.kind == "stall"]


def _simulated(pattern, finger_rng, swipe_rng, *, size_mm=(14.0, 10.0), skin="normal", **swipe):
    """A simulated swipe (bench_geometry.py's finger settings), stitched with defaults at its
    frame rate, and its errors against the simulator's truth: (capture, result, figures)."""
    from stripstitch import evaluate, simulate
    finger = simulate.make_finger(pattern, size_mm=size_mm, rng=finger_rng, skin=skin)
    cap = simulate.swipe(pattern, finger=finger, rng=swipe_rng, **swipe)
    res = stitch(cap.frames, frame_rate_hz=swipe["frame_rate_hz"])
    return cap, res, evaluate.evaluate(res, cap, image=False, distortion=False).to_dict()


def _swerve_reference(pos, travel_px=32.0):
    """The swerve's definition evaluated directly (O(T^2)): per frame, the largest change of
    the sideways offset from the line through the first and last positions over the frames
    that follow within ``travel_px`` of absolute travel along the swipe."""
    d = pos[-1] - pos[0]
    off = pos[:, 1] - d[1] / d[0] * pos[:, 0]
    travel = np.concatenate([[0.0], np.cumsum(np.abs(np.diff(pos[:, 0])))])
    out = np.zeros(len(pos))
    for t in range(len(pos)):
        w = off[t:][travel[t:] - travel[t] <= travel_px]
        out[t] = np.abs(w - off[t]).max()
    return out


def test_swerve_found_only_where_the_placement_leaves_its_line():
    # Trajectories by construction, 4 kHz: a slanted swipe (5 degrees) at 0.5 px per frame
    # that stalls, backs up 10 px and bends gently (its direction turning 10 degrees over
    # the swipe, as a finger's path may) is not a swerve; the same swipe with a sideways run
    # of v px per frame for 30 frames (15 px of travel) is one where 30 v reaches 8 px.
    from stripstitch import report
    t_n = 700
    v = np.full(t_n - 1, 0.5)
    v[200:300] = 0.0                                          # stall
    v[400:420] = -0.5                                         # backtrack
    along = np.concatenate([[0.0], np.cumsum(v)])
    bend = np.radians(10.0) * along ** 2 / (2 * along.max())  # direction 5 -> 15 degrees
    across = np.tan(np.radians(5.0)) * along + bend

    def swerves(side_px_per_frame):
        a = across.copy()
        a[500:] += side_px_per_frame * np.minimum(np.arange(t_n - 500), 30)
        pos = np.stack([along, a], 1)
        ev = [e for e in _events_of(pos, 4000.0)
              if e.kind == "low_confidence" and e.details.get("cause") == "swerve"]
        return pos, ev, report.find_swerves(pos, 0, t_n - 1)

    _, ev, _ = swerves(0.0)
    assert ev == []
    _, ev, _ = swerves(0.2)                                    # 6 px: under the limit
    assert ev == []
    pos, ev, found = swerves(0.4)                              # 12 px
    assert len(ev) == 1 and ev[0].first_frame <= 500 <= 530 <= ev[0].last_frame
    ref = _swerve_reference(pos)
    assert found[0][2] == pytest.approx(ref.max(), abs=1e-9)   # the sparse-table extremes
    assert 10.0 < found[0][2] < 12.0                           # the line's slope takes a little
    # A report on it: a reason, and over 16 px the verdict unusable.
    for side, verdict in ((0.4, "usable"), (0.7, "unusable")):
        pos, ev, _ = swerves(side)
        rep = report.make_report(events=ev, positions=pos, angles_deg=np.zeros(t_n),
                                 confidence=np.ones(t_n), contact=np.ones(t_n, bool),
                                 times_s=np.arange(t_n) / 4000.0, frame_rate_hz=4000.0, n_rows=8,
                                 pitch_um=50.8, image=np.ones((10, 10)))
        assert rep.verdict == verdict
        assert any("swerves sideways" in r for r in rep.reasons)
    # On a small or narrow strip a swerve at the limit already makes it unusable.
    pos, ev, _ = swerves(0.4)
    for kw, verdict in ((dict(n_plates=8 * 192, n_cols=192), "usable"),
                        (dict(n_plates=8 * 24, n_cols=24), "unusable"),
                        (dict(n_plates=20 * 16, n_cols=16), "unusable")):
        rep = report.make_report(events=ev, positions=pos, angles_deg=np.zeros(t_n),
                                 confidence=np.ones(t_n), contact=np.ones(t_n, bool),
                                 times_s=np.arange(t_n) / 4000.0, frame_rate_hz=4000.0, n_rows=8,
                                 pitch_um=50.8, image=np.ones((10, 10)), **kw)
        assert rep.verdict == verdict, kw


def test_strips_of_few_rows_get_a_reason():
    # Up to 4 rows the report says placement is less reliable (random simulated swipes of 2-4
    # rows: a third off by more than 1 % of span; see report.FEW_ROWS); from 5 rows, which
    # the key-frame tracker places, it does not (4 of 30 over 1 %, as 6 rows).
    from stripstitch import report
    t_n = 400
    pos = np.stack([0.5 * np.arange(t_n), np.zeros(t_n)], 1)
    for n_rows, said in ((2, True), (4, True), (5, False), (6, False)):
        ev = _events_of(pos, 4000.0, n_rows=n_rows)
        rep = report.make_report(events=ev, positions=pos, angles_deg=np.zeros(t_n),
                                 confidence=np.ones(t_n), contact=np.ones(t_n, bool),
                                 times_s=np.arange(t_n) / 4000.0, frame_rate_hz=4000.0,
                                 n_rows=n_rows, pitch_um=50.8, image=np.ones((10, 10)))
        assert rep.verdict == "usable"
        assert any(f"only {n_rows} rows" in r for r in rep.reasons) == said


@pytest.mark.parametrize("pattern, seed", [("left_loop", 21), ("tented_arch", 23)])
def test_whole_pixel_steps_do_not_stretch_the_swipe(pattern, seed):
    # A steady 100 mm/s swipe over the 16x128 strip at 2 kHz moves 0.984 px per frame: every
    # frame pair sits at about the same fraction of a pixel, the registrations' lock towards
    # whole pixels adds up instead of averaging out, and the model passes cannot take it out
    # (all frames sample one sub-pixel phase). Against the simulator's truth, these two came
    # out +0.30 % and +0.15 % long, 0.19 and 0.12 px along RMS; with the tracker registering
    # frames smoothed by 0.7 px (track.track's prefilter_px), -0.02 % and +0.04 %, 0.02 and
    # 0.01 px.
    from stripstitch import evaluate, simulate
    finger = simulate.make_finger(pattern, size_mm=(12.0, 10.0), rng=seed)
    cap = simulate.swipe(pattern, finger=finger, rng=seed + 1, n_rows=16, n_cols=128,
                         frame_rate_hz=2000.0, speed_mm_s=100.0, snr_db=30.0, profile="constant")
    res = stitch(cap.frames, frame_rate_hz=2000.0)
    d = evaluate.evaluate(res, cap, image=False, distortion=False, crb=False).to_dict()
    assert abs(d["span_error_pct"]) < 0.08
    assert d["along_rms_px"] < 0.05


def test_no_smoothing_where_the_overlaps_are_thin():
    # A swipe over a 32x384 strip at 1 kHz moving 13-27 rows per frame (up to 0.84 of the
    # strip): smoothed, with the two edge rows left out of overlaps of 5-7 rows, its links
    # locked a ridge period short and the span came out 33.9 % short (simulator's truth).
    # The tracker smooths only where the unsmoothed steps stay within half the strip
    # (pipeline._PREFILTER_MAX_STEP): +2.0 %, as without smoothing.
    from stripstitch import evaluate, simulate
    finger = simulate.make_finger("tented_arch", size_mm=(16.76, 11.12), rng=4523)
    cap = simulate.swipe("tented_arch", finger=finger, rng=4623, n_rows=32, n_cols=384,
                         frame_rate_hz=1000.0, speed_mm_s=766.4, snr_db=16.27, skew_deg=-1.04,
                         profile="accel_decel")
    assert np.diff(cap.positions[:, 0]).max() > 0.8 * 32
    res = stitch(cap.frames, frame_rate_hz=1000.0)
    d = evaluate.evaluate(res, cap, image=False, distortion=False, crb=False).to_dict()
    assert abs(d["span_error_pct"]) < 3.0


def test_a_lone_step_back_after_a_run_without_contact_is_no_backtrack():
    # Trajectory by construction, 4 kHz, 0.4 px per frame, frames 180-194 out of contact (a
    # band with no ridges crossed, as the streaming stitcher reports it). The first frame in
    # contact after the band placed 1.4 px ahead of the next is seen from one side only, as
    # a swipe's first frame is: an "end_step" low_confidence event, not a backtrack. The
    # same frame before the band, and a reversal over several frames after it, are not
    # touched.
    from stripstitch import report
    t_n = 400
    pos = np.stack([0.4 * np.arange(t_n), np.zeros(t_n)], 1)
    contact = np.ones(t_n, bool)
    contact[180:195] = False

    def kinds(p):
        ev = report.find_events(positions=p, angles_deg=np.zeros(t_n), confidence=np.ones(t_n),
                                contact=contact, link_failed=np.zeros(t_n - 1, bool),
                                link_dt_frames=np.ones(t_n - 1),
                                times_s=np.arange(t_n) / 4000.0, frame_rate_hz=4000.0,
                                n_rows=8, pitch_um=50.8)
        return [(e.kind, e.first_frame, e.last_frame, e.details.get("cause")) for e in ev
                if e.kind != "no_contact"]

    assert kinds(pos) == []
    after = pos.copy()
    after[195, 0] += 1.8                   # 1.4 px back from frame 195 to 196
    assert kinds(after) == [("low_confidence", 195, 195, "end_step")]
    before = pos.copy()
    before[179, 0] -= 1.8                  # the last frame before the band, 1.4 px back
    assert kinds(before) == [("low_confidence", 179, 179, "end_step")]
    inside = pos.copy()
    inside[197, 0] -= 1.8                  # two frames further in: back and forth
    assert [k[0] for k in kinds(inside)] == ["backtrack"]
    rev = pos.copy()
    rev[195:201, 0] = rev[195, 0] + 0.4 * (5 - np.arange(6))   # backing up over six frames
    rev[201:, 0] += rev[200, 0] - rev[201, 0] + 0.4
    assert [k[0] for k in kinds(rev)] == ["backtrack"]


def test_a_lone_step_back_into_an_end_frame_is_no_backtrack():
    # Trajectories by construction, 4 kHz, 0.4 px per frame. The first (or last) frame in
    # contact placed 1.4 px back against its neighbour is a doubtful end frame, seen from
    # one side only: a low_confidence event of cause "end_step" and a reason, not a
    # backtrack (a 1.8 px per frame change of speed in one frame period, 1.2 km/s^2 at
    # 50.8 um and 4 kHz). The same step back one frame inside the swipe, or a reversal over
    # several frames at the start, stays a backtrack.
    from stripstitch import report
    t_n = 400
    base = np.stack([0.4 * np.arange(t_n), np.zeros(t_n)], 1)

    def kinds(pos):
        ev = _events_of(pos, 4000.0)
        return ev, [(e.kind, e.first_frame, e.last_frame, e.details.get("cause")) for e in ev]

    assert kinds(base)[1] == []
    for frame in (0, t_n - 1):
        pos = base.copy()
        pos[frame, 0] += 1.8 if frame == 0 else -1.8     # 1.4 px back from its neighbour
        ev, k = kinds(pos)
        assert k == [("low_confidence", frame, frame, "end_step")]
        assert ev[0].details["step_px"] == pytest.approx(-1.4, abs=1e-9)
        rep = report.make_report(events=ev, positions=pos, angles_deg=np.zeros(t_n),
                                 confidence=np.ones(t_n), contact=np.ones(t_n, bool),
                                 times_s=np.arange(t_n) / 4000.0, frame_rate_hz=4000.0, n_rows=8,
                                 pitch_um=50.8, image=np.ones((10, 10)))
        assert rep.verdict == "usable"
        assert any("swipe's ends" in r for r in rep.reasons)
        assert not any("backwards" in r or "low placement" in r for r in rep.reasons)
    # One frame inside: frame 1 placed 1.8 px back, so the finger went back and forth.
    pos = base.copy()
    pos[1, 0] -= 1.8
    assert [x[0] for x in kinds(pos)[1]] == ["backtrack"]
    # The finger backing up over its first five frames (a reversal, not a lone frame).
    pos = base.copy()
    pos[:6, 0] = 0.4 * (5 - np.arange(6)) - 2.0
    pos[6:, 0] += 0.0
    assert [x[0] for x in kinds(pos)[1]] == ["backtrack"]


def test_straight_flank_ridges_on_a_narrow_strip():
    # A 16x32 strip (1.6 mm wide) under the straight flank ridges of a tented arch: nothing
    # across the strip fixes the sideways placement there. With the tracker's acceleration
    # allowance the same in every direction it ran off sideways by about 1.4 px per frame at
    # both ends (about 28 px RMS across against the simulator's truth; a swerve of over
    # 16 px, called unusable). Held to the finger's direction of travel it no longer runs
    # off: 5.4 px RMS, a 6 px slip while the fingertip arrives and flat after, no swerve;
    # the narrow strip's caution stays. The truth itself never swerves (simulated swipes
    # move on a straight slanted line).
    from stripstitch import report
    cap, res, d = _simulated("tented_arch", 811, 1211, skin="wet", n_rows=16, n_cols=32,
                             frame_rate_hz=3000.0, profile="constant", speed_mm_s=126.0,
                             snr_db=30.0, skew_deg=3.2, backtracks=((4.9, 0.23),))
    first, last = res.report.frames_in_contact
    assert report.find_swerves(cap.positions, first, last) == []
    sw = [e for e in res.events if e.kind == "low_confidence" and e.details.get("cause") == "swerve"]
    assert not sw or max(e.details["excursion_px"] for e in sw) < 16.0
    assert d["across_rms_px"] < 10.0
    assert any("narrow strip" in r for r in res.report.reasons)


def test_stall_rule_is_along_the_swipe():
    # A stall is no progress along the swipe: slower than the limit along, and slower than
    # three times it across (the drift a turn on the spot leaves); a finger sliding sideways
    # faster than that is moving. Trajectories by construction, 4 kHz, 50.8 um pitch: the
    # limit of 2 mm/s is 0.00984 px per frame.
    t_n = 400

    def stalls(across_px_per_frame):
        v = np.where((np.arange(t_n) >= 150) & (np.arange(t_n) < 250), 0.0, 0.5)
        return _stalls_of(np.stack([np.concatenate([[0.0], np.cumsum(v[:-1])]),
                                    across_px_per_frame * np.arange(t_n)], 1))

    for across in (0.0, 0.015, 0.025):
        (a, b), = stalls(across)
        assert abs(a - 150) <= 10 and abs(b - 250) <= 10
    assert stalls(0.04) == []


def test_stall_broken_by_noise_is_one_stall():
    # Trajectories by construction (4 kHz, 50.8 um pitch: the 2 mm/s limit is 0.0098 px per
    # frame, 10 ms = 40 frames). A 200-frame stall whose placement jumps 0.2 px and back
    # within 4 frames in its middle (noise crossing the speed limit) is one stall; a stall,
    # 4 px of travel over 40 frames, and a second stall are two.
    v = np.full(500, 0.5)
    v[150:350] = 0.0
    v[248:250] = 0.1                         # there ...
    v[250:252] = -0.1                        # ... and back
    pos = np.stack([np.concatenate([[0.0], np.cumsum(v[:-1])]), np.zeros(500)], 1)
    (a, b), = _stalls_of(pos)
    assert abs(a - 150) <= 10 and abs(b - 350) <= 10
    v = np.full(500, 0.5)
    v[100:200] = 0.0
    v[200:240] = 0.1
    v[240:340] = 0.0
    pos = np.stack([np.concatenate([[0.0], np.cumsum(v[:-1])]), np.zeros(500)], 1)
    assert len(_stalls_of(pos)) == 2


def test_turn_read_short_at_first_gets_a_second_opinion():
    # Simulator truth: the finger turns by 3.6 degrees while it backs up once. The first
    # pass's twist read 1.4 degrees at 2.3 standard errors, under the significance test, so
    # no turn was kept. Measured: rotation RMS 2.02 degrees, span error +1.005 %, across RMS
    # 1.98 px; with the turn passes as a second opinion (they read 3.1 degrees) 0.27 degrees,
    # +0.23 %, 0.49 px.
    from stripstitch import evaluate as ev
    from stripstitch import simulate

    finger = simulate.make_finger("twin_loop", size_mm=(12.0, 10.0), rng=8516)
    cap = simulate.swipe("twin_loop", finger=finger, rng=8916, n_rows=8, n_cols=192,
                         frame_rate_hz=4000.0, speed_mm_s=99.932, snr_db=24.671,
                         skew_deg=7.378, rotation_deg=3.7658, backtracks=((5.407, 0.38163),))
    res = stitch(cap.frames, frame_rate_hz=cap.frame_rate_hz, timestamps_s=cap.times_s)
    d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
    assert d["rotation_rms_deg"] < 0.6
    assert abs(d["span_error_pct"]) < 0.5
    assert d["backtrack_detected"] == 1


def test_slanted_swipe_on_a_narrow_strip_is_not_turned_by_the_passes_own_feedback():
    # Simulator truth: no rotation; a whorl swiped 5.5 degrees slanted over an 8x64 strip at
    # 16.5 dB (bench_geometry.py, seed 13579, swipe 23). The first reading (1.67 degrees at
    # 9.2 standard errors) got the turn passes as a second opinion, and they turned the swipe
    # by 5.9 degrees (rotation RMS 2.67 degrees, across RMS 2.78 px, span +0.53 %): on a
    # narrow strip the twist the model's across interpolation reads grows with the slant in
    # the frames' own axes, which the turn itself adds to. Without the turn: across 0.32 px,
    # span +0.18 %.
    from stripstitch import evaluate as ev
    from stripstitch import simulate

    finger = simulate.make_finger("whorl", size_mm=(14.0, 10.0), rng=14102, skin="normal")
    cap = simulate.swipe("whorl", finger=finger, rng=14502, n_rows=8, n_cols=64,
                         frame_rate_hz=3000.0, profile="constant", speed_mm_s=37.148,
                         snr_db=16.539, skew_deg=5.5227, rotation_deg=0.0)
    res = stitch(cap.frames, frame_rate_hz=cap.frame_rate_hz)
    d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
    assert np.ptp(res.angles) < 1.0
    assert d["across_rms_px"] < 0.8
    # 500 ppi geometric accuracy: 1 % of span (EFTS Appendix F, REFERENCE-VALUES.md sec. 4)
    assert abs(d["span_error_pct"]) < 1.0


def test_central_turn_ignores_a_turn_made_at_the_ends_of_the_travel():
    # The second opinion's test: a turn made while the fingertip arrives (first 10 % of the
    # travel) does not count; one spread over the swipe counts 80 % of it (linear ramp).
    from stripstitch.pipeline import _central_turn_deg

    t_n = 201
    pos = np.stack([np.arange(t_n, dtype=float), np.zeros(t_n)], 1)
    contact = np.ones(t_n, bool)
    arrival = np.radians(np.clip(np.arange(t_n) / 15.0, 0.0, 1.0) * 1.2)
    assert _central_turn_deg(pos, arrival, contact) < 1e-9
    ramp = np.radians(np.linspace(0.0, 2.0, t_n))
    assert abs(_central_turn_deg(pos, ramp, contact) - 1.6) < 0.02
    assert _central_turn_deg(pos, ramp, np.zeros(t_n, bool)) == 0.0


def test_slow_swipe_near_the_stall_speed_gets_no_turn():
    # Simulator truth: no rotation; 1.5 mm/s at 1 kHz (0.03 px per frame) hovers around the
    # stall speed for the whole swipe. Measured: with a weaker residual rule for a stall's
    # turn (2 % instead of 30 %) the ends of such runs read aliasing as turns of 0.5 degrees
    # and the swipe came out turned by 1.03 degrees, 1.18 px RMS across (now 0.27).
    from stripstitch import simulate

    finger = simulate.make_finger("right_loop", size_mm=(12.0, 10.0), rng=5)
    cap = simulate.swipe("right_loop", finger=finger, rng=6, n_rows=8, n_cols=192,
                         frame_rate_hz=1000.0, speed_mm_s=1.5, snr_db=25.0)
    res = stitch(cap.frames, frame_rate_hz=cap.frame_rate_hz)
    assert np.ptp(res.angles) < 0.2


def test_compiled_plate_line_sums_match_scipy_map_coordinates():
    # Outside reference: scipy.ndimage.map_coordinates (order 1; mode "nearest" for the image,
    # "constant" for the coverage mask) at the plates' frame-0 coordinates, summed in numpy;
    # the compiled pass of the fixed-pattern refit must give the same per-plate sums.
    from scipy import ndimage

    from stripstitch import mosaic
    from stripstitch.pipeline import _plate_line_sums
    rng = np.random.default_rng(11)
    t_n, r_n, c_n = 30, 4, 9
    x = rng.integers(0, 255, (t_n, r_n, c_n)).astype(np.uint8)
    contact = rng.uniform(size=t_n) > 0.2
    pos = np.cumsum(rng.uniform(0.1, 0.9, (t_n, 2)), axis=0) - 2.0
    ang = rng.uniform(-2.0, 2.0, t_n)
    img = rng.standard_normal((30, 24))
    seen = (rng.uniform(size=img.shape) > 0.1).astype(float)
    origin = np.array([1.5, 2.0])
    q = mosaic.frame_coordinates(x.shape, pos, ang) + origin
    ref = ndimage.map_coordinates(img, [q[..., 0], q[..., 1]], order=1, mode="nearest")
    cov = ndimage.map_coordinates(seen, [q[..., 0], q[..., 1]], order=1, mode="constant") > 0.99
    m = (cov & contact[:, None, None]).astype(float)
    xs = x.astype(float)
    expect = [m.sum(0), (ref * m).sum(0), (xs * m).sum(0), (ref * ref * m).sum(0),
              (ref * xs * m).sum(0)]
    got = [np.zeros((r_n, c_n)) for _ in range(5)]
    th = np.deg2rad(ang)
    _plate_line_sums(x, contact, pos, np.cos(th), np.sin(th),
                     np.array([(r_n - 1) / 2, (c_n - 1) / 2]), origin, img, seen, *got)
    assert expect[0].sum() > 100                      # the check is not vacuous
    for g, e in zip(got, expect):
        np.testing.assert_allclose(g, e, rtol=1e-9, atol=1e-9)


def test_quick_jerk_back_is_reported_and_noise_is_not():
    # A trajectory known by construction: 4 px per frame at 2 kHz, then 4 frames at 2 px per
    # frame backwards (0.4 mm in 2 ms, a jerk the smoothed velocity averages away), then on;
    # a second one that stalls 200 frames with 0.02 px of white jitter (common practice: a
    # placement's noise is no motion).
    def events(along):
        return _events_of(np.stack([along, np.zeros(along.size)], 1), 2000.0, n_rows=16)

    steps = np.r_[np.full(60, 4.0), np.full(4, -2.0), np.full(60, 4.0)]
    jerk = [e for e in events(np.r_[0.0, np.cumsum(steps)]) if e.kind == "backtrack"]
    assert len(jerk) == 1 and 59 <= jerk[0].first_frame <= 62
    assert jerk[0].details["distance_px"] == pytest.approx(8.0, abs=0.5)
    rng = np.random.default_rng(2)
    stall = np.r_[np.arange(60) * 4.0, np.full(200, 240.0), 240.0 + np.arange(1, 61) * 4.0]
    kinds = [e.kind for e in events(stall + 0.02 * rng.standard_normal(stall.size))]
    assert "backtrack" not in kinds and kinds.count("stall") == 1


def test_strip_of_16_columns_is_placed_by_the_pairs():
    # Simulator truth: 8 x 16 plates (the narrowest strip stitch accepts), whorl, 25 dB. The
    # key-frame tracker, which sees too little texture per key on so few columns, erred by
    # 10.8 px RMS along and reported two gaps the swipe does not have; the multi-baseline
    # pairs: 0.54 px, no gap.
    from stripstitch import evaluate as ev
    from stripstitch import simulate

    finger = simulate.make_finger("whorl", size_mm=(12.0, 10.0), rng=610)
    cap = simulate.swipe("whorl", finger=finger, rng=611, n_rows=8, n_cols=16,
                         frame_rate_hz=4000.0, speed_mm_s=100.0, snr_db=25.0, skew_deg=3.0,
                         profile="human")
    res = stitch(cap.frames, frame_rate_hz=cap.frame_rate_hz, timestamps_s=cap.times_s)
    assert res.options["placement"] == "multi-baseline pairs"
    d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
    assert d["gap_false"] == 0
    assert d["along_rms_px"] < 2.0


def test_two_row_strip_span_within_two_and_a_half_percent():
    # A 2-row strip (the shortest the contract allows) is placed by the pairs, whose one-row
    # overlaps bias small shifts towards zero; the refinement's extra passes for strips of
    # 2-3 rows take most of it out. Tolerance 2.5 %, looser than the 1-1.5 % the 500 ppi
    # geometric-accuracy requirement allows (EFTS Appendix G / F, REFERENCE-VALUES.md section 4)
    # for the shortest strip; measured -1.62 % (6 passes, as for longer strips: -4.55 %).
    from stripstitch import simulate
    finger = simulate.make_finger("left_loop", size_mm=(12.0, 10.0), rng=4305)
    cap = simulate.swipe("left_loop", finger=finger, rng=4405, n_rows=2, n_cols=192,
                         frame_rate_hz=8000.0, speed_mm_s=53.8, snr_db=29.0, profile="human")
    res = stitch(cap.frames, frame_rate_hz=cap.frame_rate_hz)
    c = cap.contact >= 0.5
    idx = np.flatnonzero(c)
    span = (res.positions[idx[-1], 0] - res.positions[idx[0], 0]) \
        / (cap.positions[idx[-1], 0] - cap.positions[idx[0], 0]) - 1.0
    assert abs(span) < 0.025


def test_two_row_strip_span_from_the_row_delay():
    # The same swipe as above: the along steps come from the delay between the two rows
    # (register.row_delay), which no one-row overlap biases. Tolerance 0.5 %, inside the
    # 1-1.5 % of the 500 ppi geometric-accuracy requirement (EFTS Appendix G / F,
    # REFERENCE-VALUES.md section 4); measured +0.11 % (the pairs and refinement alone:
    # -1.56 %, along RMS 2.0 px).
    from stripstitch import simulate
    finger = simulate.make_finger("left_loop", size_mm=(12.0, 10.0), rng=4305)
    cap = simulate.swipe("left_loop", finger=finger, rng=4405, n_rows=2, n_cols=192,
                         frame_rate_hz=8000.0, speed_mm_s=53.8, snr_db=29.0, profile="human")
    res = stitch(cap.frames, frame_rate_hz=cap.frame_rate_hz)
    idx = np.flatnonzero(cap.contact >= 0.5)
    est = res.positions[idx] - res.positions[idx[0]]
    true = cap.positions[idx] - cap.positions[idx[0]]
    assert abs(est[-1, 0] / true[-1, 0] - 1.0) < 0.005
    assert np.sqrt(np.mean((est[:, 0] - true[:, 0]) ** 2)) < 0.3
    # ... and the report does not call it unusable: the pairs its one-row overlap cannot hold
    # no longer count against the frames' confidence (measured mean 0.55 before, 0.995 now;
    # the suite's 2-row strip: 0.49, called unusable, before)
    assert res.report.verdict == "usable"
    assert res.confidence[idx].mean() > 0.8


def test_frames_beyond_the_tracked_ones_move_on_at_the_end_velocity():
    # Frames before the first and after the last frame in contact carry no weight in the
    # image, but their positions are part of the result: the finger keeps moving, so they
    # continue at the velocity of the nearest tracked frames (constant-velocity
    # extrapolation; common practice), not held at the end frame's position.
    from stripstitch.pipeline import _spread
    times = np.arange(40, dtype=float)
    chain = np.arange(10, 30)
    true = np.stack([0.7 * times + 0.002 * times ** 2, -0.1 * times], 1)
    out = _spread(times, chain, true[chain])
    assert np.all(out[0] == 0.0)
    err = (out - out[chain[0]]) - (true - true[chain[0]])
    # beyond the ends the error is the curvature the straight line leaves out (0.002 t^2
    # over at most 10 frames past a velocity read over 8 frames)
    assert np.abs(err).max() < 0.002 * 10 * (10 + 8)
    assert np.abs(err[chain]).max() < 1e-9
    # frame 0 to the first tracked frame: 7.2 px of travel (held still it would be 0)
    travel = true[chain[0], 0] - true[0, 0]
    assert abs((out[chain[0], 0] - out[0, 0]) - travel) < 0.05 * travel
    # a chain no longer than the velocity window: each end from its own side
    short = np.arange(10, 14)
    out = _spread(times, short, true[short])
    err = (out - out[short[0]]) - (true - true[short[0]])
    assert np.abs(err[short[-1]:short[-1] + 5]).max() < 0.1
    assert np.abs(err[short[0] - 5:short[0] + 1]).max() < 0.1


def test_fingertip_frames_outside_contact_do_not_shorten_the_swipe():
    # Simulated 12x96 strip at 2 kHz: the frames at either end whose pad coverage is 0.4-0.6
    # show too little texture to be tracked, but the finger covers them (the simulator's
    # contact >= 0.5, over which the span is measured). Held at the last tracked position
    # they took -0.82 % off the span; moving on at the tracked velocity, -0.23 %. Truth:
    # the simulator's positions; tolerance 0.5 %, inside the 1 % of the 500 ppi
    # geometric-accuracy requirement (EFTS Appendix F, REFERENCE-VALUES.md section 4).
    _, _, ev = _simulated("left_loop", 826, 1226, skin="dry", n_rows=12, n_cols=96,
                          frame_rate_hz=2000.0, profile="constant", speed_mm_s=119.7,
                          snr_db=36.4, skew_deg=6.9, rotation_deg=-0.49)
    assert abs(ev["span_error_pct"]) < 0.5


def test_three_row_strip_under_oblique_straight_ridges():
    # A 3x192 strip at 6 kHz (0.5-0.9 px per frame, 40 dB) under a loop's upper ridges,
    # which run straight over the strip some 25 degrees off its columns: the row delay's
    # peak slid along them (0.2-0.3 px across too many for 20-40 frames at a time) and read
    # the speed up to 26 % fast, span +8.0 % (bench_geometry.py --seed 301). Drawn towards
    # the swipe's line (register.row_delay's across_slope) it comes to +1.5 %. Against the
    # simulator's truth; tolerance 2.5 %, the strip of 3 rows said less reliable.
    _, res, d = _simulated("right_loop", 802, 1202, size_mm=(14.0, 11.75), n_rows=3,
                           n_cols=192, frame_rate_hz=6000.0, profile="accel_decel",
                           speed_mm_s=150.0, snr_db=40.0, skew_deg=0.9)
    assert abs(d["span_error_pct"]) < 2.5
    assert any("only 3 rows" in r for r in res.report.reasons)


def test_narrow_strip_long_baselines_do_not_slip_a_ridge_period():
    # A 20x16 strip (0.8 mm wide) under an arch at 2 kHz, 18 dB: the long-baseline partners'
    # strongest correlation peaks lay a ridge period or two off, alike over many pairs,
    # and the placement slipped by them (span -11.5 %, a false backtrack). Partners whose
    # peak leaves the prediction are dropped. Against the simulator's truth: within 1 %.
    _, _, d = _simulated("arch", 820, 1220, n_rows=20, n_cols=16, frame_rate_hz=2000.0,
                         profile="accel_decel", speed_mm_s=149.0, snr_db=17.7, skew_deg=2.3,
                         rotation_deg=-1.2)
    assert abs(d["span_error_pct"]) < 1.0
    assert d["backtrack_false"] == 0


def test_four_row_strip_near_a_pixel_per_frame_takes_the_row_delay():
    # 0.85 px per frame on a 4-row strip: the few frames that see a row sample few sub-pixel
    # phases, the pairs lock towards whole pixels and the refinement cannot take that out
    # (the span came out +4.4 %); the delay between the first and last rows reads the speed.
    # Truth: the simulator's positions; tolerance 1 %, the 500 ppi geometric-accuracy
    # requirement (EFTS Appendix F, REFERENCE-VALUES.md section 4). Measured -0.02 %.
    from stripstitch import simulate
    finger = simulate.make_finger("arch", size_mm=(14.0, 10.0), rng=602)
    cap = simulate.swipe("arch", finger=finger, rng=1002, n_rows=4, n_cols=160,
                         frame_rate_hz=3000.0, profile="constant", speed_mm_s=129.6,
                         snr_db=35.0, skew_deg=-3.2)
    res = stitch(cap.frames, frame_rate_hz=3000.0)
    idx = np.flatnonzero(cap.contact >= 0.5)
    est = res.positions[idx[-1], 0] - res.positions[idx[0], 0]
    true = cap.positions[idx[-1], 0] - cap.positions[idx[0], 0]
    assert abs(est / true - 1.0) < 0.01


def test_jump_as_the_finger_leaves_is_a_gap_not_a_weak_link():
    # A 0.6 mm jump in one frame on an 8-row strip while half the strip is still covered:
    # the frame after the jump matched the one before at the predicted shift with an NCC of
    # 0.59, against 0.97-0.99 for the links before it (the uncovered plates' static level
    # correlates at any shift). A link far below the recent ones is refused like a searched
    # one (track._NCC_DROP), so the jump is reported (simulator truth: a gap there).
    from stripstitch import simulate
    finger = simulate.make_finger("twin_loop", size_mm=(12.0, 10.0), rng=9954)
    cap = simulate.swipe("twin_loop", finger=finger, rng=9974, n_rows=8, n_cols=192,
                         frame_rate_hz=4000.0, profile="constant", speed_mm_s=111.39,
                         snr_db=26.64, too_fast=((8.495, 0.6168),))
    truth = [e for e in cap.events if e.kind == "gap"]
    assert len(truth) == 1
    res = stitch(cap.frames, pitch_um=float(cap.pitch_um), frame_rate_hz=cap.frame_rate_hz,
                 timestamps_s=cap.times_s)
    found = res.events_of("gap")
    assert len(found) == 1 and abs(found[0].first_frame - truth[0].first_frame) <= 2


def test_two_by_two_inverse_and_smallest_eigenvalue_match_numpy():
    # Outside reference: numpy.linalg.inv and numpy.linalg.eigvalsh (LAPACK) on the same
    # matrices: symmetric positive definite 2 x 2 information matrices, well conditioned and
    # nearly rank one (ridges parallel to the swipe: 1e6 against 1e-2), and general ones.
    from stripstitch.pipeline import _inv2, _min_eig2
    rng = np.random.default_rng(5)
    a = rng.standard_normal((200, 2, 3))
    spd = a @ np.transpose(a, (0, 2, 1))
    rot = rng.uniform(0, np.pi, 100)
    u = np.stack([np.cos(rot), np.sin(rot)], 1)
    v = np.stack([-np.sin(rot), np.cos(rot)], 1)
    thin = 1e6 * u[:, :, None] * u[:, None, :] + 1e-2 * v[:, :, None] * v[:, None, :]
    gen = rng.standard_normal((100, 2, 2))
    for m in (spd, thin, gen):
        ref = np.linalg.inv(m)
        scale = np.abs(ref).max(axis=(1, 2), keepdims=True)
        # both sides carry rounding errors of about condition number x machine epsilon
        tol = 10 * np.finfo(float).eps * np.linalg.cond(m).max()
        np.testing.assert_allclose(_inv2(m) / scale, ref / scale, rtol=tol, atol=tol)
    for m in (spd, thin):
        ref = np.linalg.eigvalsh(m)[:, 0]
        # absolute accuracy relative to the matrix's size, as LAPACK's own
        np.testing.assert_allclose(_min_eig2(m), ref, rtol=1e-9,
                                   atol=1e-12 * np.abs(m).max())


def _stalled_swipe(seed, stall_mm):
    """A simulated 8x192 swipe at 1 kHz and 125 mm/s (about 2.5 px per frame) with a human
    speed profile and a 0.3 s stall: the finger stops and sets off again at full speed within
    a frame. Truth from the simulator (stripstitch.simulate, which shares no code with the
    reconstruction)."""
    from stripstitch import simulate

    finger = simulate.make_finger("whorl", size_mm=(12.0, 10.0), rng=seed)
    return simulate.swipe("whorl", finger=finger, rng=seed, n_rows=8, n_cols=192,
                          frame_rate_hz=1000.0, speed_mm_s=125.0, profile="human",
                          stalls=((stall_mm, 0.3),), snr_db=25.0)


def _errors_in_contact(res, cap):
    """Span error (%) and along RMS (px) over the frames with pad contact >= 0.5, relative
    to the first of them."""
    c = np.flatnonzero(cap.contact >= 0.5)
    est = res.positions[c] - res.positions[c[0]]
    true = cap.positions[c] - cap.positions[c[0]]
    span = 100.0 * ((est[-1, 0] - est[0, 0]) / (true[-1, 0] - true[0, 0]) - 1.0)
    return span, float(np.sqrt(np.mean((est[:, 0] - true[:, 0]) ** 2)))


def test_finger_setting_off_fast_after_a_stall_is_no_gap():
    # The first frame after the stall moved 2.8 px. The tracker's search, started near its
    # prediction (0), slid onto the true shift and the link ended as a gap: a false "gap"
    # event and 6 px too much travel pushed in (span +4.1 %, before the fix).
    cap = _stalled_swipe(0, 6.0)
    assert not [e for e in cap.events if e.kind == "gap"]
    res = stitch(cap.frames, pitch_um=float(cap.pitch_um), frame_rate_hz=1000.0, mode="fast")
    assert not [e for e in res.events if e.kind == "gap"]
    span, along = _errors_in_contact(res, cap)
    assert abs(span) < 0.3 and along < 0.3          # before: 4.1 % and 1.3 px


def test_stretch_correction_follows_the_travel_through_a_stall():
    # The refinement's stretch correction is smoothed over about two strips of travel. Over
    # frames instead, the stall's 300 frames widened the window over the whole swipe (measured
    # before the change: span -0.23 %, along RMS 0.27 px).
    cap = _stalled_swipe(1, 10.0)
    res = stitch(cap.frames, pitch_um=float(cap.pitch_um), frame_rate_hz=1000.0)
    span, along = _errors_in_contact(res, cap)
    assert abs(span) < 0.12 and along < 0.12


@pytest.mark.parametrize("seed", [0, 1])
def test_ridge_free_band_is_crossed_at_the_measured_speed(seed):
    # A band of the finger with no ridges (a crease, a scar), 16 px wide, wider than the
    # 8-row strip: the frames that see only the band show noise, and no frame overlaps the
    # texture on both sides. Frames by exact Fourier shifts (the truth by construction), at a
    # constant 0.5 px per frame. Measured before the band was bridged: span +1.2 to +2.0 %,
    # frames after the band 5-6 px off along (what the band's noise matched), a false
    # backtrack on one seed; after: span within 0.03 %, along within 0.12 px.
    tex = band_texture((420, 96), seed=5 + seed)
    y = np.arange(420, dtype=float)[:, None]
    lo, hi, edge = 190.0, 206.0, 4.0                # the band, with cosine edges
    w = np.clip(np.maximum((lo - y) / edge, (y - hi) / edge), 0.0, 1.0)
    tex = tex * (0.5 - 0.5 * np.cos(np.pi * w))
    steps = np.tile([0.5, 0.03], (599, 1))
    pos = np.vstack([[0.0, 0.0], np.cumsum(steps, 0)])
    frames = cut_frames(tex, pos + [20.0, 0.0])
    frames = frames + np.random.default_rng(seed).normal(0.0, 0.05, frames.shape)
    res = stitch(frames)
    # Geometric-accuracy yardstick: the interim 500 ppi scanner spec allows 1.5 % over long
    # distances (EFTS Appendix G, REFERENCE-VALUES.md section 4); we ask for 0.2 %.
    assert abs(_span_error(res, pos)) < 0.002
    err = res.positions - pos
    assert np.abs(err[:, 0] - err[0, 0]).max() < 0.3
    # Nothing jumped and nothing went back: no gap, no backtrack. The band is reported:
    # frames without the finger's texture and placements of low confidence around them.
    assert not res.events_of("gap") and not res.events_of("backtrack")
    # frames whose window lies inside the band: texture rows 28 + 0.5 t .. + 7 (cut_frames'
    # origin 8, plus 20) within 190-206
    inside = np.flatnonzero((28 + pos[:, 0] >= lo) & (28 + pos[:, 0] + 7 <= hi))
    flagged = np.zeros(len(pos), dtype=bool)
    for e in res.events_of("no_contact") + res.events_of("low_confidence"):
        flagged[e.first_frame:e.last_frame + 1] = True
    assert inside.size > 10 and flagged[inside].all()
    assert (res.confidence[inside] < 0.5).all()


def _assert_one_band_within_its_uncertainty(res, true_positions):
    """One ridge-free run reported, its travel (frame before it to frame after it) within
    twice its stated uncertainty of the truth's."""
    band = [e for e in res.events_of("low_confidence") if e.details.get("cause") == "no_texture"]
    assert len(band) == 1
    a, b = band[0].first_frame - 1, band[0].last_frame + 1
    true_px = float(np.hypot(*(true_positions[b] - true_positions[a])))
    assert abs(band[0].details["travel_px"] - true_px) < 2 * band[0].details["uncertainty_px"]


def _crease_swipe_errors(cap, frame_rate_hz):
    """Stitch a simulated swipe with no gap in its truth: no gap reported either; returns the
    reconstruction and its errors against the truth."""
    from stripstitch import evaluate

    assert not cap.events_of("gap")
    res = stitch(cap.frames, frame_rate_hz=frame_rate_hz, timestamps_s=cap.times_s)
    assert not res.events_of("gap")
    return res, evaluate.evaluate(res, cap, distortion=False).to_dict()


def test_simulated_crease_is_no_gap():
    # A right loop with a 0.6 mm flexion crease (simulate.with_crease), an 8-row strip at
    # 100 mm/s: frames in the middle of the swipe with no texture, the finger moving at
    # 0.5 px per frame throughout (simulator truth: no gap). Measured before the band was
    # bridged: a false gap, span +6.2 %, along RMS 7.7 px, image NCC 0.69; after: +0.015 %,
    # 0.05 px, 0.98.
    from stripstitch import simulate

    f = simulate.make_finger("right_loop", size_mm=(14.0, 12.0), rng=3)
    cap = simulate.swipe("right_loop", finger=simulate.with_crease(f, at_mm=7.0, width_mm=0.6),
                         rng=5, n_rows=8, n_cols=192, frame_rate_hz=4000.0, speed_mm_s=100.0,
                         snr_db=25.0)
    res, d = _crease_swipe_errors(cap, 4000.0)
    # EFTS Appendix G's 1.5 % (REFERENCE-VALUES.md section 4) is the yardstick; we ask 0.2 %.
    assert abs(d["span_error_pct"]) < 0.2
    assert d["along_rms_px"] < 0.3 and d["ncc"] > 0.95
    # Reported with its cause, and the travel across it within its stated uncertainty of the
    # simulator's (frame before the run to frame after it).
    _assert_one_band_within_its_uncertainty(res, cap.positions)
    assert any("no ridges" in r for r in res.report.reasons)


def test_band_narrower_than_the_strip_is_no_gap():
    # A ridge-free band 12 px wide (plus 2 px cosine edges) under a 16-row strip at 1.5 px
    # per frame: no frame shows only the band, but at this noise the links across it fail
    # (their overlap holds nothing but the band). Frames by exact Fourier shifts (the truth
    # by construction). Measured before a band's edge in the frames' rows told it from a
    # too-fast jump: a false gap pushed by a strip height, span +9.8 %, 29 px off along.
    tex = band_texture((420, 128), seed=7)
    y = np.arange(420, dtype=float)[:, None]
    lo, hi, edge = 190.0, 202.0, 2.0
    w = np.clip(np.maximum((lo - y) / edge, (y - hi) / edge), 0.0, 1.0)
    tex = tex * (0.5 - 0.5 * np.cos(np.pi * w))
    pos = np.vstack([[0.0, 0.0], np.cumsum(np.tile([1.5, 0.03], (199, 1)), 0)])
    frames = cut_frames(tex, pos + [20.0, 0.0], n_rows=16, n_cols=96)
    frames = frames + np.random.default_rng(2).normal(0.0, 0.2 * tex.std(), frames.shape)
    res = stitch(frames)
    # EFTS Appendix G's 1.5 % (REFERENCE-VALUES.md section 4) is the yardstick; we ask 0.2 %.
    assert abs(_span_error(res, pos)) < 0.002
    assert np.abs(res.positions[:, 0] - pos[:, 0]).max() < 0.5
    assert not res.events_of("gap")
    _assert_one_band_within_its_uncertainty(res, pos)


def test_band_between_textured_frames_of_a_weakly_textured_swipe_is_no_gap():
    # scikit-image's coins photograph (outside data) swiped over a 16x128 strip at 2 kHz and
    # 15 dB (bench_bands.py, seed 5151, swipe 11): the background between two coins is a band
    # narrower than the strip, so some texture stays in view on every frame, and against the
    # swipe's weakly textured median frame none is faint (0.59 / 0.39 of it either side of
    # the crossing); but the two frames' textured rows do not overlap, the link failed and
    # was taken for a too-fast jump: a gap pushed by a strip height, span +14.6 %, along RMS
    # 10.3 px. Now crossed at the measured speed: +0.16 %, 0.19 px.
    import skimage.data

    from stripstitch import simulate

    finger = simulate.texture_finger(skimage.data.coins(), pixel_um=25.4)
    cap = simulate.swipe("arch", finger=finger, rng=5762, n_rows=16, n_cols=128,
                         frame_rate_hz=2000.0, profile="accel_decel", speed_mm_s=73.338,
                         snr_db=15.139, skew_deg=1.4758)
    res, d = _crease_swipe_errors(cap, 2000.0)
    # EFTS Appendix G's 1.5 % (REFERENCE-VALUES.md section 4) is the yardstick; we ask 0.5 %.
    assert abs(d["span_error_pct"]) < 0.5
    assert d["along_rms_px"] < 0.5
    _assert_one_band_within_its_uncertainty(res, cap.positions)


def test_short_run_out_of_contact_is_crossed_not_held_on_the_fixed_pattern():
    # A 0.41 mm crease (simulate.with_crease) under an 8-row strip at 0.32 px per frame, 33
    # dB (bench_bands.py, seed 5151, swipe 2): its skin does not touch the sensor for 7
    # frames, over which the finger travels 3.5 px, under half a strip. Fast mode's tracker
    # held those frames on the fixed pattern's rest (-0.06 px per frame), and the report read
    # a 1.2 px backtrack the simulator's truth does not have; a run too short for a band was
    # taken for a jump's blur, but frames out of contact are no blur.
    from stripstitch import simulate

    f = simulate.make_finger("right_loop", size_mm=(14.0, 12.0), rng=5453)
    cap = simulate.swipe("right_loop", finger=simulate.with_crease(f, at_mm=0.56615 * 14.0,
                                                                   width_mm=0.40823),
                         rng=5753, n_rows=8, n_cols=192, frame_rate_hz=4000.0,
                         profile="constant", speed_mm_s=65.8735, snr_db=32.556,
                         skew_deg=4.2554)
    assert not cap.events_of("backtrack")
    res = stitch(cap.frames, frame_rate_hz=4000.0, timestamps_s=cap.times_s, mode="fast")
    assert not res.events_of("backtrack")
    assert not res.events_of("gap")
    band = [e for e in res.events_of("low_confidence") if e.details.get("cause") == "no_texture"]
    assert len(band) == 1


def test_simulated_narrow_crease_at_low_snr_is_no_gap():
    # An arch with a 0.7 mm crease (14 px, under the 16-row strip) at 16 dB, accelerating
    # through it (simulator truth: no gap). Measured before a band's edge in the frames' rows
    # told it from a too-fast jump (three seeds): a false gap, span +7.1 to +7.3 %, along RMS
    # 9.3-9.5 px, image NCC 0.61-0.63; after: -0.02 to -0.07 %, 0.06-0.09 px, 0.98.
    from stripstitch import simulate

    f = simulate.make_finger("arch", size_mm=(14.0, 12.0), rng=4413)
    cap = simulate.swipe("arch", finger=simulate.with_crease(f, at_mm=7.7, width_mm=0.7), rng=1,
                         n_rows=16, n_cols=128, frame_rate_hz=2000.0, profile="accel_decel",
                         speed_mm_s=100.0, snr_db=16.0)
    res, d = _crease_swipe_errors(cap, 2000.0)
    # EFTS Appendix G's 1.5 % (REFERENCE-VALUES.md section 4) is the yardstick; we ask 0.3 %.
    assert abs(d["span_error_pct"]) < 0.3
    assert d["along_rms_px"] < 0.3 and d["ncc"] > 0.95
    _assert_one_band_within_its_uncertainty(res, cap.positions)


def _speeding_strip(n_rows, v0, v1, n_frames, *, texture_rows):
    """Exact-shift frames of an n_rows x 128 strip whose finger speeds up from v0 to v1 px
    per frame and back (a half sine), slightly slanted, with a little noise; stitched, with
    no gap reported. Returns the steps, the true positions and the reconstruction."""
    tex = band_texture((texture_rows, 160), seed=0)
    u = np.linspace(0.0, np.pi, n_frames - 1)
    steps = np.stack([v0 + (v1 - v0) * np.sin(u), np.full(n_frames - 1, 0.04)], 1)
    pos = np.vstack([[0.0, 0.0], np.cumsum(steps, 0)])
    frames = cut_frames(tex, pos + [20.0, 0.0], n_rows=n_rows, n_cols=128)
    frames = frames + np.random.default_rng(0).normal(0.0, 0.02 * tex.std(), frames.shape)
    res = stitch(frames)
    assert not res.events_of("gap")
    return steps, pos, res


def test_two_row_strip_at_its_overlap_limit_is_no_gap():
    # A 2-row strip whose finger speeds up from 0.55 to 1.03 px per frame and back: above
    # 1 px per frame successive frames share no row, so links fail, yet every row of the
    # finger is seen (no gap in the truth: steps stay under the strip's 2 rows). Frames by
    # exact Fourier shifts (the truth by construction). Measured before such runs were told
    # from a jump (three seeds): 14-15 gaps each pushed out to a strip height, span +13 to
    # +15 %, unusable; after: -0.6 to -0.7 %, no gap, the runs reported with their cause;
    # with the row delay also read under a frame (register.row_delay's min_delay), -0.09 to
    # +0.02 %.
    steps, pos, res = _speeding_strip(2, 0.55, 1.03, 330, texture_rows=500)
    # EFTS Appendix G's 1.5 % (REFERENCE-VALUES.md section 4) is the yardstick; we ask 0.3 %.
    assert abs(_span_error(res, pos)) < 0.003
    limit = [e for e in res.events_of("low_confidence") if e.details.get("cause") == "overlap_limit"]
    assert limit and all(0.75 <= e.details["speed_px_per_frame"] <= 1.2 for e in limit)
    assert all(steps[e.first_frame:e.last_frame, 0].max() > 0.9 for e in limit)
    assert any("barely overlap" in r for r in res.report.reasons)


def test_three_row_strip_past_a_pixel_per_frame_keeps_its_length():
    # A 3-row strip whose finger speeds up from 0.8 to 1.5 px per frame and back (exact
    # Fourier shifts: the truth by construction). Past 1 px per frame neighbouring rows see
    # the texture under a frame apart, which the delay reads about 1.4 % fast; the first and
    # last rows, two apart, read it over a frame. Measured with neighbouring rows only:
    # +1.17 %; with the outer rows where they read 1 px per frame or more: -0.19 %.
    _, pos, res = _speeding_strip(3, 0.8, 1.5, 250, texture_rows=700)
    # EFTS Appendix G's 1.5 % (REFERENCE-VALUES.md section 4) is the yardstick; we ask 0.5 %.
    assert abs(_span_error(res, pos)) < 0.005


def test_four_row_strip_at_speed_keeps_its_length():
    # A 4-row strip whose finger peaks at 2.66 px per frame (simulator truth): the speed comes
    # from the delay between the first and last rows, whose peak is then narrower than the
    # lag spacing. Measured with the Gaussian peak fit alone (three seeds): span -8.3 to
    # -8.9 %, called usable; with the cosine fit for narrow peaks: +0.58 to +0.80 %.
    from stripstitch import evaluate, simulate

    f = simulate.make_finger("arch", size_mm=(14.0, 10.0), rng=820)
    cap = simulate.swipe("arch", finger=f, rng=1, n_rows=4, n_cols=160, frame_rate_hz=2000.0,
                         profile="accel_decel", speed_mm_s=150.0, snr_db=18.0, skew_deg=2.0)
    res = stitch(cap.frames, frame_rate_hz=2000.0)
    d = evaluate.evaluate(res, cap, image=False, distortion=False).to_dict()
    # EFTS Appendix G's 1.5 % (REFERENCE-VALUES.md section 4) is the yardstick.
    assert abs(d["span_error_pct"]) < 1.5


def test_six_row_strip_at_speed_is_tracked():
    # A 6-row strip at 1.6 px per frame (a third of a 4-row overlap per frame): the pairwise
    # path drifted along (span +3.8 %, along RMS 2.0 px); the key-frame tracker, used from 6
    # rows on, holds it. Truth from the simulator.
    from stripstitch import simulate

    finger = simulate.make_finger("left_loop", size_mm=(12.0, 10.0), rng=100)
    cap = simulate.swipe("left_loop", finger=finger, rng=0, n_rows=6, n_cols=160,
                         frame_rate_hz=4000.0, speed_mm_s=1.6 * 50.8e-3 * 4000.0, snr_db=25.0)
    res = stitch(cap.frames, pitch_um=float(cap.pitch_um), frame_rate_hz=4000.0)
    assert res.options["placement"] == "key-frame tracker"
    span, along = _errors_in_contact(res, cap)
    assert abs(span) < 0.3 and along < 0.3


def test_slanted_swipe_keeps_the_trackers_long_range_across_path():
    # Truth by construction (the simulator's poses). On a slanted swipe the refinement's shear
    # reading is biased and its integral drifted the frames across (0.5 px RMS on this swipe;
    # 0.24 px with the tracker's across path over 8 strip heights of travel, 0.12 px with the
    # slope the tracker's key links read); the image-scale detail stays the refinement's
    # (along unchanged).
    from stripstitch import evaluate, simulate
    finger = simulate.make_finger("twin_loop", size_mm=(12.0, 10.0), rng=10)
    cap = simulate.swipe("twin_loop", finger=finger, rng=20, n_rows=8, n_cols=192,
                         frame_rate_hz=4000.0, speed_mm_s=110.0, snr_db=24.0, skew_deg=2.0)
    res = stitch(cap.frames, frame_rate_hz=4000.0)
    err = evaluate.evaluate(res, cap, image=False, distortion=False)
    assert err.trajectory.across_rms_px < 0.35
    assert err.trajectory.along_rms_px < 0.3
    assert res.positions[0].tolist() == [0.0, 0.0]


@pytest.mark.parametrize("pattern, finger_seed, seed, options", [
    ("twin_loop", 7512, 7912, dict(n_rows=8, n_cols=192, frame_rate_hz=4000.0,
                                   profile="accel_decel", speed_mm_s=160.0, snr_db=26.0,
                                   skew_deg=-5.4)),
    ("whorl", 7533, 7933, dict(n_rows=16, n_cols=128, frame_rate_hz=2000.0,
                               profile="accel_decel", speed_mm_s=48.0, snr_db=33.0,
                               skew_deg=2.2)),
    ("twin_loop", 7531, 7931, dict(n_rows=16, n_cols=128, frame_rate_hz=2000.0,
                                   speed_mm_s=94.0, snr_db=30.0, skew_deg=-3.0)),
])
def test_slanted_swipe_across_slope_from_the_key_links(pattern, finger_seed, seed, options):
    # Truth by construction (the simulator's poses). The refinement's across error on these
    # slanted loops and whorls is mostly a constant slope (its shear reading's bias); the
    # tracker's key links read that slope, weighed against their own noise, and it is
    # removed. Measured: across RMS 0.141 / 0.206 / 0.300 px with the tracker's path over 8
    # strip heights, 0.051 / 0.035 / 0.033 px now; along unchanged (0.100 / 0.031 / 0.075).
    from stripstitch import evaluate, simulate
    finger = simulate.make_finger(pattern, size_mm=(12.0, 10.0), rng=finger_seed)
    cap = simulate.swipe(pattern, finger=finger, rng=seed, **options)
    res = stitch(cap.frames, frame_rate_hz=options["frame_rate_hz"])
    err = evaluate.evaluate(res, cap, image=False, distortion=False).trajectory
    # the target for the position error, 0.1 px RMS
    assert err.across_rms_px < 0.1
    assert err.along_rms_px < 0.15


def test_turning_strip_at_a_pixel_per_frame_keeps_its_across_path():
    # Truth by construction (the simulator's poses). A 16-row strip turning 3 degrees while
    # moving 0.98 px per frame: the frames sample one along phase, so the refinement keeps
    # the tracker's across path there, and the tracker registers turned frames by translation
    # alone (biased across by the turn). Its key links registered again with the refined
    # relative turn held: across RMS 1.25 px before, 0.31 px now (1.18 with the relative turn
    # left out, 2.14 with it of the wrong sign). Along, the tracker's translation-only links
    # of turned frames read about 0.6 % short here; the whole-pixel lock of unsmoothed frames
    # (+0.3 % on this finger unturned) had hidden half of that: with the tracker's smoothing
    # (pipeline._TRACK_PREFILTER_PX) along RMS 0.36 -> 0.64 px, span -0.32 -> -0.78 %, the
    # across path 0.29 -> 0.25 px (two more fingers: -0.08 -> -0.31 % and +0.55 -> +0.27 %).
    from stripstitch import evaluate, simulate
    finger = simulate.make_finger("right_loop", size_mm=(12.0, 10.0), rng=5)
    cap = simulate.swipe(finger=finger, rng=1, n_rows=16, n_cols=128, frame_rate_hz=2000.0,
                         speed_mm_s=100.0, snr_db=30.0, rotation_deg=3.0)
    res = stitch(cap.frames, frame_rate_hz=2000.0)
    err = evaluate.evaluate(res, cap, image=False, distortion=False).trajectory
    assert err.across_rms_px < 0.6
    assert err.along_rms_px < 0.8
    # EFTS Appendix G's 1.5 % (REFERENCE-VALUES.md section 4), with room
    assert abs(err.span_error_pct) < 1.0


def _key_links(truth, rng, sigma_px, n_rows=8):
    """Key links every 0.75 (R - 1) rows along a trajectory: frame, key, measured step
    (truth plus noise of sigma_px), information (isotropic, 1 / sigma^2)."""
    reach = 0.75 * (n_rows - 1)
    a, b, y_key = [], [], truth[0, 0]
    key = 0
    for t in range(1, len(truth)):
        if truth[t, 0] - y_key >= reach:
            a.append(t)
            b.append(key)
            key, y_key = t, truth[t, 0]
    a, b = np.array(a), np.array(b)
    step = truth[a] - truth[b] + rng.normal(0.0, sigma_px, (a.size, 2))
    info = np.tile(np.eye(2) / sigma_px ** 2, (a.size, 1, 1))
    return a, b, step, info


@pytest.mark.parametrize("skew_deg, n_rows", [(0.0, 8), (4.0, 8), (8.0, 24)])
def test_across_slope_from_weighs_the_links_by_their_noise(skew_deg, n_rows):
    # Synthetic trajectories (truth by construction): 400 frames at 0.5 px per frame, slanted
    # by skew_deg, over 20 noise draws. The refined path carries a slope error of 3e-3 px per
    # px. Precise links (0.01 px) read it and it is removed; noisy links (0.2 px: their
    # slope's standard error about 3e-3 itself) leave less error on average than there was
    # (the estimate is shrunk by its own uncertainty, so it cannot add more noise than it
    # takes out). A swipe that is not slanted, where the refinement's shear reading has no
    # bias to remove (the prior falls towards its floor, 3e-4; here to about 7e-4, the
    # refined path's own slant being 3e-3), takes most of precise links' slope but not all,
    # and almost none of noisy ones'; so does a 24-row strip slanted by 8 degrees, whose
    # frames saw each row at across phases spread over 3.4 px (the shear reading's bias needs
    # them concentrated within a pixel or so).
    from stripstitch.pipeline import _across_slope_from
    y = 0.5 * np.arange(400.0)
    truth = np.stack([y, np.tan(np.radians(skew_deg)) * y], axis=1)
    refined = truth.copy()
    refined[:, 1] += 3e-3 * y
    left = {0.01: [], 0.2: []}
    for seed in range(20):
        rng = np.random.default_rng(seed)
        for sigma in left:
            out = _across_slope_from(refined, _key_links(truth, rng, sigma, n_rows), n_rows)
            assert out[0].tolist() == [0.0, 0.0]
            assert np.array_equal(out[:, 0], refined[:, 0])      # along untouched
            left[sigma].append(np.polyfit(y, out[:, 1] - truth[:, 1], 1)[0])
    precise, noisy = np.array(left[0.01]), np.array(left[0.2])
    if skew_deg and n_rows == 8:
        assert np.sqrt(np.mean(precise ** 2)) < 0.4e-3
        assert np.sqrt(np.mean(noisy ** 2)) < 2.8e-3       # 3e-3 uncorrected
    else:
        assert 0.2e-3 < np.mean(precise) < 1.0e-3
        assert np.mean(noisy) > 2.7e-3


@pytest.mark.parametrize("n_rows, n_cols, verdict, note", [
    (4, 16, "unusable", "usable plates"), (8, 24, "usable", "small strip"), (8, 64, "usable", None),
    (20, 16, "usable", "narrow strip"), (16, 48, "usable", "narrow strip")])
def test_verdict_follows_the_strip_size(tex, n_rows, n_cols, verdict, note):
    # Under 128 usable plates simulated swipes erred by 1-92 % of their span (report.py's
    # MIN_PLATES, measured); the verdict must not call such a strip's image usable, and a
    # strip of 128-255 plates gets a caution, as does one under 64 columns (NARROW_COLS:
    # ridge-period slips and sideways runs; 80 simulated swipes of 24-48 columns, a third
    # over 1 % of span). Frames by exact Fourier shifts, 0.4 px/frame.
    pos = np.vstack([[0.0, 0.0], np.cumsum(np.tile([0.4, 0.0], (299, 1)), 0)])
    frames = cut_frames(tex, pos + [20.0, 0.0], n_rows=n_rows, n_cols=n_cols)
    res = stitch(frames)
    assert res.report.verdict == verdict
    hits = [r for r in res.report.reasons
            if ("usable plates" in r or "small strip" in r or "narrow strip" in r)]
    if note is None:
        assert not hits
    else:
        assert len(hits) == 1 and note in hits[0]


def test_demo_too_fast_swipe_stays_a_gap():
    # The bundled demo swipe that jumps 24 px per frame for three frames on a 16-row strip
    # (simulator truth: a gap): the jump blurs those frames to blank, which must not be taken
    # for a ridge-free band (measured with three blank frames allowed for a band: bridged at
    # the speed around it, called usable, 34 px RMS off along).
    from pathlib import Path

    from stripstitch import evaluate, simulate

    cap = simulate.Capture.from_npz(Path(__file__).parents[1] / "demo_data"
                                    / "fast_gap_16x128_2khz.npz")
    res = stitch(cap.frames, frame_rate_hz=cap.frame_rate_hz, timestamps_s=cap.times_s)
    assert res.report.verdict == "unusable"
    assert [e for e in res.events_of("gap") if e.details["reason"] == "too_fast"]
    assert not [e for e in res.events_of("low_confidence") if e.details.get("cause")]
    d = evaluate.evaluate(res, cap, image=False, distortion=False).to_dict()
    assert d["along_rms_px"] < 3.0


def test_fast_mode_takes_a_stall_out_of_the_fixed_pattern(monkeypatch):
    # A simulated 8x192 swipe at 4 kHz and 14 dB (the simulator's truth) that stands still
    # for a third of its frames: the contact test finds no blank frames at that SNR, and the
    # frames' change during the stall is too close to the moving frames' for the stall rule of
    # register.prepare, so the stalled stretch of finger stayed in the per-plate means, a
    # static pattern pulling every shift towards zero: fast mode measured -5.6 % of span.
    # Estimated again with the frames weighted by their tracked travel: -0.15 %.
    from stripstitch import evaluate, pipeline, simulate
    finger = simulate.make_finger("whorl", size_mm=(12.0, 10.0), rng=9700)
    cap = simulate.swipe("whorl", finger=finger, rng=10100, n_rows=8, n_cols=192,
                         frame_rate_hz=4000.0, profile="constant", speed_mm_s=121.978,
                         snr_db=13.546, skew_deg=-1.146, rotation_deg=1.496,
                         stalls=((3.0637, 0.049715),))

    def span_pct():
        res = stitch(cap.frames, pitch_um=float(cap.pitch_um), frame_rate_hz=4000.0,
                     timestamps_s=np.asarray(cap.times_s, dtype=np.float64), mode="fast")
        return evaluate.evaluate(res, cap, image=False, distortion=False).to_dict()["span_error_pct"]

    # EFTS Appendix G's 1.5 % (REFERENCE-VALUES.md section 4) is the yardstick; we ask 0.5 %.
    assert abs(span_pct()) < 0.5
    monkeypatch.setattr(pipeline, "_STALLED_REPREPARE_STILL", 2.0)        # the rule off
    assert span_pct() < -3.0



def test_fixed_pattern_refit_adds_no_row_pattern_to_the_gains(monkeypatch):
    # A sensor whose gain and offset mismatch sit in its column amplifiers (5 % and 6 codes
    # per column, the same in every row: a common practice model of column-parallel readout),
    # a photograph bundled with scikit-image (grass) as the finger at a quarter pixel, each
    # plate the mean of 2 x 2 samples and of 3 poses over half a frame period, 20 dB, 8x192
    # at 1.3 px per frame with a stall of 60 frames and no blank frame, so default mode
    # refits the fixed pattern against the fused image. Its per-plate line fit read the rows'
    # mean gains 0.9775-1.012 (a static profile along the swipe that pulls shifts towards
    # zero); every row of this sensor has the same mean gain, and the refit now keeps it.
    import skimage.data
    from scipy import ndimage
    from stripstitch import pipeline

    rng = np.random.default_rng(1)
    img = skimage.data.grass().astype(np.float64)
    tex = ndimage.zoom((img - img.min()) / np.ptp(img), 2.0, order=1)   # 4 samples per px
    t_n, r_n, c_n, v = 230, 8, 192, 1.3
    t = np.arange(t_n)
    vel = v * (1 - np.clip(np.minimum(t - 80, 140 - t) / 10.0, 0, 1))  # stands still 80-140
    y = np.concatenate([[0.0], np.cumsum(vel[1:])])
    x = 0.01 * t
    rr, cc = np.meshgrid(np.arange(r_n), np.arange(c_n), indexing="ij")
    dy = np.gradient(y)
    frames = np.zeros((t_n, r_n, c_n))
    for k in range(t_n):
        for e in (-1 / 6, 0.0, 1 / 6):
            for a in (-0.25, 0.25):
                for b in (-0.25, 0.25):
                    frames[k] += ndimage.map_coordinates(
                        tex, [(20 + y[k] + e * dy[k] + rr + a) * 4, (20 + x[k] + cc + b) * 4],
                        order=1) / 12.0
    gain = 1 + 0.05 * rng.normal(size=c_n)
    codes = (40 + 150 * (frames * gain + rng.normal(size=frames.shape) * frames.std() / 10.0)
             + 6 * rng.normal(size=c_n))
    frames = np.clip(np.round(codes), 0, 255).astype(np.uint8)
    seen = []
    refit = pipeline._refit_fixed_pattern
    monkeypatch.setattr(pipeline, "_refit_fixed_pattern",
                        lambda *a, **k: seen.append(refit(*a, **k)) or seen[-1])
    res = stitch(frames, frame_rate_hz=4000.0)
    assert seen and seen[0] is not None
    g = seen[0].gain
    rows = g.mean(axis=1) / g.mean()
    assert np.abs(rows - 1).max() < 0.005
    # and the swipe comes out whole (measured span error -0.05 %, as before)
    span = (res.positions[-1, 0] - res.positions[0, 0]) / (y[-1] - y[0]) - 1
    assert abs(span) < 0.005

def _concentric_ridges(skew_deg, n_frames=400, n_rows=8, n_cols=192, step_px=0.44, seed=0):
    """8-bit frames of circular ridges (9 px period, cosine) around a core the strip passes
    over, each plate the mean of 4 x 4 point samples over its square, Gaussian noise (3 % of
    the ridge amplitude), the finger sliding along and tan(skew) times as much across."""
    t = np.arange(n_frames, dtype=np.float64)
    pos = np.stack([step_px * t, step_px * np.tan(np.radians(skew_deg)) * t], axis=1)
    rr, cc = np.mgrid[0:n_rows, 0:n_cols].astype(np.float64)
    z = 0.0
    for a in (-0.375, -0.125, 0.125, 0.375):
        for b in (-0.375, -0.125, 0.125, 0.375):
            y = pos[:, 0, None, None] + rr[None] + a
            x = pos[:, 1, None, None] + cc[None] + b
            z = z + np.cos(2 * np.pi * np.hypot(y - 300.0, x - 90.0) / 9.0) / 16.0
    z = z + 0.03 * np.random.default_rng(seed).standard_normal(z.shape)
    return np.clip(np.round(100.0 + 60.0 * z), 0, 255).astype(np.uint8), pos


def _across_rms(res, pos):
    e = res.positions[:, 1] - pos[:, 1]
    return float(np.sqrt(np.mean((e - e[0]) ** 2)))


def test_fast_mode_keeps_regular_ridges_straight_on_a_slanted_8_row_strip():
    # Truth: the generator's placement. Measured: 0.045 px across RMS, no turn.
    frames, pos = _concentric_ridges(3.0)
    res = stitch(frames, frame_rate_hz=4000.0, mode="fast")
    assert _across_rms(res, pos) < 0.2
    assert np.ptp(res.angles) == 0.0


@pytest.mark.xfail(strict=True, reason=(
    "known failure, open: regular circular ridges on a slanted 8-row strip read a false "
    "shear and a false turn (0.7 degrees kept) in the model passes; default mode comes out "
    "1.55 px across RMS where the tracker alone (fast mode) is within 0.05 px; see "
    "DEVELOPERS.md, 'Slanted narrow strips'"))
def test_default_mode_keeps_regular_ridges_straight_on_a_slanted_8_row_strip():
    frames, pos = _concentric_ridges(3.0)
    res = stitch(frames, frame_rate_hz=4000.0)
    assert _across_rms(res, pos) < 0.2
