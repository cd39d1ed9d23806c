"""Tests of the capture simulator (stripstitch.simulate.capture and simulate.swipe).

Outside references named beside each check: the library's position/angle convention
(DEVELOPERS.md "Conventions"), scipy.ndimage.shift / map_coordinates as reference resamplers,
REFERENCE-VALUES.md worked example 1 (parallel-plate capacitance), the SNR definition in decibels
(20 log10 of an amplitude ratio, common practice), uniform quantisation noise LSB^2/12 (Widrow,
common practice), and the sha256 digest (hashlib) for byte-for-byte files.
"""

import dataclasses
import functools
import hashlib
import math
import subprocess
import sys
from types import SimpleNamespace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import ndimage

from stripstitch import simulate
from stripstitch.simulate import Capture, Layer, Sensor, capture, make_finger, make_motion, swipe
from stripstitch.simulate.capture import FAR_GAP_UM, plate_integral_map

SPACING = 12.7          # finger grid: 4 cells per 50.8 um pitch
PITCH = 50.8


def flat_finger(gap_um, shape=(300, 300)):
    gap = np.broadcast_to(np.asarray(gap_um, dtype=float), shape).copy()
    return SimpleNamespace(air_gap_um=gap, fluid_um=np.zeros(shape), contact=np.ones(shape),
                           spacing_um=SPACING)


def pattern_finger(shape=(500, 300), period_um=480.0):
    """Known non-separable periodic pattern (ridges slanted 30 degrees) for shift tests."""
    i, j = np.meshgrid(np.arange(shape[0]) * SPACING, np.arange(shape[1]) * SPACING, indexing="ij")
    phase = 2 * np.pi * (i * math.cos(math.radians(30)) + j * math.sin(math.radians(30))) / period_um
    gap = 30.0 + 25.0 * np.cos(phase) + 5.0 * np.cos(2 * np.pi * j / 900.0)   # >= 0
    return SimpleNamespace(air_gap_um=gap, fluid_um=np.zeros(shape), contact=np.ones(shape), spacing_um=SPACING)


@functools.lru_cache(maxsize=None)
def small_finger(seed=1):
    return make_finger("right_loop", size_mm=(10.0, 8.0), rng=seed)


def quiet_sensor(**kw):
    """A sensor without fixed pattern; noise left to the caller."""
    base = dict(n_rows=8, n_cols=32, gain_mismatch=0.0, offset_mismatch_v=0.0, replica_mismatch=0.0)
    base.update(kw)
    return Sensor(**base)


def farads(sensor, codes):
    """Invert ideal codes = to_codes(output_v(C)) back to capacitance (the front end is linear)."""
    lo, _ = sensor.adc_range_v
    volts = np.asarray(codes) * sensor.lsb_v + lo
    return (volts - sensor.amp_offset_v) * sensor.feedback_F / sensor.drive_v


# ----------------------------------------------------------------------------- convention
@pytest.mark.parametrize("d, e", [(2, 0), (3, 1), (3, -2)])
def test_integer_shifts_follow_the_convention(d, e):
    # DEVELOPERS.md: if frames[t+1][r, c] = frames[t][r + d, c + e] then positions[t+1] -
    # positions[t] = (d, e). Whole-pixel steps per frame must reproduce the frames exactly.
    fr = 1000.0
    skew = math.degrees(math.atan2(e, d))
    speed = math.hypot(d, e) * PITCH * fr / 1e3
    m = make_motion(frame_rate_hz=fr, speed_mm_s=speed, length_mm=speed * 12 / fr, skew_deg=skew,
                    start_um=(1500.0, 1900.0))
    cap = capture(pattern_finger(), quiet_sensor(), m, rng=0)
    ideal = cap.ideal_frames
    r, c = ideal.shape[1:]
    for t in range(cap.n_frames - 1):
        a = ideal[t + 1][max(0, -d):r - max(0, d), max(0, -e):c - max(0, e)]
        b = ideal[t][max(0, d):r + min(0, d) or None, max(0, e):c + min(0, e) or None]
        np.testing.assert_allclose(a, b, rtol=1e-9)
    np.testing.assert_allclose(np.diff(cap.positions, axis=0), [[d, e]] * (cap.n_frames - 1), atol=1e-9)
    np.testing.assert_array_equal(cap.positions[0], 0.0)
    # The true image holds the same values at origin + (r, c) + positions[t] (exposure averages
    # over sub-steps, so compare an exposure-free capture).
    m0 = dataclasses.replace(m, exposure_s=0.0)
    cap0 = capture(pattern_finger(), quiet_sensor(), m0, rng=0)
    o = cap0.true_origin_px.astype(int)
    for t in (0, 5, cap0.n_frames - 1):
        p = np.rint(cap0.positions[t]).astype(int)
        np.testing.assert_allclose(cap0.true_image[o[0] + p[0]:o[0] + p[0] + r, o[1] + p[1]:o[1] + p[1] + c],
                                   cap0.ideal_frames[t], rtol=1e-9)


