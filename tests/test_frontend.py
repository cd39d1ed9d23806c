"""Tests of the capacitive front end (stripstitch.simulate.frontend) against outside references.

Every check names its source beside it. "REFERENCE-VALUES.md" is the project's survey of
published and worked values (../shared/REFERENCE-VALUES.md beside the repository); the worked values it lists are
in tests/data/reference_frontend.csv together with their sources.
"""

from __future__ import annotations

import csv
import dataclasses
import math
from decimal import Decimal
from pathlib import Path

import numpy as np
import pytest
import scipy.constants
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from hypothesis import given, settings
from hypothesis import strategies as st

from stripstitch.simulate.frontend import EPS0_F_M, K_B_J_K, Layer, Readout, Sensor, SensorUnit

DATA = Path(__file__).parent / "data" / "reference_frontend.csv"
UNIT_SI = {"fF": 1e-15, "pF": 1e-12, "V": 1.0, "uV": 1e-6, "1": 1.0, "code": 1.0}

# A sensor with every random and fixed-pattern effect switched off.
QUIET = dict(gain_mismatch=0.0, offset_mismatch_v=0.0, replica_mismatch=0.0, temperature_K=0.0,
             amp_noise_v_rms=0.0, hold_F=None)


def _rows():
    with DATA.open(newline="") as fh:
        lines = [line for line in fh if not line.startswith("#")]
    return list(csv.DictReader(lines))


ROWS = _rows()


def _stack(text):
    return tuple(Layer(float(t), float(e)) for t, e in (item.split(":") for item in text.split("|")))


def _sensor(row, **extra):
    plate = float(row["plate_um"])
    kwargs = dict(plate_um=plate, pitch_um=max(plate, 50.8), layers=_stack(row["stack"]),
                  eps_r_air=float(row["eps_r_air"]), amp_offset_v=0.0, n_rows=1, n_cols=1)
    if row["feedback_F"]:
        kwargs["feedback_F"] = float(row["feedback_F"])
    kwargs.update(extra)
    return Sensor(**kwargs)


def _value_and_tol(row):
    """Value in SI units and half a unit of its last printed digit (the source's rounding)."""
    printed = Decimal(row["value"])
    scale = UNIT_SI[row["unit"]]
    half_unit = 0.5 * 10.0 ** printed.as_tuple().exponent
    if row["unit"] == "code":
        half_unit = 0.0
    return float(printed) * scale, half_unit * scale


def _ids(quantity):
    return [r for r in ROWS if r["quantity"] == quantity]


# ---------------------------------------------------------------------------- constants
def test_constants_pinned_to_codata():
    # Source: CODATA 2018 eps0 = 8.8541878128(13)e-12 F/m; k = 1.380649e-23 J/K exact (SI 2019);
    # REFERENCE-VALUES.md section 1.
    assert EPS0_F_M == 8.8541878128e-12
    assert K_B_J_K == 1.380649e-23
    # Reference library: scipy.constants carries CODATA 2022 eps0 (8.8541878188e-12), 6.8e-10
    # relative away from the pinned 2018 value, hence rtol 1e-8 (REFERENCE-VALUES.md note).
    np.testing.assert_allclose(EPS0_F_M, scipy.constants.epsilon_0, rtol=1e-8)
    assert K_B_J_K == scipy.constants.k


# ---------------------------------------------------------------------------- worked values
@pytest.mark.parametrize("row", _ids("capacitance"), ids=lambda r: r["id"])
def test_plate_capacitance_matches_worked_examples(row):
    # Source: REFERENCE-VALUES.md Ex. 1 and section 2 (row["source"]). Tolerance: half a unit in the
    # last printed digit (5 significant digits); eps0 differences (7e-10) are far below it.
    want, tol = _value_and_tol(row)
    got = float(_sensor(row).plate_capacitance_F(float(row["air_gap_um"])))
    assert abs(got - want) <= tol * (1 + 1e-9)


@pytest.mark.parametrize("row", _ids("ratio"), ids=lambda r: r["id"])
def test_ridge_valley_ratio_matches_worked_examples(row):
    # Source: REFERENCE-VALUES.md Ex. 2, C_ridge/C_valley = 1 + t_air eps_r / t_d (1-D model; the real
    # ratio is lower because of fringing). Tolerance: half a unit in the last printed digit.
    want, tol = _value_and_tol(row)
    s = _sensor(row)
    c = s.plate_capacitance_F(np.array([0.0, float(row["air_gap_um"])]))
    assert abs(c[0] / c[1] - want) <= tol * (1 + 1e-9)


