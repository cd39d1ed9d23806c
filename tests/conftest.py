"""Shared fixtures: band-limited textures cut into frames at known shifts."""

import numpy as np
import pytest
from scipy import ndimage


def band_texture(shape, *, period_px=9.0, rel_bandwidth=0.15, seed=0):
    """Periodic, band-limited random texture with a ridge-like period (isotropic ring).

    Band-limited and periodic, so exact sub-pixel shifts of it are available from
    ``scipy.ndimage.fourier_shift`` (an outside reference for the shifted frames).
    """
    rng = np.random.default_rng(seed)
    spec = np.fft.fft2(rng.standard_normal(shape))
    fy = np.fft.fftfreq(shape[0])[:, None]
    fx = np.fft.fftfreq(shape[1])[None, :]
    f = np.hypot(fy, fx)
    ring = np.exp(-0.5 * ((f - 1.0 / period_px) / (rel_bandwidth / period_px)) ** 2)
    img = np.real(np.fft.ifft2(spec * ring))
    return img / img.std()


def photo_finger(name):
    """The named image bundled with scikit-image (an outside texture) as a simulated finger
    surface at 25.4 um per pixel: grey levels, the central 600 x 600 of larger images (as
    benchmarks/bench_photos.py takes them)."""
    import skimage.data
    from skimage.color import rgb2gray

    from stripstitch import simulate

    im = getattr(skimage.data, name)()
    if im.ndim == 3:
        im = rgb2gray(im[..., :3])
    if im.shape[0] > 700:
        c0, c1 = im.shape[0] // 2, im.shape[1] // 2
        im = im[c0 - 300:c0 + 300, c1 - 300:c1 + 300]
    return simulate.texture_finger(np.asarray(im, dtype=np.float64), pixel_um=25.4)


def cut_frames(texture, positions, *, n_rows=8, n_cols=64, origin=(8, 8)):
    """Frames of ``texture`` at (along, across) ``positions`` by exact Fourier shifts.

    Frame t is the window at ``origin`` of the texture shifted by -positions[t], so that
    frames[t][r, c] = texture(origin + positions[t] + (r, c)) (library convention).
    """
    ft = np.fft.fft2(texture)
    out = []
    for p in np.asarray(positions, dtype=float):
        shifted = np.real(np.fft.ifft2(ndimage.fourier_shift(ft, -p)))
        out.append(shifted[origin[0]:origin[0] + n_rows, origin[1]:origin[1] + n_cols])
    return np.stack(out)


@pytest.fixture(scope="session")
def texture():
    return band_texture((256, 96), seed=3)
