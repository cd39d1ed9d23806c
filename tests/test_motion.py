"""Tests of the swipe motion model (stripstitch.simulate.motion).

Outside references: elementary kinematics (distance = speed x time, common practice), the
library's position/angle convention (DEVELOPERS.md, "Conventions"), numpy/scipy as reference
implementations (np.gradient, scipy.signal.periodogram, np.arctan2), and the unsourced swipe-speed
modelling assumption of REFERENCE-VALUES.md section 7 (2-30 cm/s, nominal 10 cm/s).
"""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal

from stripstitch import Event
from stripstitch._types import EVENT_KINDS
from stripstitch.simulate.motion import PROFILES, Motion, make_motion

PITCH = 50.8


def steps_px(m):
    return np.diff(m.positions_px(), axis=0)


def test_constant_speed_and_duration():
    # Kinematics (common practice): travel per frame = speed / frame rate; duration = length / speed.
    m = make_motion(frame_rate_hz=4000.0, speed_mm_s=100.0, length_mm=15.0, rng=0)
    np.testing.assert_allclose(steps_px(m)[:, 0], 100.0e3 / 4000.0 / PITCH, rtol=1e-9)
    np.testing.assert_allclose(steps_px(m)[:, 1], 0.0, atol=1e-9)
    assert m.duration_s == pytest.approx(15.0 / 100.0, rel=1e-12)
    assert m.n_frames == math.floor(0.15 * 4000) + 1
    np.testing.assert_allclose(np.diff(m.times_s), 1 / 4000.0, rtol=1e-9)
    assert m.exposure_s == pytest.approx(0.5 / 4000.0)      # documented default: half a period
    assert m.times_s.dtype == np.float64 and m.frame_index.dtype == np.int64


@pytest.mark.parametrize("speed_mm_s", [20.0, 100.0, 300.0])
def test_requested_speed_within_the_assumed_range(speed_mm_s):
    # REFERENCE-VALUES.md section 7 (unsourced modelling assumption): 2-30 cm/s swipes.
    m = make_motion(speed_mm_s=speed_mm_s, length_mm=5.0, frame_rate_hz=2000.0)
    measured = m.positions_px()[-1, 0] * PITCH / 1e3 / (m.times_s[-1] - m.times_s[0])
    assert measured == pytest.approx(speed_mm_s, rel=0.02)   # last frame falls within one period of the end


def test_accel_decel_bell():
    # Documented bell: v = mean (1 - 0.8 cos(2 pi t / D)); check mean, peak and ends with
    # numpy's central differences (np.gradient) on a dense evaluation of the path.
    m = make_motion("accel_decel", speed_mm_s=100.0, length_mm=10.0, frame_rate_hz=4000.0)
    assert m.duration_s == pytest.approx(0.1, rel=1e-6)      # mean speed as requested (midpoint-rule time)
    t = np.linspace(0.0, m.duration_s, 2001)
    v = np.gradient(m.travel_um(t), t) / 1e3                  # mm/s
    assert v[1000] == pytest.approx(180.0, rel=1e-3)
    assert v[2] == pytest.approx(20.0, rel=2e-2)
    assert np.all(v > 0)
    assert np.argmax(v) == pytest.approx(1000, abs=5)


def test_human_profile_is_jerky_but_forward():
    m = make_motion("human", speed_mm_s=100.0, length_mm=16.0, rng=3)
    t = np.linspace(0.0, m.duration_s, 4001)
    v = np.gradient(m.travel_um(t), t) / 1e3
    assert v.min() >= 0.3 * 100.0 * (1 - 1e-6)               # documented floor
    assert 0.1 < np.std(v) / np.mean(v) < 0.4                 # documented relative rms 0.2
    assert m.duration_s == pytest.approx(0.16, rel=0.3)
    assert m.tremor_um == 10.0 and 8.0 <= m.tremor_hz <= 12.0


def test_tremor_frequency_and_amplitude():
    # scipy.signal.periodogram as the reference spectrum estimator: the across-swipe tremor
    # (half the along amplitude) must peak at the drawn 8-12 Hz frequency with amplitude A/2.
    m = make_motion(speed_mm_s=100.0, length_mm=200.0, frame_rate_hz=500.0, tremor_um=20.0, rng=5)
    across = m.centre_um[:, 1] - m.centre_um[:, 1].mean()
    f, pxx = signal.periodogram(across, fs=500.0, window="hann", scaling="spectrum")
    assert f[np.argmax(pxx)] == pytest.approx(m.tremor_hz, abs=0.6)
    assert 8.0 <= f[np.argmax(pxx)] <= 12.5
    assert np.sqrt(2 * pxx.max()) == pytest.approx(10.0, rel=0.15)   # peak rms -> amplitude