@pytest.mark.parametrize("row", _ids("output_v"), ids=lambda r: r["id"])
def test_amplifier_output_matches_worked_examples(row):
    # Source: REFERENCE-VALUES.md Ex. 3 and section 8: V_out = C_s (V_H - V_M) / C_F (Razavi ch. 12,
    # Johns & Martin ch. 10). Tolerance: half a unit in the last printed digit.
    want, tol = _value_and_tol(row)
    s = _sensor(row)
    got = float(s.output_v(s.plate_capacitance_F(float(row["air_gap_um"]))))
    assert abs(got - want) <= tol * (1 + 1e-9)


@pytest.mark.parametrize("row", _ids("code"), ids=lambda r: r["id"])
def test_adc_codes_match_worked_examples(row):
    # Source: REFERENCE-VALUES.md Ex. 3 (8-bit codes over 0..1 V); exact integers. Both the ideal
    # path and a noiseless readout must give them.
    want, _ = _value_and_tol(row)
    s = _sensor(row, **QUIET)
    sense = s.plate_capacitance_F(np.full((1, 1), float(row["air_gap_um"])))
    out = s.realize(rng=0).readout(sense, rng=0)
    assert int(out.codes[0, 0]) == int(want)
    assert int(np.rint(out.ideal_codes[0, 0])) == int(want)


@pytest.mark.parametrize("row", _ids("ktc_v_rms"), ids=lambda r: r["id"])
def test_ktc_noise_matches_worked_examples(row):
    # Source: REFERENCE-VALUES.md Ex. 4 and section 8 (kT/C calculator example; Razavi ch. 7 from
    # memory): v = sqrt(kT/C). Tolerance: half a unit in the last printed digit.
    want, tol = _value_and_tol(row)
    s = Sensor(feedback_F=float(row["feedback_F"]), temperature_K=float(row["temperature_K"]),
               amp_noise_v_rms=0.0, hold_F=None)
    assert abs(s.noise_v_rms() - want) <= tol * (1 + 1e-9)


@pytest.mark.parametrize("k1, k2", [(3.9, 7.5), (1.0, 80.2), (2.5, 2.5), (11.68, 1.00059)])
@pytest.mark.parametrize("d_um", [2.0, 10.0, 300.0])
def test_two_slab_series_formula(k1, k2, d_um):
    # Source: two slabs of thickness d/2 in series, C = (2 eps0 A / d) k1 k2 / (k1 + k2)
    # (Halliday/Resnick/Krane, Physics, ch. 30 exercise; REFERENCE-VALUES.md section 2).
    # Same eps0 on both sides, so only rounding differs (rtol 1e-12).
    s = Sensor(plate_um=40.0, layers=(Layer(d_um / 2, k1), Layer(d_um / 2, k2)))
    area = (40e-6) ** 2
    want = 2 * EPS0_F_M * area / (d_um * 1e-6) * k1 * k2 / (k1 + k2)
    np.testing.assert_allclose(s.plate_capacitance_F(0.0), want, rtol=1e-12)
    assert s.plate_area_m2 == pytest.approx(area, rel=1e-15)


def test_moisture_film_is_a_series_layer():
    # Source: series capacitors 1/C = sum 1/C_i (any physics text; REFERENCE-VALUES.md section 2):
    # a film of thickness f in a gap g is a layer f/eps_fluid in series with (g - f)/eps_air.
    s = Sensor(plate_um=50.0, layers=(Layer(2.0, 3.9),), eps_r_air=1.0, eps_r_fluid=80.2)
    area = (50e-6) ** 2
    series = lambda *pairs: EPS0_F_M * area / sum(t * 1e-6 / e for t, e in pairs)  # noqa: E731
    got = s.plate_capacitance_F(np.array([50.0, 50.0, 10.0]), np.array([20.0, 0.0, 30.0]))
    want = [series((2, 3.9), (30, 1.0), (20, 80.2)), series((2, 3.9), (50, 1.0)),
            series((2, 3.9), (10, 80.2))]          # last: film thicker than the gap fills it
    np.testing.assert_allclose(got, want, rtol=1e-12)


