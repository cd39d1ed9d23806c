"""Tests of stripstitch.calibrate against the simulator's truth (SensorUnit fixed pattern,
Capture.contact) and against textbook statistics."""

import dataclasses

import numpy as np
import pytest

from stripstitch import calibrate
from stripstitch.simulate.frontend import Sensor


def _sensor(**kw):
    base = dict(n_rows=8, n_cols=64)
    base.update(kw)
    return Sensor(**base)


def _true_blank_codes(unit):
    # Noise-free blank level of every plate: the unit's own front end with kT/C and amplifier
    # noise switched off, finger absent (sensed capacitance 0).
    quiet = dataclasses.replace(unit.sensor, temperature_K=0.0, amp_noise_v_rms=0.0)
    q = dataclasses.replace(unit, sensor=quiet)
    return quiet.to_codes(q.readout(np.zeros((1,) + quiet.shape), rng=0).volts[0])


def _finger_sense(sensor, n_frames, *, seed=0, speed_px=0.7):
    """Sensed capacitance of a ridge pattern (period 9.84 px, REFERENCE-VALUES.md section 3)
    sliding along the rows: valleys 38 um deep, ridges pressed flat over a third of the period
    (about 160 um wide; ridge widths are 100-300 um, Maltoni et al., Handbook of Fingerprint
    Recognition, 2nd ed., ch. 3)."""
    rng = np.random.default_rng(seed)
    theta = rng.uniform(0.3, 1.2)
    t = np.arange(n_frames)[:, None, None]
    r = np.arange(sensor.n_rows)[None, :, None] + speed_px * t
    c = np.arange(sensor.n_cols)[None, None, :]
    phase = 2 * np.pi * (r * np.sin(theta) + c * np.cos(theta)) / 9.84
    gap = np.maximum(25.0 * (1 - np.cos(phase)) - 12.0, 0.0)
    return sensor.plate_capacitance_F(gap)


# --- offset: standard error of the mean ----------------------------------------------------

def test_offset_error_converges_as_one_over_sqrt_n():
    sensor = _sensor()
    unit = sensor.realize(rng=11)
    truth = _true_blank_codes(unit)
    rng = np.random.default_rng(12)
    # Per-plate temporal noise in codes: the analogue noise plus uniform quantisation noise of
    # variance 1/12 LSB^2 (Sheppard's correction; B. Widrow, "A study of rough amplitude
    # quantization by means of Nyquist sampling theory", IRE Trans. Circuit Theory 3(4), 1956:
    # common practice for noise well above half an LSB, here ~1.3 LSB).
    sigma_codes = np.hypot(sensor.noise_v_rms() / sensor.lsb_v, np.sqrt(1 / 12))
    ns = np.array([4, 16, 64, 256])
    errs = []
    for n in ns:
        blanks = unit.readout(np.zeros((n,) + sensor.shape), rng=rng).codes
        cal = calibrate.estimate_calibration(blanks)
        errs.append(np.sqrt(np.mean((cal.offset - truth) ** 2)))
    errs = np.array(errs)
    # Standard error of the mean: sigma / sqrt(N) (J. R. Taylor, An Introduction to Error
    # Analysis, 2nd ed., 1997, section 4.4). 512 plates: the RMS over plates scatters by about
    # 1/sqrt(2*512) = 3 %, hence 12 %.
    np.testing.assert_allclose(errs, sigma_codes / np.sqrt(ns), rtol=0.12)
    slope = np.polyfit(np.log(ns), np.log(errs), 1)[0]
    assert slope == pytest.approx(-0.5, abs=0.06)
    # the estimated noise matches the same figure
    assert np.median(cal.noise) == pytest.approx(sigma_codes, rel=0.1)


def test_two_level_gain_matches_unit_gain():
    sensor = _sensor()
    unit = sensor.realize(rng=3)
    rng = np.random.default_rng(4)
    blanks = unit.readout(np.zeros((200,) + sensor.shape), rng=rng).codes
    # Second level: a flat conductor on the whole sensor (air gap 0 on every plate).
    ref_sense = np.full((200,) + sensor.shape, float(sensor.plate_capacitance_F(0.0)))
    refs = unit.readout(ref_sense, rng=rng).codes
    cal = calibrate.estimate_calibration(blanks, reference_frames=refs)
    # Truth: the unit's multiplicative gain relative to its median (the step between the two
    # levels is gain * C * drive / C_F, so the parasitic residual and offsets cancel).
    truth = unit.gain / np.median(unit.gain)
    # noise on the ratio: sqrt(2) * 1.3 LSB / sqrt(200) over a ~110-code step ~ 1e-3
    np.testing.assert_allclose(cal.gain, truth, atol=5e-3)
    assert cal.n_reference_frames == 200 and not cal.bad.any()


