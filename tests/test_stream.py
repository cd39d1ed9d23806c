"""Tests for the streaming stitcher (stripstitch.stream).

Ground truth: frames cut from a band-limited periodic texture at known sub-pixel positions by
exact Fourier shifts (``scipy.ndimage.fourier_shift``; conftest.band_texture/cut_frames), so
every placement can be checked against the positions the frames were cut at, and the batch
``stitch`` on the same frames is a second, independent reference.
"""

import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).parent))
from conftest import band_texture, cut_frames  # noqa: E402

from stripstitch import stitch  # noqa: E402
from stripstitch._types import Reconstruction, ReconstructionError  # noqa: E402
from stripstitch.stream import StreamingStitcher, StreamUpdate  # noqa: E402


@pytest.fixture(scope="module")
def tex():
    return band_texture((700, 96), seed=3)


def _ramp(n):
    """Smooth 0 -> 1 over n frames (raised cosine), so accelerations stay within the motion
    prior (a finger does not change speed within one frame)."""
    return 0.5 - 0.5 * np.cos(np.linspace(0.0, np.pi, n))


def _speeds(kind, t_n):
    t = np.arange(t_n)
    if kind == "steady":
        return np.full(t_n, 1.37), np.full(t_n, 0.21)
    if kind == "varying":
        return 1.5 + 0.5 * np.sin(t / 23.0), 0.15 * np.cos(t / 31.0)
    if kind == "stall":
        v = np.full(t_n, 1.6)
        v[80:110] = 1.6 * (1.0 - _ramp(30))
        v[110:150] = 0.0
        v[150:180] = 1.6 * _ramp(30)
        return v, np.zeros(t_n)
    if kind == "backtrack":
        v = np.full(t_n, 1.5)
        v[100:130] = 1.5 - 2.5 * _ramp(30)
        v[130:150] = -1.0
        v[150:180] = -1.0 + 2.5 * _ramp(30)
        return v, np.zeros(t_n)
    raise ValueError(kind)


def _swipe(tex, kind, t_n=320):
    va, vc = _speeds(kind, t_n)
    pos = np.zeros((t_n, 2))
    pos[1:, 0] = np.cumsum(va[1:])
    pos[1:, 1] = np.cumsum(vc[1:])
    shift = np.array([20.0 - np.floor(min(0.0, pos[:, 0].min())),
                      8.0 - np.floor(min(0.0, pos[:, 1].min()))])
    # frames[t][r, c] = tex(8 + shift + pos[t] + (r, c)) (cut_frames origin (8, 0))
    return pos, cut_frames(tex, pos + shift, origin=(8, 0)), shift + [8.0, 0.0]


def _source_ncc(res, tex, corner):
    """Pearson correlation of the image with the texture it was cut from: image pixel
    (i, j) shows texture pixel corner + (i, j) - origin_px (the texture is periodic)."""
    o = res.origin_px
    assert np.allclose(o, np.round(o))              # output grid = sensor grid
    ii, jj = np.indices(res.image.shape)
    src = tex[(ii - int(o[0]) + int(corner[0])) % tex.shape[0],
              (jj - int(o[1]) + int(corner[1])) % tex.shape[1]]
    ok = np.isfinite(res.image)
    return np.corrcoef(res.image[ok], src[ok])[0, 1]


def _stream(frames, **kw):
    s = StreamingStitcher(**kw)
    updates = [s.push(f) for f in frames]
    return s, updates, s.finish()


def _overlap(a, b):
    """Pixels of two reconstructions at the same absolute grid position (origin_px)."""
    oa = np.round(a.origin_px).astype(int)
    ob = np.round(b.origin_px).astype(int)
    lo = np.maximum(-oa, -ob)
    hi = np.minimum(np.array(a.image.shape) - oa, np.array(b.image.shape) - ob)
    ia = a.image[lo[0] + oa[0]:hi[0] + oa[0], lo[1] + oa[1]:hi[1] + oa[1]]
    ib = b.image[lo[0] + ob[0]:hi[0] + ob[0], lo[1] + ob[1]:hi[1] + ob[1]]
    m = np.isfinite(ia) & np.isfinite(ib)
    return ia[m], ib[m]


@pytest.mark.parametrize("kind", ["steady", "varying", "stall", "backtrack"])
def test_stream_equals_batch_and_truth(tex, kind):
    pos, frames, corner = _swipe(tex, kind)
    batch = stitch(frames)
    _, updates, res = _stream(frames)
    assert isinstance(res, Reconstruction)
    # Against ground truth: every frame within 0.25 px (measured: at most 0.18 px).
    assert np.abs(res.positions - pos).max() < 0.25
    # Against the batch path, per axis, wherever the batch itself is right (within 0.25 px
    # of the truth). Measured: the batch slips sideways by 0.5-3 px after the start of the
    # "stall" and in "varying" (a batch defect, reported), so there only its along-swipe
    # positions and the frames before the slip are compared.
    good = np.abs(batch.positions - pos) < 0.25
    assert good[:, 0].mean() > 0.5
    for k in range(2):
        np.testing.assert_allclose(res.positions[good[:, k], k], batch.positions[good[:, k], k],
                                   atol=0.25)
    # Image: equals the source texture (bilinear splatting blurs slightly: a one-pixel
    # tent kernel, so 0.99 as in test_pipeline) and the batch image where both cover.
    assert _source_ncc(res, tex, corner) >= 0.99
    a, b = _overlap(res, batch)
    assert a.size > 0.8 * np.isfinite(batch.image).sum()
    if good.all():      # where the batch placed every frame right, the images agree too
        assert np.corrcoef(a, b)[0, 1] >= 0.99          # Pearson correlation (numpy)
    # Rows were handed out during the swipe, not only at the end.
    assert sum(len(u.rows) for u in updates) > 0.1 * res.image.shape[0]