# ---------------------------------------------------------------------------- fringing blur
def _fd_flux_sigma(layers, *, h, half_width):
    """Second-moment width of the flux reaching the skin plane from a line source on the plate plane.

    Finite-volume solve of div(eps grad phi) = 0 in a layered slab with scipy.sparse (layers from
    the plate up): phi = 1 at one node of the bottom plane, 0 elsewhere on it, on the top (skin)
    plane and at the far sides. The flux through the top plane is the point-spread of the stack.
    """
    eps_row = np.concatenate([np.full(int(round(t / h)), e, float) for t, e in layers])
    nz = eps_row.size
    nx = 2 * int(round(half_width / h)) + 1
    x = (np.arange(nx) - nx // 2) * h
    i, j = np.meshgrid(np.arange(nx), np.arange(1, nz))
    i, j = i.ravel(), j.ravel()
    node = (j - 1) * nx + i
    up, down = eps_row[j], eps_row[j - 1]
    side = (up + down) / 2
    rows, cols, vals = [node], [node], [-(up + down + 2 * side)]
    for mask, other, coef in ((j < nz - 1, node + nx, up), (j > 1, node - nx, down),
                              (i > 0, node - 1, side), (i < nx - 1, node + 1, side)):
        rows.append(node[mask]), cols.append(other[mask]), vals.append(coef[mask])
    a = sp.csc_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                      shape=(node.size, node.size))
    b = np.zeros(node.size)
    source = (j == 1) & (i == nx // 2)
    b[node[source]] -= down[source]
    phi = spla.spsolve(a, b).reshape(nz - 1, nx)
    flux = eps_row[-1] * phi[-1]
    w = flux / flux.sum()
    return float(np.sqrt(np.sum(w * x * x)))


@pytest.mark.parametrize("layers", [[(1.0, 1.0)], [(1.0, 3.9), (1.0, 7.5)], [(0.5, 3.9), (1.5, 7.5)],
                                    [(1.0, 7.5), (1.0, 3.9), (3.0, 2.0)]])
def test_blur_sigma_matches_laplace_solution(layers):
    # Reference: numerical solution of Laplace's equation (scipy.sparse.linalg.spsolve) for the
    # layered slab; the Gaussian is built to match the second moment of the exact point-spread.
    # Tolerance 1 %: discretisation (h = d/20..d/40) and truncation of the domain.
    # Homogeneous slab: sigma = d / sqrt(3) (transfer function kd/sinh(kd), common practice).
    d = sum(t for t, _ in layers)
    want = _fd_flux_sigma(layers, h=min(t for t, _ in layers) / 20, half_width=8 * d)
    s = Sensor(layers=tuple(Layer(t, e) for t, e in layers))
    assert s.blur_sigma_um == pytest.approx(want, rel=0.01)
    if len(layers) == 1:
        assert s.blur_sigma_um == pytest.approx(d / math.sqrt(3), rel=1e-12)


@settings(max_examples=40, deadline=None)
@given(stack=st.lists(st.tuples(st.floats(0.05, 50.0), st.floats(1.0, 100.0)), min_size=1, max_size=4),
       scale=st.floats(0.1, 20.0))
def test_blur_reciprocal_and_proportional_to_thickness(stack, scale):
    # Reciprocity (Green's reciprocity theorem, common practice): the spread is the same seen from
    # either side of the stack. Dimensional analysis: scaling every thickness scales sigma.
    s = Sensor(layers=tuple(Layer(t, e) for t, e in stack))
    rev = Sensor(layers=tuple(Layer(t, e) for t, e in stack[::-1]))
    big = Sensor(layers=tuple(Layer(t * scale, e) for t, e in stack))
    assert rev.blur_sigma_um == pytest.approx(s.blur_sigma_um, rel=1e-9)
    assert big.blur_sigma_um == pytest.approx(scale * s.blur_sigma_um, rel=1e-9)
    assert dataclasses.replace(s, lateral_blur=False).blur_sigma_um == 0.0


# ---------------------------------------------------------------------------- noise
@pytest.mark.parametrize("amp_v, feedback_F, hold_F", [(5e-3, 100e-15, 1e-12), (0.0, 100e-15, 1e-12),
                                                        (0.0, 50e-15, None), (1e-3, 200e-15, 2e-12)])
def test_monte_carlo_noise_matches_ktc_plus_amplifier(amp_v, feedback_F, hold_F):
    # Source: kT/C noise sqrt(kT/C) (REFERENCE-VALUES.md section 8, Razavi ch. 7 from memory) on C_F
    # and on the hold capacitor, plus white amplifier noise; independent sources add in quadrature
    # (common practice). 300 frames x 1536 plates: the std estimate is good to ~0.1 %; allow 2 %.
    s = Sensor(amp_noise_v_rms=amp_v, feedback_F=feedback_F, hold_F=hold_F, gain_mismatch=0.0,
               offset_mismatch_v=0.0, replica_mismatch=0.0, temperature_K=300.0)
    kt = 1.380649e-23 * 300.0
    want = math.sqrt(kt / feedback_F + (kt / hold_F if hold_F else 0.0) + amp_v ** 2)
    assert s.noise_v_rms() == pytest.approx(want, rel=1e-12)
    sense = np.full((300, 8, 192), 20e-15)
    out = s.realize(rng=1).readout(sense, rng=2)
    assert np.std(out.volts) == pytest.approx(want, rel=0.02)
    assert np.mean(out.volts) == pytest.approx(20e-15 / feedback_F + 0.05, abs=4 * want / 600)


def test_code_noise_includes_quantisation():
    # Source: quantisation noise LSB^2/12 adds to a Gaussian input noise of std >~ 1 LSB
    # (Widrow & Kollar, Quantization Noise, Cambridge UP 2008; from memory). Tolerance 3 %.
    s = Sensor(gain_mismatch=0.0, offset_mismatch_v=0.0, replica_mismatch=0.0, amp_noise_v_rms=6e-3)
    out = s.realize(rng=3).readout(np.full((200, 8, 192), 30.3e-15), rng=4)
    sigma_lsb = s.noise_v_rms() / s.lsb_v
    assert np.std(out.codes.astype(float)) == pytest.approx(math.sqrt(sigma_lsb ** 2 + 1 / 12), rel=0.03)


def test_with_snr_db_reaches_target_in_monte_carlo():
    # SNR = 20 log10(ridge-valley swing / noise rms) (common practice); the swing comes from the
    # layered-plate model, the noise from a Monte-Carlo readout. Tolerance 0.2 dB (~2 % in noise).
    s = Sensor(gain_mismatch=0.0, offset_mismatch_v=0.0, replica_mismatch=0.0).with_snr_db(32.0)
    ridge, valley = s.plate_capacitance_F(np.array([0.0, 50.0]))
    swing = (ridge - valley) * s.drive_v / s.feedback_F
    out = s.realize(rng=5).readout(np.full((200, 8, 192), ridge), rng=6)
    assert 20 * np.log10(swing / np.std(out.volts)) == pytest.approx(32.0, abs=0.2)
    assert s.snr_db() == pytest.approx(32.0, abs=1e-9)
    with pytest.raises(ValueError, match=r"snr_db must be <= .* kT/C noise limit"):
        s.with_snr_db(80.0)


# ---------------------------------------------------------------------------- ADC
@pytest.mark.parametrize("bits, dtype", [(1, np.uint8), (8, np.uint8), (9, np.uint16), (12, np.uint16),
                                         (16, np.uint16)])
def test_adc_clips_at_range_ends_and_dtype(bits, dtype):
    # Ideal ADC with clipping: codes 0 .. 2**bits - 1 (common practice); uint8 for <= 8 bits.
    s = Sensor(adc_bits=bits, **QUIET)
    unit = s.realize(rng=0)
    sense = np.stack([np.full((8, 192), 1e-12), np.zeros((8, 192))])   # 10 V: above the range
    out = unit.readout(sense, rng=0)
    assert out.codes.dtype == dtype
    assert np.all(out.codes[0] == 2 ** bits - 1)
    assert np.all(out.ideal_codes[0] > 2 ** bits - 1)          # ideal codes are not clipped
    low = dataclasses.replace(s, amp_offset_v=-0.3).realize(rng=0).readout(sense, rng=0)
    assert np.all(low.codes[1] == 0)
    assert np.all(low.ideal_codes[1] < 0)


def test_codes_are_rounded_volts():
    # Quantiser code = round((V - lo) / LSB) with LSB = range / (2**bits - 1) (see the CSV header);
    # compare against an independent rounding of the delivered volts.
    s = Sensor(adc_range_v=(-0.2, 1.3), adc_bits=10)
    out = s.realize(rng=8).readout(np.random.default_rng(9).uniform(0, 60e-15, (4, 8, 192)), rng=10)
    want = np.clip(np.floor((out.volts + 0.2) / (1.5 / 1023) + 0.5), 0, 1023)
    assert np.mean(out.codes == want) > 0.999                  # ties at x.5 may round either way
    assert np.max(np.abs(out.codes - want)) <= 1


# ---------------------------------------------------------------------------- fixed pattern
def test_dead_and_stuck_plates():
    s = Sensor(dead_fraction=0.05, stuck_fraction=0.03)
    unit = s.realize(rng=7)
    n = 8 * 192
    assert int(unit.dead.sum()) == round(0.05 * n) and int(unit.stuck.sum()) == round(0.03 * n)
    assert not np.any(unit.dead & unit.stuck)
    assert np.all((unit.stuck_code[unit.stuck] >= 0) & (unit.stuck_code[unit.stuck] <= 255))
    sense = np.random.default_rng(11).uniform(0.0, 60e-15, (6, 8, 192))
    out = unit.readout(sense, rng=12)
    assert np.all(out.codes[:, unit.dead] == 0)                # dead: bottom code, every frame
    assert np.all(out.volts[:, unit.dead] == 0.0)
    assert np.all(out.codes[:, unit.stuck] == unit.stuck_code[unit.stuck])   # stuck: fixed code
    live = ~(unit.dead | unit.stuck)
    assert np.std(out.codes[:, live].astype(float), axis=0).mean() > 1.0    # live plates move


def test_fixed_pattern_constant_within_unit_and_different_between_units():
    # Fixed-pattern noise is a property of the unit (common practice): noiseless readouts of one unit
    # repeat exactly; the per-plate spread matches the mismatch model; another unit differs.
    s = Sensor(temperature_K=0.0, amp_noise_v_rms=0.0, hold_F=None)
    unit = s.realize(rng=21)
    sense = np.full((5, 8, 192), 40e-15)
    a = unit.readout(sense, rng=1).volts
    b = unit.readout(sense, rng=2).volts
    np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(a[0], a[4])
    signal = 40e-15 * s.drive_v / s.feedback_F
    spread = math.sqrt((0.02 * signal) ** 2 + 3e-3 ** 2 + (50e-15 * 0.01 / 100e-15) ** 2)
    assert np.std(a[0]) == pytest.approx(spread, rel=0.1)      # 1536 plates: ~2 % sampling error
    assert np.std(unit.gain) == pytest.approx(0.02, rel=0.1)
    assert np.std(unit.offset_v) == pytest.approx(3e-3, rel=0.1)
    assert np.mean(unit.offset_v) == pytest.approx(0.05, abs=4 * 3e-3 / math.sqrt(1536))
    other = s.realize(rng=22)
    assert np.corrcoef(unit.gain.ravel(), other.gain.ravel())[0, 1] < 0.2
    assert not np.allclose(other.readout(sense, rng=1).volts, a)


def test_noise_averages_to_the_fixed_pattern():
    # With noise on, the per-plate mean over frames converges to the noiseless value of that unit
    # (law of large numbers): 4 sigma / sqrt(frames).
    s = Sensor()
    unit = s.realize(rng=31)
    quiet = SensorUnit(dataclasses.replace(s, temperature_K=0.0, amp_noise_v_rms=0.0, hold_F=None),
                       unit.gain, unit.offset_v, unit.residual_F, unit.dead, unit.stuck, unit.stuck_code)
    sense = np.full((400, 8, 192), 25e-15)
    noisy = unit.readout(sense, rng=32).volts.mean(axis=0)
    clean = quiet.readout(sense[:1], rng=0).volts[0]
    assert np.max(np.abs(noisy - clean)) < 4.5 * s.noise_v_rms() / math.sqrt(400)


def test_reproducible_by_seed_and_frozen():
    s = Sensor(dead_fraction=0.01, stuck_fraction=0.01)
    u1, u2 = s.realize(rng=3), s.realize(rng=3)
    for name in ("gain", "offset_v", "residual_F", "dead", "stuck", "stuck_code"):
        np.testing.assert_array_equal(getattr(u1, name), getattr(u2, name))
        assert not getattr(u1, name).flags.writeable
    sense = np.random.default_rng(4).uniform(0, 50e-15, (3, 8, 192))
    keep = sense.copy()
    r1, r2, r3 = u1.readout(sense, rng=5), u1.readout(sense, rng=5), u1.readout(sense, rng=6)
    np.testing.assert_array_equal(sense, keep)                  # input untouched
    np.testing.assert_array_equal(r1.volts, r2.volts)
    np.testing.assert_array_equal(r1.codes, r2.codes)
    assert not np.array_equal(r1.volts, r3.volts)
    assert not (r1.codes.flags.writeable or r1.volts.flags.writeable or r1.ideal_codes.flags.writeable)
    assert isinstance(r1, Readout)


# ---------------------------------------------------------------------------- properties
@settings(max_examples=60, deadline=None)
@given(stack=st.lists(st.tuples(st.floats(0.0, 100.0), st.floats(1.0, 100.0)), min_size=1, max_size=3)
       .filter(lambda ls: any(t > 0.01 for t, _ in ls)),
       gap=st.floats(0.0, 200.0), delta=st.floats(0.01, 100.0), fluid=st.floats(0.0, 100.0))
def test_smaller_gap_gives_larger_capacitance(stack, gap, delta, fluid):
    # Parallel-plate model: C falls as the gap grows, with or without a moisture film (series
    # capacitors, any physics text).
    s = Sensor(layers=tuple(Layer(t, e) for t, e in stack))
    c = s.plate_capacitance_F(np.array([gap, gap + delta]), fluid)
    assert c[0] > c[1] > 0
    assert s.plate_capacitance_F(gap, fluid) >= s.plate_capacitance_F(gap) * (1 - 1e-12)


@settings(max_examples=50, deadline=None)
@given(bits=st.integers(1, 16), lo=st.floats(-1.0, 0.5), span=st.floats(0.01, 3.0),
       offset=st.floats(-1.0, 1.0), seed=st.integers(0, 2 ** 32 - 1),
       lead=st.lists(st.integers(1, 3), max_size=2), rows=st.integers(1, 4), cols=st.integers(1, 5),
       dead=st.floats(0.0, 0.3), stuck=st.floats(0.0, 0.3))
def test_codes_in_range_and_shapes_preserved(bits, lo, span, offset, seed, lead, rows, cols, dead, stuck):
    s = Sensor(n_rows=rows, n_cols=cols, adc_bits=bits, adc_range_v=(lo, lo + span),
               amp_offset_v=offset, dead_fraction=dead, stuck_fraction=stuck)
    rng = np.random.default_rng(seed)
    shape = (*lead, rows, cols)
    sense = rng.uniform(0.0, 200e-15, shape)
    out = s.realize(rng=rng).readout(sense, rng=rng)
    assert out.codes.shape == out.volts.shape == out.ideal_codes.shape == shape
    assert out.codes.dtype == (np.uint8 if bits <= 8 else np.uint16)
    assert out.codes.min(initial=0) >= 0 and out.codes.max(initial=0) <= 2 ** bits - 1
    np.testing.assert_allclose(out.ideal_codes, (sense * 1.0 / 100e-15 + offset - lo) / span * (2 ** bits - 1),
                               rtol=1e-9, atol=1e-9)


# ---------------------------------------------------------------------------- bad input
@pytest.mark.parametrize("make, exc, match", [
    (lambda: Layer(-1.0, 3.9), ValueError, r"Layer thickness_um must be a finite number >= 0; got -1.0"),
    (lambda: Layer(1.0, 0.0), ValueError, r"Layer eps_r must be a finite number > 0; got 0.0"),
    (lambda: Layer(1.0, -3.9), ValueError, r"Layer eps_r must be a finite number > 0"),
    (lambda: Layer(1.0, "3.9"), TypeError, r"Layer eps_r must be a real number; got str"),
    (lambda: Layer(1.0, 3.9, 7), TypeError, r"Layer name must be a str"),
    (lambda: Sensor(adc_bits=0), ValueError, r"adc_bits must be an integer in \[1, 16\]; got 0"),
    (lambda: Sensor(adc_bits=17), ValueError, r"adc_bits must be an integer in \[1, 16\]; got 17"),
    (lambda: Sensor(adc_bits=8.0), TypeError, r"adc_bits must be an integer; got float"),
    (lambda: Sensor(adc_range_v=(1.0, 0.0)), ValueError, r"adc_range_v must be a pair \(lo_v, hi_v\) with lo_v < hi_v"),
    (lambda: Sensor(adc_range_v=(0.0, 0.5, 1.0)), ValueError, r"adc_range_v must be a pair"),
    (lambda: Sensor(adc_range_v=(0.0, float("inf"))), ValueError, r"adc_range_v\[1\] must be a finite number"),
    (lambda: Sensor(plate_um=60.0), ValueError, r"plate_um must be <= pitch_um \(50.8"),
    (lambda: Sensor(pitch_um=-50.8), ValueError, r"pitch_um must be a finite number > 0"),
    (lambda: Sensor(n_rows=0), ValueError, r"n_rows must be an integer in \[1, inf\]"),
    (lambda: Sensor(layers=(Layer(0.0, 3.9),)), ValueError, r"at least one layer of thickness_um > 0"),
    (lambda: Sensor(layers=((1.0, 3.9),)), TypeError, r"layers\[0\] must be a Layer"),
    (lambda: Sensor(layers=Layer(1.0, 3.9)), TypeError, r"layers must be a tuple of Layer"),
    (lambda: Sensor(eps_r_fluid=0.0), ValueError, r"eps_r_fluid must be a finite number > 0"),
    (lambda: Sensor(eps_r_air=-1.0), ValueError, r"eps_r_air must be a finite number > 0"),
    (lambda: Sensor(feedback_F=0.0), ValueError, r"feedback_F must be a finite number > 0"),
    (lambda: Sensor(parasitic_F=-1e-15), ValueError, r"parasitic_F must be a finite number >= 0"),
    (lambda: Sensor(replica_mismatch=1.5), ValueError, r"replica_mismatch must be in \[0.0, 1.0\]"),
    (lambda: Sensor(temperature_K=-1.0), ValueError, r"temperature_K must be a finite number >= 0"),
    (lambda: Sensor(amp_noise_v_rms=-1e-3), ValueError, r"amp_noise_v_rms must be a finite number >= 0"),
    (lambda: Sensor(hold_F=0.0), ValueError, r"hold_F must be a finite number > 0"),
    (lambda: Sensor(amp_offset_v=float("nan")), ValueError, r"amp_offset_v must be a finite number"),
    (lambda: Sensor(gain_mismatch=0.5), ValueError, r"gain_mismatch must be in \[0.0, 0.2\]"),
    (lambda: Sensor(dead_fraction=0.7, stuck_fraction=0.4), ValueError,
     r"dead_fraction \+ stuck_fraction must be <= 1"),
    (lambda: Sensor(lateral_blur="yes"), TypeError, r"lateral_blur must be True or False"),
    (lambda: Sensor().capacitance_density_F_m2(-1.0), ValueError, r"air_gap_um must be >= 0"),
    (lambda: Sensor().capacitance_density_F_m2([1.0, 2.0], [-0.5, 0.0]), ValueError, r"fluid_um must be >= 0"),
    (lambda: Sensor().capacitance_density_F_m2([1.0, 2.0], [1.0, 2.0, 3.0]), ValueError,
     r"fluid_um \(shape \(3,\)\) must broadcast against air_gap_um \(shape \(2,\)\)"),
    (lambda: Sensor().capacitance_density_F_m2(float("nan")), ValueError, r"air_gap_um contains NaN"),
    (lambda: Sensor().realize(rng=0).readout(np.zeros((4, 8, 100))), ValueError,
     r"sense_F must have shape \(\.\.\., 8, 192\) \(frames of this sensor\); got \(4, 8, 100\)"),
    (lambda: Sensor().realize(rng=0).readout(np.full((8, 192), -1e-15)), ValueError, r"sense_F must be >= 0"),
    (lambda: Sensor().realize(rng=0).readout("many"), TypeError, r"sense_F must be array_like of numbers"),
    (lambda: Sensor().contrast_v(valley_gap_um=0.0), ValueError, r"valley_gap_um must be a finite number > 0"),
    (lambda: SensorUnit(Sensor(n_rows=2, n_cols=2), np.ones((2, 3)), np.zeros((2, 2)), np.zeros((2, 2)),
                        np.zeros((2, 2), bool), np.zeros((2, 2), bool), np.zeros((2, 2), int)),
     ValueError, r"gain must have the sensor's frame shape \(2, 2\); got \(2, 3\)"),
    (lambda: SensorUnit("sensor", *([np.zeros((8, 192))] * 6)), TypeError, r"sensor must be a Sensor; got str"),
])
def test_bad_arguments_raise_clear_errors(make, exc, match):
    with pytest.raises(exc, match=match):
        make()