def test_apply_removes_fixed_pattern():
    sensor = _sensor(gain_mismatch=0.05, offset_mismatch_v=10e-3)
    unit = sensor.realize(rng=5)
    rng = np.random.default_rng(6)
    blanks = unit.readout(np.zeros((256,) + sensor.shape), rng=rng).codes
    refs = unit.readout(np.full((256,) + sensor.shape, float(sensor.plate_capacitance_F(0.0))),
                        rng=rng).codes
    cal = calibrate.estimate_calibration(blanks, reference_frames=refs)
    sense = _finger_sense(sensor, 40)
    out = unit.readout(sense, rng=rng)
    # Ideal signal above the blank level, in the units of a median plate (the unit's median
    # gain scales every plate alike after calibration).
    ideal = (out.ideal_codes - sensor.to_codes(sensor.output_v(0.0))) * np.median(unit.gain)
    raw_err = out.codes - sensor.to_codes(sensor.output_v(0.0)) - ideal
    cal_err = cal.apply(out.codes) - ideal
    sigma_codes = np.hypot(sensor.noise_v_rms() / sensor.lsb_v, np.sqrt(1 / 12))
    # after correction only temporal noise is left (plus the gain estimate's small error)
    assert np.sqrt(np.mean(cal_err ** 2)) < 1.15 * sigma_codes
    assert np.sqrt(np.mean(raw_err ** 2)) > 2.0 * sigma_codes
    # the per-plate time average (fixed pattern) of the residual is gone
    assert np.std(cal_err.mean(axis=0)) < 0.3 * sigma_codes
    assert cal.apply(out.codes).dtype == np.float64


# --- bad plates ---------------------------------------------------------------------------

def test_dead_and_stuck_plates_found_exactly():
    sensor = _sensor(dead_fraction=0.02, stuck_fraction=0.02)
    unit = sensor.realize(rng=7)
    rng = np.random.default_rng(8)
    codes = unit.readout(_finger_sense(sensor, 60, seed=1), rng=rng).codes
    bp = calibrate.find_bad_plates(codes)
    np.testing.assert_array_equal(bp.bad, unit.dead | unit.stuck)
    assert (bp.kind[unit.dead] == "dead").all()
    # a stuck plate at code 0 looks exactly like a dead one; all others read "stuck"
    stuck_nonzero = unit.stuck & (unit.stuck_code > 0)
    assert (bp.kind[stuck_nonzero] == "stuck").all()
    assert bp.counts()["dead"] + bp.counts()["stuck"] == int((unit.dead | unit.stuck).sum())


def test_noisy_and_weak_plates():
    sensor = _sensor()
    unit = sensor.realize(rng=9)
    rng = np.random.default_rng(10)
    blanks = unit.readout(np.zeros((100,) + sensor.shape), rng=rng).codes.astype(np.float64)
    noisy = [(1, 3), (6, 40)]
    for r, c in noisy:
        blanks[:, r, c] += rng.normal(0, 8.0, 100)        # ~6x the ordinary noise
    frames = unit.readout(_finger_sense(sensor, 60, seed=2), rng=rng).codes.astype(np.float64)
    mean = frames[:, 4, 20].mean()
    frames[:, 4, 20] = mean + 0.05 * (frames[:, 4, 20] - mean)   # 5 % response
    bp = calibrate.find_bad_plates(frames, blank_frames=blanks)
    got = {(d["row"], d["column"]): d["kind"] for d in bp.listing()}
    assert got == {(1, 3): "noisy", (6, 40): "noisy", (4, 20): "weak"}
    # The same readings in farads (a plate's capacitance changes by about 1e-15 F between
    # ridge and valley, from memory) or any other unit: the thresholds are relative, so the
    # same plates (an absolute floor of 1e-12 once found none in farads).
    for scale in (1e-15, 1e12):
        bs = calibrate.find_bad_plates(frames * scale, blank_frames=blanks * scale)
        assert {(d["row"], d["column"]): d["kind"] for d in bs.listing()} == got


def test_dead_column_listed_and_repaired():
    sensor = _sensor()
    unit = sensor.realize(rng=13)
    rng = np.random.default_rng(14)
    codes = unit.readout(_finger_sense(sensor, 40, seed=3), rng=rng).codes.copy()
    codes[:, :, 17] = 0
    blanks = unit.readout(np.zeros((50,) + sensor.shape), rng=rng).codes
    cal = calibrate.estimate_calibration(blanks, frames=codes)
    assert cal.bad_columns == (17,)
    assert (cal.kind[:, 17] == "dead").all() and cal.bad.sum() == 8
    fixed = cal.apply(codes)
    # interpolation across the row: the mean of the two neighbouring columns
    expected = 0.5 * (fixed[:, :, 16] + fixed[:, :, 18])
    np.testing.assert_allclose(fixed[:, :, 17], expected)