def test_stall_frames_do_not_move():
    m = make_motion(speed_mm_s=100.0, length_mm=6.0, stalls=[(3.0, 0.05)], frame_rate_hz=4000.0)
    (stall,) = [e for e in m.events_for(8, PITCH) if e.kind == "stall"]
    assert isinstance(stall, Event)
    pos = m.positions_px()
    seg = pos[stall.first_frame:stall.last_frame + 1]
    np.testing.assert_allclose(np.diff(seg, axis=0), 0.0, atol=1e-9)     # zero to rounding
    assert (stall.last_frame - stall.first_frame) / 4000.0 == pytest.approx(0.05, abs=1.5 / 4000.0)
    assert pos[stall.first_frame, 0] * PITCH == pytest.approx(3000.0, abs=26.0)   # one frame of travel
    assert m.duration_s == pytest.approx(0.06 + 0.05, rel=1e-9)
    assert stall.details["duration_s"] == 0.05
    assert np.all(np.diff(pos[:stall.first_frame, 0]) > 0)


def test_backtrack_reverses_then_continues():
    m = make_motion(speed_mm_s=100.0, length_mm=6.0, backtracks=[(3.0, 0.5)], frame_rate_hz=4000.0)
    (bt,) = [e for e in m.events if e.kind == "backtrack"]
    along = m.positions_px()[:, 0]
    d = np.diff(along)
    assert np.all(d[bt.first_frame:bt.last_frame] < 0)           # reverses over the event
    assert np.all(d[:bt.first_frame - 1] > 0)
    reverse_px = along[bt.first_frame] - along[bt.first_frame:].min()
    assert reverse_px == pytest.approx(500.0 / PITCH, abs=0.05)  # frames sample the turn point
    assert along[-1] * PITCH == pytest.approx(6000.0, abs=26.0)  # then on to the end
    assert bt.details["distance_px"] == pytest.approx(500.0 / PITCH)


@pytest.mark.parametrize("skew_deg", [-12.0, 3.0, 25.0])
def test_skew_angle_is_atan_lateral_over_along(skew_deg):
    m = make_motion(speed_mm_s=100.0, length_mm=4.0, skew_deg=skew_deg)
    pos = m.positions_px()[1:]
    np.testing.assert_allclose(np.degrees(np.arctan2(pos[:, 1], pos[:, 0])), skew_deg, atol=1e-9)
    assert [e.details["skew_deg"] for e in m.events if e.kind == "skew"] == [skew_deg]


def test_rotation_accumulates_smoothly():
    m = make_motion(speed_mm_s=100.0, length_mm=4.0, rotation_deg=6.0, frame_rate_hz=2000.0)
    ang = m.angles_deg()
    assert ang[0] == 0.0
    assert m.at(m.duration_s)[1][0] == pytest.approx(6.0, rel=1e-12)
    assert ang[-1] == pytest.approx(6.0, abs=1e-3)
    assert np.all(np.diff(ang) >= 0)
    # Raised-cosine ramp total (1 - cos(pi t/D))/2 over n steps: largest first difference
    # pi/2 total/n, largest second difference total/2 (pi/n)^2 (calculus, common practice).
    n = m.duration_s * 2000.0
    assert np.abs(np.diff(ang)).max() <= np.pi / 2 * 6.0 / n * 1.01
    assert np.abs(np.diff(ang, 2)).max() <= 3.0 * (np.pi / n) ** 2 * 1.01
    assert [e.kind for e in m.events] == ["rotation"]


def test_positions_follow_the_rotated_frame_zero_axes():
    # DEVELOPERS.md convention: positions[t] = Rot(-a0) (centre_t - centre_0) / pitch.
    m = make_motion(speed_mm_s=100.0, length_mm=2.0, rotation_deg=8.0, skew_deg=10.0)
    m2 = Motion(**{**{f: getattr(m, f) for f in m.__dataclass_fields__},
                   "angle_deg": m.angle_deg + 30.0})
    a0 = math.radians(30.0)
    rot_minus = np.array([[math.cos(a0), math.sin(a0)], [-math.sin(a0), math.cos(a0)]])
    expect = (m.centre_um - m.centre_um[0]) @ rot_minus.T / PITCH
    np.testing.assert_allclose(m2.positions_px(), expect, atol=1e-12)
    np.testing.assert_allclose(m2.angles_deg(), m.angles_deg(), atol=1e-12)


