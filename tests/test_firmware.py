"""Tests for the integer (firmware-like) path, stripstitch.firmware.

Outside references: the SAD definition evaluated directly, OpenCV's matchTemplate
(integer shifts), the closed form of the overlap sums (arithmetic
series), the exactness of the equiangular fit on a V-shaped cost (Shimizu & Okutomi 2003,
from memory), and frames cut at known positions by Fourier shifts (conftest.cut_frames).
"""

import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).parent))
from conftest import band_texture, cut_frames  # noqa: E402

from stripstitch import stitch  # noqa: E402
from stripstitch import firmware as fw  # noqa: E402
from stripstitch._types import Reconstruction  # noqa: E402


@pytest.fixture(scope="module")
def tex():
    return band_texture((700, 96), seed=3)


def _frames(tex, step, t_n=160):
    pos = np.arange(t_n)[:, None] * np.asarray(step, float)[None, :]
    frames = cut_frames(tex, pos + [20.0, 8.0], n_rows=8, n_cols=64, origin=(8, 0))
    return pos, fw.to_uint8(frames)


def test_hot_path_is_integer(tex):
    _, u8 = _frames(tex, (1.37, 0.21), t_n=20)
    z = u8.astype(np.int16) - (u8.sum(0, dtype=np.int64) // len(u8)).astype(np.int16)
    costs = fw._sad_costs(z[:-1], z[1:], np.arange(-5, 6), np.arange(-3, 4))
    assert z.dtype == np.int16 and costs.dtype == np.int32
    q = fw._equiangular_q(costs[:, 4, 3], costs[:, 5, 3], costs[:, 6, 3], 8)
    assert q.dtype == np.int64
    est = fw.estimate_shifts_int(u8)
    assert est.shift_q.dtype == np.int32 and est.cost.dtype == np.int32
    assert est.offset.dtype == np.int16 and est.positions_q().dtype == np.int64
    with pytest.raises(TypeError, match="dtype uint8"):
        fw.estimate_shifts_int(u8.astype(np.float32))


def test_sad_matches_its_definition(tex):
    rng = np.random.default_rng(2)
    a = rng.integers(-255, 256, size=(3, 8, 20)).astype(np.int16)
    b = rng.integers(-255, 256, size=(3, 8, 20)).astype(np.int16)
    d_r, e_r = np.arange(-5, 6), np.arange(-3, 4)
    got = fw._sad_costs(a, b, d_r, e_r)
    for k, d in enumerate(d_r):
        for m, e in enumerate(e_r):
            s = 0
            n = 0
            for r in range(8):
                for c in range(20):
                    if 0 <= r + d < 8 and 0 <= c + e < 20:
                        s += abs(int(a[1, r + d, c + e]) - int(b[1, r, c]))
                        n += 1
            assert got[1, k, m] == (s << 8) // n


@pytest.mark.parametrize("step", [(3.0, -1.0), (2.0, 2.0)])
def test_integer_peak_agrees_with_opencv(tex, step):
    # OpenCV matchTemplate (squared differences) on the same whole-pixel pairs: the part of
    # frame t+1 that lies inside frame t for along shifts 0..3 and lateral -3..3.
    import cv2
    _, u8 = _frames(tex, step, t_n=12)
    est = fw.estimate_shifts_int(u8)
    for t in range(len(u8) - 1):
        tmpl = u8[t + 1, 0:5, 3:61].astype(np.float32)
        res = cv2.matchTemplate(u8[t].astype(np.float32), tmpl, cv2.TM_SQDIFF_NORMED)
        _, _, (x, y), _ = cv2.minMaxLoc(res)
        np.testing.assert_array_equal(np.round(est.shift_px[t]), [y, x - 3])


def test_equiangular_fit_exact_on_a_v():
    # Costs |x - x0| * slope sampled at -1, 0, +1: the equiangular fit returns x0 exactly
    # (to the fixed-point rounding), for |x0| <= 1/2.
    x0 = np.linspace(-0.5, 0.5, 21)
    slope = 4096
    cm = np.round(np.abs(-1 - x0) * slope).astype(np.int64)
    c0 = np.round(np.abs(0 - x0) * slope).astype(np.int64)
    cp = np.round(np.abs(1 - x0) * slope).astype(np.int64)
    q = fw._equiangular_q(cm, c0, cp, 8)
    np.testing.assert_allclose(q / 256.0, x0, atol=1.5 / 256)


@pytest.mark.parametrize("r_n, c_n, ma, mx", [(8, 192, None, 3), (16, 100, 12, 5), (4, 64, 1, 0)])
def test_operation_count_closed_form(r_n, c_n, ma, mx):
    ops = fw.operation_count(r_n, c_n, max_along=ma, max_across=mx)
    m = r_n - 3 if ma is None else ma
    # sum_{|d|<=m} (R - |d|) = R (2m + 1) - m (m + 1); the same across (arithmetic series).
    s_along = r_n * (2 * m + 1) - m * (m + 1)
    s_across = c_n * (2 * mx + 1) - mx * (mx + 1)
    assert ops["candidates"] == (2 * m + 1) * (2 * mx + 1)
    assert ops["abs"] == ops["add"] == s_along * s_across
    assert ops["total"] == 3 * s_along * s_across + r_n * c_n + 6 + 3 * (ops["candidates"] + 2)


@pytest.mark.parametrize("step, tol_rms", [((2.0, 0.0), 0.02), ((1.37, 0.21), 0.1),
                                           ((0.5, 0.1), 0.15)])
def test_accuracy_against_truth_and_float_path(tex, step, tol_rms):
    pos, u8 = _frames(tex, step)
    est = fw.estimate_shifts_int(u8)
    err = est.shift_px - np.diff(pos, axis=0)
    rms = np.sqrt((err ** 2).mean(axis=0))
    # Measured per-step RMS (key frames): (2, 0): 0.013/0.002; (1.37, 0.21): 0.055/0.092;
    # (0.5, 0.1): 0.089/0.096 px. The equiangular fit is biased on a smooth (not V-shaped)
    # SAD valley; positions add the errors up once per key frame.
    assert rms.max() < tol_rms
    res = fw.stitch_int(u8)
    assert isinstance(res, Reconstruction) and res.options["mode"] == "integer"
    np.testing.assert_allclose(res.positions[1:] - res.positions[:-1], est.shift_px, atol=1e-12)
    ref = stitch(u8)
    e_int = np.abs(res.positions - pos).max()
    e_flt = np.abs(ref.positions - pos).max()
    assert e_flt <= e_int + 0.05          # the float path is at least as good


def test_to_uint8_and_bad_input(tex):
    _, u8 = _frames(tex, (2.0, 0.0), t_n=4)
    assert u8.dtype == np.uint8 and u8.min() == 0 and u8.max() == 255
    with pytest.raises(ValueError, match="high must be greater than low"):
        fw.to_uint8(np.zeros((2, 4, 4)))
    with pytest.raises(ValueError, match="max_along"):
        fw.estimate_shifts_int(u8, max_along=8)
    with pytest.raises(ValueError, match="offset must have shape"):
        fw.estimate_shifts_int(u8, offset=np.zeros((3, 3), np.int16))
    with pytest.raises(TypeError, match="offset must be an integer"):
        fw.estimate_shifts_int(u8, offset=np.zeros((8, 64)))


def test_key_frames_accumulate_less_than_successive_pairs(tex):
    # Slow swipe (0.5 px/frame): successive pairs add a biased step 160 times (measured
    # 14 px lateral drift); key frames about once every 6 frames (measured 0.8 px).
    pos, u8 = _frames(tex, (0.5, 0.1))
    err = {}
    for ref in ("previous", "keyframe"):
        est = fw.estimate_shifts_int(u8, reference=ref)
        p = est.positions_q() / 256.0
        err[ref] = np.abs(p - pos).max(axis=0)
    assert err["keyframe"][1] < 0.2 * err["previous"][1]
    assert err["keyframe"].max() < 2.0
    with pytest.raises(ValueError, match="reference must be one of"):
        fw.estimate_shifts_int(u8, reference="first")