def test_repair_matches_numpy_interp():
    rng = np.random.default_rng(15)
    frames = rng.normal(size=(3, 5, 30))
    bad = rng.random((5, 30)) < 0.2
    bad[2, :4] = True                                   # leading run: nearest good plate
    bad[3, -3:] = True                                  # trailing run
    out = calibrate.repair_plates(frames, bad)
    cols = np.arange(30)
    for t in range(3):
        for r in range(5):
            good = ~bad[r]
            # numpy.interp: linear between neighbours, constant beyond the ends (numpy docs)
            ref = np.interp(cols, cols[good], frames[t, r, good])
            np.testing.assert_allclose(out[t, r], ref)
    whole = np.zeros((5, 30), bool)
    whole[1] = True
    out = calibrate.repair_plates(frames, whole)
    np.testing.assert_allclose(out[:, 1], 0.5 * (frames[:, 0] + frames[:, 2]))
    with pytest.raises(ValueError, match=r"bad marks every plate"):
        calibrate.repair_plates(frames, np.ones((5, 30), bool))
    with pytest.raises(ValueError, match=r"must end in the plate shape \(4, 30\)"):
        calibrate.repair_plates(frames, np.ones((4, 30), bool))


# --- save / load --------------------------------------------------------------------------

def test_save_load_roundtrip_and_errors(tmp_path):
    sensor = _sensor(dead_fraction=0.01)
    unit = sensor.realize(rng=16)
    rng = np.random.default_rng(17)
    blanks = unit.readout(np.zeros((20,) + sensor.shape), rng=rng).codes
    frames = unit.readout(_finger_sense(sensor, 30), rng=rng).codes
    cal = calibrate.estimate_calibration(blanks, frames=frames, notes={"board": "test bench"})
    cal.save(tmp_path / "c.npz")
    back = calibrate.Calibration.load(tmp_path / "c.npz")
    for name in ("offset", "gain", "bad", "kind", "noise"):
        np.testing.assert_array_equal(getattr(back, name), getattr(cal, name))
    assert back.n_blank_frames == 20 and back.notes["board"] == "test bench"
    np.testing.assert_array_equal(back.apply(frames), cal.apply(frames))
    with pytest.raises(FileExistsError, match=r"exists already"):
        cal.save(tmp_path / "c.npz")
    np.savez(tmp_path / "x.npz", offset=np.zeros((2, 2)))
    with pytest.raises(calibrate.CalibrationError, match=r"lacks array\(s\)"):
        calibrate.Calibration.load(tmp_path / "x.npz")
    np.savez(tmp_path / "v.npz", offset=np.zeros((2, 2)), gain=np.ones((2, 2)),
             bad=np.zeros((2, 2), bool), kind=np.full((2, 2), ""), noise=np.zeros((2, 2)),
             header=np.array('{"format": "stripstitch-calibration", "version": 7}'))
    with pytest.raises(calibrate.CalibrationError, match=r"'version' is 7"):
        calibrate.Calibration.load(tmp_path / "v.npz")
    (tmp_path / "g.npz").write_bytes(b"garbage")
    with pytest.raises(calibrate.CalibrationError, match=r"is not a readable .npz"):
        calibrate.Calibration.load(tmp_path / "g.npz")


def test_calibration_input_errors():
    with pytest.raises(ValueError, match=r"blank_frames must have shape \(n_frames"):
        calibrate.estimate_calibration(np.zeros((4, 5)))
    with pytest.raises(ValueError, match=r"reference_frames must have frames of shape \(4, 5\)"):
        calibrate.estimate_calibration(np.zeros((3, 4, 5)), reference_frames=np.ones((3, 4, 6)))
    with pytest.raises(calibrate.CalibrationError, match=r"not above blank_frames"):
        calibrate.estimate_calibration(np.ones((3, 4, 5)), reference_frames=np.zeros((3, 4, 5)))
    cal = calibrate.estimate_calibration(np.ones((3, 4, 5)))
    with pytest.raises(ValueError, match=r"frames must have shape \(T, 4, 5\) to match"):
        cal.apply(np.zeros((2, 4, 6)))
    with pytest.raises(TypeError, match=r"frames must be real numeric"):
        cal.apply(np.zeros((2, 4, 5), dtype=bool))
    with pytest.raises(ValueError, match=r"mad_threshold must be a finite number > 0"):
        calibrate.find_bad_plates(np.zeros((3, 4, 5)), mad_threshold=-1)
    with pytest.raises(ValueError, match=r"needs frames or blank_frames"):
        calibrate.find_bad_plates(None)
    with pytest.raises(ValueError, match=r"n_blank must be an integer in \[1, 2\]"):
        calibrate.calibrate_from_frames(np.zeros((3, 4, 5)), n_blank=3)
    with pytest.raises(ValueError, match=r"threshold must be in \(0, 1\]"):
        calibrate.finger_presence(np.zeros((3, 4, 5)), threshold=2.0)