def test_too_fast_segment_makes_gap_events():
    n_rows = 8
    m = make_motion(speed_mm_s=100.0, length_mm=10.0, too_fast=[(4.0, 2.0)], n_rows=n_rows,
                    frame_rate_hz=4000.0)
    step = steps_px(m)[:, 0]
    gaps = [e for e in m.events if e.kind == "gap"]
    assert len(gaps) == 1
    g = gaps[0]
    inside = step[g.first_frame:g.last_frame]                  # steps into frames first+1..last
    assert np.all(inside >= n_rows)
    assert inside.max() == pytest.approx(1.5 * n_rows, rel=1e-9)   # documented default speed
    assert np.all(np.delete(step, np.arange(g.first_frame, g.last_frame)) < n_rows)
    assert g.details["missing_rows"] == pytest.approx(np.sum(inside - n_rows), rel=1e-9)
    # Judged for another geometry, the same motion has no gap.
    assert not m.gap_events(16, PITCH)


def test_explicit_too_fast_speed():
    m = make_motion(speed_mm_s=100.0, length_mm=10.0, too_fast=[(4.0, 3.0, 2000.0)], frame_rate_hz=4000.0)
    step = steps_px(m)[:, 0]
    assert step.max() == pytest.approx(2000.0e3 / 4000.0 / PITCH, rel=1e-9)
    assert m.duration_s == pytest.approx(7.0 / 100.0 + 3.0 / 2000.0, rel=1e-9)


def test_dropped_frames_skip_timestamps():
    full = make_motion(speed_mm_s=100.0, length_mm=3.0, frame_rate_hz=1000.0)
    m = make_motion(speed_mm_s=100.0, length_mm=3.0, frame_rate_hz=1000.0, drop_frames=[5, 6, 20])
    assert m.n_frames == full.n_frames - 3
    np.testing.assert_array_equal(m.frame_index, np.delete(np.arange(full.n_frames), [5, 6, 20]))
    dt = np.diff(m.times_s) * 1000.0
    np.testing.assert_allclose(dt[[4, 17]], [3.0, 2.0], rtol=1e-9)
    np.testing.assert_allclose(np.delete(dt, [4, 17]), 1.0, rtol=1e-9)
    np.testing.assert_allclose(m.centre_um, np.delete(full.centre_um, [5, 6, 20], axis=0))
    gaps = [e for e in m.events if e.kind == "gap"]
    assert [(g.first_frame, g.last_frame, g.details["dropped_frames"]) for g in gaps] == [(4, 5, 2), (17, 18, 1)]


def test_stretch_is_smooth_and_bounded():
    m = make_motion(speed_mm_s=100.0, length_mm=8.0, stretch_um=20.0, rng=2)
    ii, jj = np.meshgrid(np.linspace(0, 20000, 81), np.linspace(0, 14000, 57), indexing="ij")
    pts = np.stack([ii, jj], -1)
    u_end = m.stretch_displacement_um(pts, m.duration_s)
    assert np.abs(u_end).max() <= 20.0 + 1e-9
    assert np.abs(u_end).max() > 2.0
    np.testing.assert_array_equal(m.stretch_displacement_um(pts, 0.0), 0.0)   # builds up from 0
    # Smooth: neighbouring points 250 um apart differ by a small fraction of the amplitude.
    assert np.abs(np.diff(u_end, axis=0)).max() < 0.5 * 20.0
    off = make_motion(speed_mm_s=100.0, length_mm=8.0)
    np.testing.assert_array_equal(off.stretch_displacement_um(pts, 0.05), 0.0)


@pytest.mark.parametrize("kwargs, exc, match", [
    ({"profile": "zigzag"}, ValueError, "profile must be one of"),
    ({"frame_rate_hz": 0}, ValueError, "frame_rate_hz must be a finite number > 0"),
    ({"speed_mm_s": "fast"}, TypeError, "speed_mm_s must be a real number"),
    ({"skew_deg": 75.0}, ValueError, r"skew_deg must be in \[-60.0, 60.0\]"),
    ({"stalls": [(30.0, 0.1)]}, ValueError, r"stalls\[0\] must have 0 <= position_mm <= length_mm"),
    ({"stalls": [(3.0,)]}, ValueError, r"stalls\[0\] must be a tuple \(position_mm, duration_s\)"),
    ({"backtracks": 3}, TypeError, "backtracks must be a sequence of tuples"),
    ({"too_fast": [(1.0, -1.0)]}, ValueError, r"too_fast\[0\] must have"),
    ({"drop_frames": [0]}, ValueError, r"drop_frames must hold frame counters in \[1, "),
    ({"exposure_s": 0.01}, ValueError, "exposure_s must be at most one frame period"),
    ({"start_um": (1.0, 2.0, 3.0)}, ValueError, "start_um must be a finite"),
])
def test_bad_arguments(kwargs, exc, match):
    with pytest.raises(exc, match=match):
        make_motion(**kwargs)


@settings(max_examples=40, deadline=None)
@given(profile=st.sampled_from(PROFILES), speed=st.floats(20.0, 300.0), length=st.floats(1.0, 8.0),
       fr=st.sampled_from([1000.0, 2000.0, 4000.0]), skew=st.floats(-20.0, 20.0),
       rotation=st.floats(-8.0, 8.0), stall=st.floats(0.0, 1.0), back=st.floats(0.0, 1.0),
       fast=st.one_of(st.none(), st.floats(0.0, 0.9)), seed=st.integers(0, 2 ** 32 - 1))
