"""Independent fingerprint analysis for the finger tests: orientation estimated from an image,
Poincare index, minutiae by the crossing number, ridge period by the 2-D FFT peak.

Nothing here imports stripstitch: these are textbook estimators applied to the generated ridge
image, so that the tests compare the generator against outside methods, not against itself.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage
from skimage.feature import structure_tensor
from skimage.morphology import skeletonize


def estimate_orientation(image, *, block=4, sigma_grad=1.0, sigma_smooth=1.0):
    """Block-wise ridge orientation from the gradient structure tensor.

    Gradient structure tensor (Kass & Witkin 1987; Rao 1990; Handbook of Fingerprint
    Recognition, Maltoni et al. 2009, ch. 3): the dominant gradient direction is
    phi = 1/2 atan2(2 J_rc, J_rr - J_cc); ridges run perpendicular to it. The tensor entries
    are averaged over ``block`` x ``block`` blocks, and the doubled-angle vectors are smoothed
    with a Gaussian of ``sigma_smooth`` blocks (common practice) before taking the angle.

    Returns (theta, coherence) on the block grid; theta is the ridge orientation in the
    (row, col) plane, measured from axis 1 towards axis 0, in (-pi/2, pi/2].
    """
    img = np.asarray(image, dtype=float)
    j_rr, j_rc, j_cc = structure_tensor(img, sigma=sigma_grad, order="rc")
    h, w = (img.shape[0] // block) * block, (img.shape[1] // block) * block

    def blocks(a):
        return a[:h, :w].reshape(h // block, block, w // block, block).mean(axis=(1, 3))

    j_rr, j_rc, j_cc = blocks(j_rr), blocks(j_rc), blocks(j_cc)
    # doubled angle of the gradient, measured from the col axis (x) to the row axis (y)
    vx = ndimage.gaussian_filter(j_cc - j_rr, sigma_smooth)
    vy = ndimage.gaussian_filter(2.0 * j_rc, sigma_smooth)
    grad_angle = 0.5 * np.arctan2(vy, vx)
    theta = grad_angle + np.pi / 2          # ridges are perpendicular to the gradient
    theta = (theta + np.pi / 2) % np.pi - np.pi / 2
    coherence = np.hypot(vx, vy) / np.maximum(
        ndimage.gaussian_filter(j_cc + j_rr, sigma_smooth), 1e-300)
    return theta, coherence


def poincare_index(theta):
    """Poincare index on every 2 x 2 loop of an orientation field (Kawagoe & Tojo 1984).

    The index is the sum of the orientation differences along the closed loop
    (0,0) -> (0,1) -> (1,1) -> (1,0) -> (0,0), each wrapped to (-pi/2, pi/2], over 2 pi:
    +1/2 at a core, -1/2 at a delta, 0 elsewhere (Handbook of Fingerprint Recognition,
    Maltoni et al. 2009, ch. 3). Returns an (H-1, W-1) array.
    """
    t = np.asarray(theta, dtype=float)
    loop = [t[:-1, :-1], t[:-1, 1:], t[1:, 1:], t[1:, :-1], t[:-1, :-1]]
    total = np.zeros_like(loop[0])
    for a, b in zip(loop[:-1], loop[1:]):
        d = b - a
        d = (d + np.pi / 2) % np.pi - np.pi / 2
        total += d
    return total / (2 * np.pi)


def count_singular_points(theta, mask):
    """(n_cores, n_deltas, core_cells, delta_cells) of index +-1/2 loops inside ``mask``.

    Neighbouring loops of the same sign are merged (8-connectivity after a one-cell dilation).
    """
    idx = poincare_index(theta)
    m = np.asarray(mask, dtype=bool)[: idx.shape[0], : idx.shape[1]]
    out = []
    for sign in (+1, -1):
        hits = (np.abs(idx - 0.5 * sign) < 0.1) & m
        lab, n = ndimage.label(ndimage.binary_dilation(hits, iterations=1),
                               structure=np.ones((3, 3)))
        cells = ndimage.center_of_mass(hits, lab, range(1, n + 1)) if n else []
        out.append((n, np.array(cells, dtype=float).reshape(-1, 2)))
    return out[0][0], out[1][0], out[0][1], out[1][1]


def count_minutiae(binary_ridges, mask):
    """(n_endings, n_bifurcations) on the skeleton by the crossing number.

    Crossing number CN = 1/2 sum_{i=1..8} |P_i - P_{i+1}| over the 8 neighbours in circular
    order (Arcelli & Baja 1984; Handbook ch. 3): CN = 1 ridge ending, CN = 3 bifurcation.
    Only skeleton pixels inside ``mask`` count.
    """
    skel = skeletonize(np.asarray(binary_ridges, dtype=bool)).astype(np.int8)
    p = np.pad(skel, 1)
    # 8 neighbours in circular order
    offs = [(-1, 0), (-1, 1), (0, 1), (1, 1), (1, 0), (1, -1), (0, -1), (-1, -1)]
    nb = [p[1 + dr: p.shape[0] - 1 + dr, 1 + dc: p.shape[1] - 1 + dc] for dr, dc in offs]
    cn = sum(np.abs(nb[i].astype(int) - nb[(i + 1) % 8]) for i in range(8)) // 2
    on = (skel == 1) & np.asarray(mask, dtype=bool)
    return int(np.count_nonzero(on & (cn == 1))), int(np.count_nonzero(on & (cn == 3)))


def fft_peak_period(patch, spacing):
    """Dominant period (in the units of ``spacing``) of a patch: the 2-D FFT magnitude peak.

    The patch is de-meaned and Hann-windowed (common practice against leakage); the peak
    location is refined by the magnitude-weighted centroid of its 3 x 3 neighbourhood.
    """
    a = np.asarray(patch, dtype=float)
    a = a - a.mean()
    win = np.outer(np.hanning(a.shape[0]), np.hanning(a.shape[1]))
    n0, n1 = 8 * a.shape[0], 8 * a.shape[1]            # zero padding for a finer grid
    mag = np.abs(np.fft.fftshift(np.fft.fft2(a * win, s=(n0, n1))))
    c0, c1 = n0 // 2, n1 // 2
    mag[c0 - 2: c0 + 3, c1 - 2: c1 + 3] = 0.0          # ignore the DC neighbourhood
    r, c = np.unravel_index(np.argmax(mag), mag.shape)
    sl = mag[r - 1: r + 2, c - 1: c + 2]
    rr, cc = np.mgrid[r - 1: r + 2, c - 1: c + 2]
    fr = ((rr * sl).sum() / sl.sum() - c0) / (n0 * spacing)
    fc = ((cc * sl).sum() / sl.sum() - c1) / (n1 * spacing)
    return 1.0 / np.hypot(fr, fc)