def test_subpixel_shift_matches_scipy_shift():
    # Reference: scipy.ndimage.shift (order 1) of the plate-integrated master map by the true
    # fractional displacement, sampled every 4th cell (the pitch), equals the frames. Both are
    # bilinear on the same grid, so they agree to rounding; interior pixels only (the shifted
    # master's border uses scipy's own boundary rule).
    finger = small_finger()
    sensor = quiet_sensor(n_cols=48)
    fr = 2000.0
    step_um = 0.3 * PITCH                                  # 0.3 px = 1.2 fine cells per frame
    # Frame 0's plates on whole cells: centre offset (R-1)/2 * pitch = 14 cells, (C-1)/2 = 94 cells.
    start = (200 * SPACING, 300 * SPACING)
    m = make_motion(frame_rate_hz=fr, speed_mm_s=step_um * fr / 1e3, length_mm=step_um * 9 / 1e3,
                    start_um=start, exposure_s=0.0)
    cap = capture(finger, sensor, m, rng=0)
    master = plate_integral_map(finger, sensor)
    i0, j0 = 200 - 14, 300 - 94                           # cell of plate (0, 0) in frame 0
    for t in range(1, cap.n_frames):
        shift_cells = cap.positions[t] * PITCH / SPACING
        moved = ndimage.shift(master, -shift_cells, order=1, mode="nearest")
        expect = moved[i0:i0 + 4 * sensor.n_rows:4, j0:j0 + 4 * sensor.n_cols:4]
        np.testing.assert_allclose(farads(sensor, cap.ideal_frames[t]), expect, rtol=1e-9)
        assert cap.positions[t, 0] == pytest.approx(0.3 * t, rel=1e-9)


def test_rotation_follows_the_convention():
    # DEVELOPERS.md: plate (r, c) of frame t sees c_f + positions[t] + Rot(angles[t]) u of frame
    # 0's pixel grid. Rebuild each frame from the master map with scipy.ndimage.map_coordinates
    # using only the published truth (positions, angles, frame 0's pose) and compare.
    finger = small_finger()
    sensor = quiet_sensor(n_cols=40)
    m = make_motion(frame_rate_hz=2000.0, speed_mm_s=60.0, length_mm=0.6, rotation_deg=7.0, skew_deg=4.0,
                    start_um=(3000.0, 4000.0), exposure_s=0.0)
    cap = capture(finger, sensor, m, rng=0)
    master = plate_integral_map(finger, sensor)
    r, c = sensor.n_rows, sensor.n_cols
    cf = np.array([(r - 1) / 2, (c - 1) / 2])
    rr, cc = np.meshgrid(np.arange(r), np.arange(c), indexing="ij")
    u = np.stack([rr - cf[0], cc - cf[1]], -1).reshape(-1, 2)
    a0 = math.radians(m.angle_deg[0])
    rot0 = np.array([[math.cos(a0), -math.sin(a0)], [math.sin(a0), math.cos(a0)]])
    for t in (0, 6, cap.n_frames - 1):
        th = math.radians(cap.angles[t])
        rot = np.array([[math.cos(th), -math.sin(th)], [math.sin(th), math.cos(th)]])
        frame0_px = cf + cap.positions[t] + u @ rot.T           # points of frame 0's grid
        finger_um = m.centre_um[0] + (frame0_px - cf) @ rot0.T * PITCH
        expect = ndimage.map_coordinates(master, (finger_um / SPACING).T, order=1).reshape(r, c)
        np.testing.assert_allclose(farads(sensor, cap.ideal_frames[t]), expect, rtol=1e-9)
    assert cap.angles[-1] == pytest.approx(7.0, abs=0.05)
    assert [e.kind for e in cap.events] == ["rotation", "skew"]