def test_motion_properties(profile, speed, length, fr, skew, rotation, stall, back, fast, seed):
    # A too-fast segment (default 12 rows per frame for 8 rows) of 1.5 mm spans at least two
    # frame steps, so it must show as a gap; it is placed after the stall and the backtrack.
    kw = dict(frame_rate_hz=fr, speed_mm_s=speed, length_mm=length + (0 if fast is None else 2.0),
              skew_deg=skew, rotation_deg=rotation, stalls=[(stall * length, 0.01)],
              backtracks=[(back * length, 0.2)],
              too_fast=[] if fast is None else [(length + 0.5 * fast, 1.5)], rng=seed)
    m = make_motion(profile, **kw)
    t = m.n_frames
    assert t >= 2
    assert m.times_s.shape == (t,) and m.centre_um.shape == (t, 2) and m.angle_deg.shape == (t,)
    assert m.times_s.dtype == m.centre_um.dtype == m.angle_deg.dtype == np.float64
    assert np.all(np.diff(m.times_s) > 0)
    pos = m.positions_px()
    np.testing.assert_array_equal(pos[0], 0.0)
    assert not m.centre_um.flags.writeable
    # Continuity: outside too-fast segments (steps within a gap event or next to one), per-frame steps are bounded by the fastest documented profile speed (1.8x mean)
    # plus the tremor speed 2 pi f A. Steps inside gap events reach n_rows (8) or more.
    bound = (1.8 * speed * 1e3 + 2 * np.pi * 12.0 * m.tremor_um) / fr / PITCH
    step = np.abs(np.diff(pos, axis=0)).max(1)
    near_gap = np.zeros(t - 1, bool)
    for e in m.events:
        assert e.kind in EVENT_KINDS and 0 <= e.first_frame <= e.last_frame < t
        if e.kind == "gap":
            near_gap[max(0, e.first_frame - 1):e.last_frame + 2] = True
            assert np.all(np.abs(np.diff(pos[e.first_frame:e.last_frame + 1, 0])) >= 8)
    assert np.all(step[~near_gap] <= bound * (1 + 1e-9))
    # Every step of n_rows or more is flagged (fast profiles at 1 kHz can gap without a
    # too-fast segment: 1.8 x 300 mm/s is 10.6 rows per frame), and a too-fast segment always is.
    big = np.flatnonzero(np.abs(np.diff(pos[:, 0])) >= 8)
    assert np.all(near_gap[big])
    if fast is not None:
        assert near_gap.any()
    # Determinism by seed.
    again = make_motion(profile, **kw)
    np.testing.assert_array_equal(again.centre_um, m.centre_um)
    np.testing.assert_array_equal(again.angle_deg, m.angle_deg)
    # at() agrees with the stored samples.
    c, a = m.at(m.times_s)
    np.testing.assert_allclose(c, m.centre_um, rtol=0, atol=1e-9)
    np.testing.assert_allclose(a, m.angle_deg, rtol=0, atol=1e-12)


def test_human_motion_depends_on_seed():
    a = make_motion("human", length_mm=4.0, rng=1)
    b = make_motion("human", length_mm=4.0, rng=2)
    assert not np.array_equal(a.knot_travel_um, b.knot_travel_um)


def test_velocity_matches_numerical_derivative():
    # numpy.gradient (central differences) of the evaluated path as the reference derivative.
    m = make_motion("human", speed_mm_s=100.0, length_mm=5.0, skew_deg=7.0, rng=8)
    t = np.linspace(0.005, m.duration_s - 0.005, 3001)
    c, _ = m.at(t)
    num = np.gradient(c, t, axis=0)
    np.testing.assert_allclose(m.velocity_um_s(t)[1:-1], num[1:-1], rtol=0, atol=0.01 * 100e3)
    const = make_motion(speed_mm_s=80.0, length_mm=2.0, skew_deg=30.0)
    np.testing.assert_allclose(const.velocity_um_s([0.001, 0.02]),
                               [[80e3 * math.cos(math.radians(30)), 80e3 * math.sin(math.radians(30))]] * 2)


def test_events_at_the_very_end_of_the_length_are_accepted():
    # Found by hypothesis: the length, turned into micrometres and back, rounded just below a
    # stall placed exactly at its end (4.350068137093426 mm) and the valid input was refused.
    length = 4.350068137093426
    m = make_motion("constant", length_mm=length, stalls=[(length, 0.01)],
                    backtracks=[(length, 0.2)], rng=1)
    assert m.n_frames >= 2
