"""Fusion on a uniform grid: exact for whole-pixel placement, exact for linear images."""

import numpy as np
import pytest

from stripstitch import mosaic


def test_integer_placement_rebuilds_the_source():
    # Frames cut from a source at whole-pixel positions (common practice: the frames are the
    # source's own samples) must fuse back to that source exactly.
    rng = np.random.default_rng(0)
    src = rng.standard_normal((60, 20))
    pos = np.stack([np.arange(0, 50, 2), np.zeros(25)], 1).astype(float)
    frames = np.stack([src[int(p):int(p) + 8] for p in pos[:, 0]])
    m = mosaic.fuse(frames, pos)
    assert m.image.shape == (56, 20)
    np.testing.assert_allclose(m.image, src[:56], atol=1e-12)
    assert m.origin_px.tolist() == [0.0, 0.0]


def test_linear_ramp_is_reproduced_at_subpixel_positions():
    # Normalised convolution (Knutsson & Westin 1993) of a linear field with bilinear weights
    # returns the field at the weights' centre of mass; where samples surround a pixel at
    # many sub-pixel phases that centre is the pixel itself. At the border the samples lie
    # on one side only, so only the interior is checked.
    t_n, r_n, c_n = 120, 8, 16
    pos = np.stack([np.arange(t_n) * 0.37, 0.3 + 0.0 * np.arange(t_n)], 1)
    r = np.arange(r_n)[None, :, None] + pos[:, 0, None, None]
    c = np.arange(c_n)[None, None, :] + pos[:, 1, None, None]
    frames = 2.0 * r - 0.5 * c + 3.0
    m = mosaic.fuse(frames, pos)
    ii, jj = np.indices(m.image.shape)
    expect = 2.0 * (ii - m.origin_px[0]) - 0.5 * (jj - m.origin_px[1]) + 3.0
    inner = np.zeros(m.image.shape, bool)
    inner[10:-10, 3:-3] = True       # away from the first and last frames too
    inner &= m.weight > 1.0
    assert inner.mean() > 0.3
    np.testing.assert_allclose(m.image[inner], expect[inner], atol=0.05)


def test_no_nan_where_weight_and_nan_elsewhere():
    frames = np.ones((3, 4, 5))
    m = mosaic.fuse(frames, [[0, 0], [10, 0], [20, 0]])      # gaps between the frames
    assert np.isnan(m.image).any()
    assert np.isfinite(m.image[m.weight >= 0.05]).all()
    assert (m.weight[np.isnan(m.image)] < 0.05).all()


def test_bad_weights_rejected():
    with pytest.raises(ValueError, match="weights must have shape"):
        mosaic.fuse(np.ones((2, 4, 5)), [[0, 0], [1, 0]], weights=np.ones((3, 3)))
    with pytest.raises(ValueError, match="positions must have shape"):
        mosaic.fuse(np.ones((2, 4, 5)), [[0, 0]])


def _splat_reference(frames, pos, ang_deg, w, pitch):
    """Bilinear splatting written out with numpy (np.add.at), the formula of fuse's docstring."""
    t_n, r_n, c_n = frames.shape
    q = mosaic.frame_coordinates(frames.shape, pos, ang_deg) / pitch
    f0, f1 = q[..., 0].ravel(), q[..., 1].ravel()
    lo0, lo1 = np.floor(f0.min()), np.floor(f1.min())
    f0, f1 = f0 - lo0, f1 - lo1
    i0, i1 = np.floor(f0).astype(int), np.floor(f1).astype(int)
    a0, a1 = f0 - i0, f1 - i1
    acc = np.zeros((i0.max() + 2, i1.max() + 2))
    wacc = np.zeros_like(acc)
    v, ww = frames.ravel(), w.ravel()
    for di, wa in ((0, 1 - a0), (1, a0)):
        for dj, wb in ((0, 1 - a1), (1, a1)):
            np.add.at(acc, (i0 + di, i1 + dj), ww * wa * wb * v)
            np.add.at(wacc, (i0 + di, i1 + dj), ww * wa * wb)
    return acc, wacc, np.array([-lo0, -lo1])


@pytest.mark.parametrize("rotated, pitch", [(False, (1.0, 1.0)), (True, (1.0, 1.0)),
                                            (False, (0.9, 1.1)), (True, (1.2, 0.8))])
def test_compiled_splat_matches_the_formula(rotated, pitch):
    # The compiled kernel (with its fast path for unrotated frames at the sensor pitch across)
    # against the same sums written out in numpy.
    rng = np.random.default_rng(4)
    t_n, r_n, c_n = 30, 6, 20
    frames = rng.standard_normal((t_n, r_n, c_n)).astype(np.float32)
    pos = np.cumsum(rng.uniform(0.1, 1.5, size=(t_n, 2)), axis=0) * [1.0, 0.2]
    ang = rng.uniform(-3, 3, t_n) if rotated else np.zeros(t_n)
    w = rng.uniform(0, 1, size=frames.shape)
    w[w < 0.2] = 0.0
    m = mosaic.fuse(frames, pos, ang, weights=w, output_pitch_px=pitch, min_weight=1e-9)
    acc, wacc, origin = _splat_reference(frames.astype(float), pos, ang, w, np.array(pitch))
    # same grid up to the trimmed border
    r0 = int(round(origin[0] - m.origin_px[0]))
    c0 = int(round(origin[1] - m.origin_px[1]))
    h, wd = m.weight.shape
    np.testing.assert_allclose(m.weight, wacc[r0:r0 + h, c0:c0 + wd], rtol=1e-9, atol=1e-12)
    seen = wacc[r0:r0 + h, c0:c0 + wd] >= 1e-9
    np.testing.assert_allclose(m.image[seen], (acc / np.where(wacc > 0, wacc, 1))[r0:r0 + h, c0:c0 + wd][seen],
                               rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("rotated", [False, True])
def test_separable_weights_match_the_full_weight_array(rotated):
    # The pipeline's fusion passes one weight per frame (a broadcast view) and one per plate;
    # the result must equal fuse() with their product written out as a full weight array.
    rng = np.random.default_rng(9)
    t_n, r_n, c_n = 25, 5, 16
    frames = rng.standard_normal((t_n, r_n, c_n)).astype(np.float32)
    pos = np.cumsum(rng.uniform(0.1, 1.2, size=(t_n, 2)), axis=0) * [1.0, 0.1]
    ang = rng.uniform(-2, 2, t_n) if rotated else np.zeros(t_n)
    fw = (rng.uniform(size=t_n) > 0.3).astype(np.float32)
    pw = (rng.uniform(size=(r_n, c_n)) > 0.2).astype(np.float64)
    full = mosaic.fuse(frames, pos, ang, weights=fw[:, None, None] * pw[None])
    sep = mosaic._fuse(frames, pos, ang, np.broadcast_to(fw[:, None, None], frames.shape), pw,
                       np.array([1.0, 1.0]), 0.05)
    np.testing.assert_array_equal(sep.weight, full.weight)
    np.testing.assert_array_equal(np.isnan(sep.image), np.isnan(full.image))
    np.testing.assert_allclose(sep.image[~np.isnan(sep.image)], full.image[~np.isnan(full.image)])
    np.testing.assert_array_equal(sep.origin_px, full.origin_px)