# ----------------------------------------------------------------------------- physics
def test_uniform_gap_gives_parallel_plate_capacitance():
    # REFERENCE-VALUES.md, worked example 1: 50 x 50 um plate under 2 um SiO2 (eps_r 3.9):
    # 43.164 fF in contact; with 50 um of air (eps_r 1): 0.4382 fF. Five significant digits
    # in the table: rtol 2e-5 (half a unit in the last digit is 1.2e-5 for 43.164).
    sensor = quiet_sensor(plate_um=50.0, layers=(Layer(2.0, 3.9, "silicon dioxide"),), eps_r_air=1.0)
    for gap, c_ref in ((0.0, 43.164e-15), (50.0, 0.4382e-15)):
        m = make_motion(frame_rate_hz=1000.0, speed_mm_s=20.0, length_mm=0.1, start_um=(1900.0, 1900.0))
        cap = capture(flat_finger(gap), sensor, m, rng=0)
        np.testing.assert_allclose(farads(sensor, cap.ideal_frames), c_ref, rtol=2e-5 if gap == 0 else 1.2e-4)


def test_half_covered_plate_gives_half():
    # Parallel capacitors add (common practice): a plate half over skin in contact and half
    # over a far gap sees the mean of the two parallel-plate capacitances (blur off, so the
    # step stays sharp).
    sensor = quiet_sensor(lateral_blur=False, n_rows=2)
    k = 150                                                 # first cell of the far half
    gap = np.zeros((300, 300))
    gap[k:] = 1000.0
    f = SimpleNamespace(air_gap_um=gap, fluid_um=np.zeros_like(gap), contact=np.ones_like(gap), spacing_um=SPACING)
    edge_um = (k - 0.5) * SPACING
    m = make_motion(frame_rate_hz=1000.0, speed_mm_s=1.0, length_mm=0.001, exposure_s=0.0,
                    start_um=(edge_um + 0.5 * PITCH, 1900.0))     # plate row 0 centred on the edge
    cap = capture(f, sensor, m, rng=0)
    half = 0.5 * (sensor.plate_capacitance_F(0.0) + sensor.plate_capacitance_F(1000.0))
    np.testing.assert_allclose(farads(sensor, cap.ideal_frames[0, 0]), half, rtol=1e-12)
    np.testing.assert_allclose(farads(sensor, cap.ideal_frames[0, 1]), sensor.plate_capacitance_F(1000.0),
                               rtol=1e-12)


def test_plate_integral_matches_scipy_uniform_filter():
    # Reference: scipy.ndimage.uniform_filter (box mean over whole cells). With a plate exactly
    # 5 cells wide (50.8 um plate on a 10.16 um grid) the area integral is the 5 x 5 box mean
    # times the plate area; interior cells only (the filters' borders differ).
    rng = np.random.default_rng(4)
    gap = ndimage.gaussian_filter(rng.uniform(0.0, 60.0, (120, 90)), 2.0)
    f = SimpleNamespace(air_gap_um=gap, fluid_um=0.2 * gap, spacing_um=10.16)
    sensor = Sensor(plate_um=50.8, lateral_blur=False)
    ours = plate_integral_map(f, sensor)
    ref = ndimage.uniform_filter(sensor.capacitance_density_F_m2(gap, 0.2 * gap), size=5) * sensor.plate_area_m2
    np.testing.assert_allclose(ours[5:-5, 5:-5], ref[5:-5, 5:-5], rtol=1e-12)
    # A fractional plate (46 um = 4.53 cells) lies between the 3- and 5-cell box integrals
    # (the density is positive, so a larger box integrates more).
    frac = plate_integral_map(f, dataclasses.replace(sensor, plate_um=46.0))[5:-5, 5:-5]
    box3 = ndimage.uniform_filter(sensor.capacitance_density_F_m2(gap, 0.2 * gap), size=3)[5:-5, 5:-5]
    assert np.all(frac < ours[5:-5, 5:-5] * (1 + 1e-12))
    assert np.all(frac > box3 * (3 * 10.16e-6) ** 2 * (1 - 1e-12))