# --- finger presence ----------------------------------------------------------------------

def test_no_finger_says_so():
    sensor = _sensor()
    unit = sensor.realize(rng=18)
    blanks = unit.readout(np.zeros((50,) + sensor.shape), rng=19).codes
    p = calibrate.finger_presence(blanks)
    assert not p.any and p.first is None and p.span() is None and p.n_present == 0
    assert calibrate.empty_frames(blanks).all()
    with pytest.raises(calibrate.CalibrationError, match=r"no finger-absent frames found"):
        calibrate.calibrate_from_frames(unit.readout(_finger_sense(sensor, 30), rng=1).codes)


def test_presence_arrival_and_lift_off_with_blank_calibration():
    sensor = _sensor(dead_fraction=0.01)
    unit = sensor.realize(rng=20)
    rng = np.random.default_rng(21)
    sense = _finger_sense(sensor, 80, seed=4)
    # the finger covers columns [0, w(t)) growing over frames 10..29, full 30..59, leaves by 69
    cover = np.clip(np.minimum((np.arange(80) - 10) / 20, (70 - np.arange(80)) / 10), 0, 1)
    mask = np.arange(sensor.n_cols)[None, :] < cover[:, None] * sensor.n_cols
    sense = sense * mask[:, None, :]
    codes = unit.readout(sense, rng=rng).codes
    cal = calibrate.calibrate_from_frames(codes, n_blank=8)
    p = calibrate.finger_presence(codes, calibration=cal)
    # score estimates the covered fraction (one ridge period of slack at the pad edge)
    assert np.abs(p.score - cover).max() < 10 / sensor.n_cols + 0.02
    # truth: cover >= 0.1 (the threshold) from frame 12 to 69; the window's slack may add one
    assert p.first in (11, 12) and p.last in (68, 69)
    assert p.partial()[15] and not p.partial()[40]
    # without a calibration (blank level from the 5th percentile) the span is the same
    q = calibrate.finger_presence(codes)
    assert abs(q.first - p.first) <= 1 and abs(q.last - p.last) <= 1
    inferred = calibrate.calibrate_from_frames(codes)
    truth = _true_blank_codes(unit)
    good = ~(unit.dead | unit.stuck)
    assert inferred.n_blank_frames >= 10      # frames 0..9 and 70..79 less a 5-frame guard
    assert np.sqrt(np.mean((inferred.offset - truth)[good] ** 2)) < 0.5


def test_against_a_simulated_capture():
    # Truth from the simulator: Capture.contact (fraction of plates on the pad per frame) and
    # the SensorUnit's fixed pattern (dead/stuck plates, blank level).
    from stripstitch import simulate
    sensor = Sensor(n_rows=8, n_cols=96, dead_fraction=0.01, stuck_fraction=0.01)
    cap = simulate.swipe("left_loop", sensor=sensor, finger_size_mm=(12.0, 9.0), rng=23)
    p = calibrate.finger_presence(cap.frames)
    err = p.score - cap.contact
    assert np.sqrt(np.mean(err ** 2)) < 0.1 and np.abs(err).max() < 0.3
    inside = np.flatnonzero(cap.contact >= 0.1)
    # arrival/lift-off: the pad's soft edge reaches the strip a few frames before ridges touch
    assert abs(p.first - inside[0]) <= 12 and abs(p.last - inside[-1]) <= 12
    full = cap.contact >= 0.999
    assert p.partial()[p.first] and np.mean(p.partial()[full]) < 0.5
    cal = calibrate.calibrate_from_frames(cap.frames)
    np.testing.assert_array_equal(cal.bad, cap.unit.dead | cap.unit.stuck)
    good = ~cal.bad
    # The frames before arrival still see the hovering skin: the noise-free level of those
    # frames through this unit is blank + gain * (ideal - ideal blank), from the front end's
    # readout equation (gain * (C + C_residual) * drive / C_F + offset).
    idx = np.array(cal.notes["blank_frame_indices"])
    s = cap.sensor
    hover = cap.ideal_frames[idx].mean(axis=0) - s.to_codes(s.output_v(0.0))
    truth = _true_blank_codes(cap.unit) + cap.unit.gain * hover
    # standard error of the mean again (Taylor 1997, section 4.4), 3x for margin
    sem = np.median(cal.noise[good]) / np.sqrt(cal.n_blank_frames)
    assert np.sqrt(np.mean((cal.offset - truth)[good] ** 2)) < 3 * sem
    assert np.sqrt(np.mean((cal.offset - _true_blank_codes(cap.unit))[good] ** 2)) < 1.5
