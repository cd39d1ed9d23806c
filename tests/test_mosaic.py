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