def test_off_finger_plates_see_the_far_gap():
    sensor = quiet_sensor()
    f = flat_finger(0.0, shape=(100, 100))
    m = make_motion(frame_rate_hz=1000.0, speed_mm_s=20.0, length_mm=0.1, start_um=(-5000.0, 600.0))
    cap = capture(f, sensor, m, rng=0)
    np.testing.assert_allclose(farads(sensor, cap.ideal_frames), sensor.plate_capacitance_F(FAR_GAP_UM), rtol=1e-12)
    assert np.all(cap.contact == 0)
    assert [e.kind for e in cap.events] == ["no_contact"]


def test_snr_is_set_and_realised():
    # SNR in dB = 20 log10(signal std / noise rms) (common practice). The realised noise,
    # measured as frames - ideal on a 14-bit ADC without fixed pattern, must match the set
    # noise combined in quadrature with quantisation noise LSB / sqrt(12) (Widrow; common practice).
    sensor = quiet_sensor(adc_bits=14, n_cols=64)
    finger = small_finger()
    m = make_motion(frame_rate_hz=2000.0, speed_mm_s=100.0, length_mm=3.0, start_um=(4000.0, 4000.0))
    cap = capture(finger, sensor, m, snr_db=25.0, rng=7)
    assert cap.snr_db == pytest.approx(25.0, abs=1e-9)
    assert cap.noise_v_rms == pytest.approx(cap.sensor.noise_v_rms(), rel=1e-12)
    assert cap.frames.dtype == np.uint16
    resid = cap.frames.astype(float) - cap.ideal_frames
    expect = math.sqrt((cap.noise_v_rms / sensor.lsb_v) ** 2 + 1 / 12)
    assert resid.std() == pytest.approx(expect, rel=0.03)
    # The signal behind the SNR: std of ideal volts over in-contact plates.
    with pytest.raises(ValueError, match="snr_db must be at most"):
        capture(finger, sensor, m, snr_db=90.0, rng=7)


def test_exposure_averages_the_motion():
    # A finger moving during the exposure blurs it: the frame equals the mean of instantaneous
    # frames at the sub-step times (documented model: average of capacitances).
    finger = pattern_finger()
    sensor = quiet_sensor()
    m = make_motion(frame_rate_hz=1000.0, speed_mm_s=50.0, length_mm=0.2, start_um=(1500.0, 1900.0),
                    exposure_s=0.001)
    cap = capture(finger, sensor, m, exposure_steps=4, rng=0)
    subs = []
    for k in range(4):
        shift = m.exposure_s * ((k + 0.5) / 4 - 0.5)
        mk = dataclasses.replace(m, times_s=m.times_s + shift, exposure_s=0.0)
        subs.append(capture(finger, sensor, mk, rng=0).ideal_frames)
    np.testing.assert_allclose(cap.ideal_frames, np.mean(subs, axis=0), rtol=1e-12)
    assert not np.allclose(cap.ideal_frames, subs[0], rtol=1e-3)


# ----------------------------------------------------------------------------- real finger
def test_swipe_on_a_real_finger_has_entry_exit_and_truth():
    cap = swipe(n_rows=8, n_cols=64, finger=small_finger(), frame_rate_hz=2000.0, rng=3)
    assert cap.contact[0] == 0 and cap.contact[-1] == 0 and cap.contact.max() == 1.0
    kinds = [e.kind for e in cap.events]
    assert kinds[0] == "no_contact" and kinds[-1] == "no_contact"
    assert cap.snr_db == pytest.approx(30.0, abs=1e-9)
    assert np.isfinite(cap.true_image).all()
    # The true image covers every frame (rigid swipe without rotation: integer origin + positions).
    o = cap.true_origin_px
    assert o[0] + cap.positions[:, 0].max() + 8 <= cap.true_image.shape[0] + 1
    assert o[1] + 64 <= cap.true_image.shape[1]
    # The ideal contrast under contact is large: ridges and valleys differ by tens of codes.
    full = cap.contact == 1
    assert np.ptp(cap.ideal_frames[full]) > 50


def test_capture_is_deterministic_by_seed():
    kw = dict(n_rows=8, n_cols=32, finger=small_finger(), frame_rate_hz=1000.0, length_mm=3.0)
    a, b, c = swipe(rng=11, **kw), swipe(rng=11, **kw), swipe(rng=12, **kw)
    np.testing.assert_array_equal(a.frames, b.frames)
    np.testing.assert_array_equal(a.unit.gain, b.unit.gain)
    assert not np.array_equal(a.frames, c.frames)


def test_stretch_changes_frames_not_truth():
    kw = dict(n_rows=8, n_cols=32, finger=small_finger(), frame_rate_hz=1000.0, length_mm=4.0, snr_db=None)
    rigid = swipe(rng=4, **kw)
    soft = swipe(rng=4, stretch_um=15.0, **kw)
    np.testing.assert_array_equal(rigid.positions, soft.positions)
    assert np.abs(rigid.ideal_frames - soft.ideal_frames).max() > 1.0


def test_gap_events_use_the_sensor_rows():
    # Too fast for 8 rows at 1 kHz: 1.5 x 8 rows per frame (documented default).
    cap = swipe(n_rows=8, n_cols=32, finger=small_finger(), frame_rate_hz=1000.0, too_fast=[(4.0, 2.0)], rng=0)
    gaps = cap.events_of("gap")
    assert len(gaps) == 1
    step = np.diff(cap.positions[:, 0])
    assert np.all(step[gaps[0].first_frame:gaps[0].last_frame] >= 8)


def test_npz_round_trip_and_reproducible_bytes(tmp_path):
    cap = swipe(n_rows=8, n_cols=32, finger=small_finger(), frame_rate_hz=1000.0, length_mm=3.0,
                backtracks=[(1.0, 0.3)], drop_frames=[7], rng=5)
    p1, p2 = tmp_path / "a.npz", tmp_path / "b.npz"
    cap.to_npz(p1)
    cap.to_npz(p2)
    # sha256 of the two files (hashlib): byte-for-byte identical output.
    assert hashlib.sha256(p1.read_bytes()).hexdigest() == hashlib.sha256(p2.read_bytes()).hexdigest()
    with np.load(p1, allow_pickle=False) as data:                 # plain npz, no pickle needed
        np.testing.assert_array_equal(data["frames"], cap.frames)
    back = Capture.from_npz(p1)
    for name in ("frames", "ideal_frames", "positions", "angles", "times_s", "true_image",
                 "true_origin_px", "contact"):
        np.testing.assert_array_equal(getattr(back, name), getattr(cap, name))
    assert back.frames.dtype == cap.frames.dtype
    assert [e.to_dict() for e in back.events] == [e.to_dict() for e in cap.events]
    assert back.sensor == cap.sensor
    np.testing.assert_array_equal(back.unit.gain, cap.unit.gain)
    np.testing.assert_array_equal(back.motion.frame_index, cap.motion.frame_index)
    np.testing.assert_allclose(back.motion.at(0.0013)[0], cap.motion.at(0.0013)[0])
    assert back.finger is None and back.finger_info["pattern"] == "right_loop"
    assert back.snr_db == cap.snr_db and back.frame_rate_hz == 1000.0 and back.pitch_um == PITCH
    cap.to_npz(p2, ideal_frames=False, float_dtype="float32")
    small = Capture.from_npz(p2)
    assert small.ideal_frames is None
    np.testing.assert_allclose(small.true_image, cap.true_image, rtol=1e-6)


def test_npz_reader_rejects_other_files(tmp_path):
    p = tmp_path / "x.npz"
    np.savez(p, frames=np.zeros((2, 2, 2)))
    with pytest.raises(ValueError, match="is not a stripstitch capture archive"):
        Capture.from_npz(p)
    np.savez(p, frames=np.zeros((2, 2, 2)), header=np.array('{"format": "stripstitch-capture", "format_version": 1}'))
    with pytest.raises(ValueError, match="is a damaged stripstitch capture archive"):
        Capture.from_npz(p)
    np.savez(p, frames=np.zeros((2, 2, 2)), header=np.array('{"format": "stripstitch-capture", "format_version": 9}'))
    with pytest.raises(ValueError, match="has format_version 9; this reader understands 1"):
        Capture.from_npz(p)


def test_noiseless_capture_has_infinite_snr_and_round_trips(tmp_path):
    sensor = quiet_sensor(amp_noise_v_rms=0.0, temperature_K=0.0, hold_F=None)
    m = make_motion(frame_rate_hz=1000.0, speed_mm_s=20.0, length_mm=0.1, start_um=(1900.0, 1900.0))
    cap = capture(pattern_finger(), sensor, m, rng=0)
    assert cap.snr_db == math.inf and cap.noise_v_rms == 0.0
    cap.to_npz(tmp_path / "c.npz")
    assert Capture.from_npz(tmp_path / "c.npz").snr_db == math.inf
    with pytest.raises(ValueError, match="snr_db cannot be met"):
        capture(flat_finger(0.0), quiet_sensor(), m, snr_db=20.0, rng=0)


def test_simulator_does_not_import_the_reconstruction():
    # DEVELOPERS.md: the simulator must stay independent of the reconstruction stages, or tests
    # comparing them would pass because both share an assumption. Checked statically on the
    # simulator's own source (the package __init__ imports everything for users).
    import ast
    from pathlib import Path
    import stripstitch.simulate as simpkg
    banned = {"register", "trajectory", "refine", "mosaic", "pipeline", "stream", "report"}
    for path in Path(simpkg.__file__).parent.glob("*.py"):
        tree = ast.parse(path.read_text())
        for node in ast.walk(tree):
            names = []
            if isinstance(node, ast.ImportFrom):
                mod = node.module or ""
                names = [mod] + [f"{mod}.{a.name}" for a in node.names]
                if node.level >= 2 or mod.startswith("stripstitch"):
                    names += [a.name for a in node.names]
            elif isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            parts = {p for n in names for p in n.split(".")}
            assert not (parts & banned), f"{path.name} imports {sorted(parts & banned)}"


@pytest.mark.parametrize("call, exc, match", [
    (lambda: capture(object(), Sensor(), make_motion(length_mm=1.0)), TypeError, "finger must be a Finger"),
    (lambda: capture(flat_finger(0.0), Sensor(), "motion"), TypeError, "motion must be a Motion"),
    (lambda: capture(flat_finger(0.0), Sensor(), make_motion(length_mm=1.0), snr_db="hi"), TypeError,
     "snr_db must be a real number"),
    (lambda: capture(flat_finger(0.0), Sensor(), make_motion(length_mm=1.0), snr_db=float("nan")), ValueError,
     "snr_db must be a finite number"),
    (lambda: capture(flat_finger(0.0), Sensor(), make_motion(length_mm=1.0), exposure_steps=0), ValueError,
     r"exposure_steps must be an integer in \[1, 64\]"),
    (lambda: swipe(sensor="8x192"), TypeError, "sensor must be a Sensor"),
])
def test_bad_arguments(call, exc, match):
    with pytest.raises(exc, match=match):
        call()


@settings(max_examples=15, deadline=None)
@given(rows=st.integers(2, 16), cols=st.integers(8, 48), bits=st.sampled_from([6, 8, 10, 12]),
       speed=st.floats(20.0, 300.0), rotation=st.floats(-5.0, 5.0), snr=st.floats(10.0, 40.0),
       profile=st.sampled_from(simulate.motion.PROFILES), seed=st.integers(0, 2 ** 32 - 1))
def test_simulator_properties(rows, cols, bits, speed, rotation, snr, profile, seed):
    sensor = Sensor(n_rows=rows, n_cols=cols, adc_bits=bits, dead_fraction=0.01, stuck_fraction=0.01)
    kw = dict(finger=small_finger(), sensor=sensor, profile=profile, speed_mm_s=speed, rotation_deg=rotation,
              snr_db=snr, frame_rate_hz=1000.0, length_mm=2.0)
    cap = swipe(rng=seed, **kw)
    t = cap.n_frames
    assert cap.frames.shape == (t, rows, cols) and cap.ideal_frames.shape == (t, rows, cols)
    assert cap.frames.dtype == (np.uint8 if bits <= 8 else np.uint16)
    assert int(cap.frames.max()) <= 2 ** bits - 1                    # ADC clipping respected
    assert cap.positions.shape == (t, 2) and cap.angles.shape == (t,) and cap.contact.shape == (t,)
    assert np.all((cap.contact >= 0) & (cap.contact <= 1))
    assert np.isfinite(cap.true_image).all() and cap.true_image.ndim == 2
    assert not cap.frames.flags.writeable
    # Continuity of the truth: no too-fast segment, bounded steps (1.8x mean speed + tremor).
    bound = (1.8 * speed * 1e3 + 2 * np.pi * 12.0 * cap.motion.tremor_um) / 1000.0 / PITCH
    assert np.abs(np.diff(cap.positions, axis=0)).max() <= bound * (1 + 1e-9)
    assert cap.snr_db == pytest.approx(snr, abs=1e-9)
    again = swipe(rng=seed, **kw)
    np.testing.assert_array_equal(again.frames, cap.frames)


def test_true_image_covers_every_plate_of_every_frame():
    # DEVELOPERS.md convention: plate (r, c) of frame t sits at c_f + positions[t] + Rot(angles[t]) u
    # of frame 0's grid; with the origin, every such point must fall inside the true image.
    cap = swipe(n_rows=8, n_cols=40, finger=small_finger(), frame_rate_hz=1000.0, length_mm=4.0,
                rotation_deg=-6.0, skew_deg=-8.0, backtracks=[(2.0, 0.4)], rng=9)
    r, c = cap.frames.shape[1:]
    cf = np.array([(r - 1) / 2, (c - 1) / 2])
    rr, cc = np.meshgrid(np.arange(r), np.arange(c), indexing="ij")
    u = np.stack([rr - cf[0], cc - cf[1]], -1).reshape(-1, 2)
    th = np.radians(cap.angles)[:, None]
    along = cf[0] + cap.positions[:, :1] + np.cos(th) * u[:, 0] - np.sin(th) * u[:, 1]
    across = cf[1] + cap.positions[:, 1:] + np.sin(th) * u[:, 0] + np.cos(th) * u[:, 1]
    h, w = cap.true_image.shape
    assert (along + cap.true_origin_px[0]).min() >= 0 and (along + cap.true_origin_px[0]).max() <= h - 1
    assert (across + cap.true_origin_px[1]).min() >= 0 and (across + cap.true_origin_px[1]).max() <= w - 1
    np.testing.assert_array_equal(cap.true_origin_px, np.round(cap.true_origin_px))


def test_truth_agrees_with_scikit_image_phase_correlation():
    # Outside reference for the sign convention: skimage.registration.phase_cross_correlation
    # (Guizar-Sicairos et al., Opt. Lett. 33(2):156, 2008) returns the shift that registers the
    # moving image (frame t+1) onto the reference (frame t): shifting frame t+1 by s gives
    # frame t, i.e. frames[t+1][r] ~ frames[t][r + s], so s must equal the truth step.
    from skimage.registration import phase_cross_correlation

    sensor = quiet_sensor(n_rows=16, n_cols=96)
    cap = swipe(sensor=sensor, finger=small_finger(), frame_rate_hz=1000.0, speed_mm_s=127.0, skew_deg=5.0,
                snr_db=None, exposure_s=0.0, rng=2)
    full = np.flatnonzero(cap.contact == 1.0)
    errors = []
    for t in full[:-1][:20]:
        s, _, _ = phase_cross_correlation(cap.ideal_frames[t], cap.ideal_frames[t + 1], upsample_factor=20,
                                          normalization=None)
        errors.append(s - (cap.positions[t + 1] - cap.positions[t]))
    errors = np.abs(np.array(errors))
    assert len(errors) >= 10
    assert np.median(errors[:, 0]) < 0.15 and np.median(errors[:, 1]) < 0.15   # 2.5 px along, 0.22 across


def test_adc_clips_at_both_ends():
    # A narrow ADC input range (0.1-0.3 V) puts valleys below and ridges above it: delivered
    # codes clip to 0 and 2**bits - 1 while the ideal (unclipped) codes run past both ends.
    sensor = quiet_sensor(adc_range_v=(0.1, 0.3), adc_bits=8)
    cap = swipe(sensor=sensor, finger=small_finger(), frame_rate_hz=1000.0, snr_db=None, rng=1)
    assert cap.ideal_frames.min() < 0 and cap.ideal_frames.max() > 255
    assert int(cap.frames.min()) == 0 and int(cap.frames.max()) == 255
    margin = 6 * cap.noise_v_rms / sensor.lsb_v                 # six noise sigmas, in codes
    np.testing.assert_array_equal(cap.frames[cap.ideal_frames < -margin], 0)
    np.testing.assert_array_equal(cap.frames[cap.ideal_frames > 255 + margin], 255)
    assert (cap.ideal_frames < -margin).sum() > 100 and (cap.ideal_frames > 255 + margin).sum() > 100
