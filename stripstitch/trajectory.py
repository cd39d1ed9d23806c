"""Trajectory stage: joint robust least-squares solve of frame positions and angles.

In: pairwise estimates (shift, rotation, information matrices) over many frame pairs at
several baselines, frame times. Out: per-frame positions (T, 2), angles (T,), per-frame
information and the robust weight each pair kept.

Using pairs at several baselines makes the position error grow far slower than the frame
count (a chain of N small steps has an error that grows as sqrt(N) and accumulates any bias
N times). Per-pair 2x2 information matrices let an ambiguous pair (ridges parallel to the
swipe: the aperture problem) inform only the direction it measures; a weak motion prior
(penalised acceleration) fills in the rest and carries the trajectory across gaps.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import sparse
from scipy.sparse import linalg as splinalg

__all__ = ["Trajectory", "solve_angles", "solve_positions", "rot"]


def rot(theta):
    """Rotation matrices [[cos, -sin], [sin, cos]] for an array of angles (radians)."""
    c, s = np.cos(theta), np.sin(theta)
    return np.stack([np.stack([c, -s], -1), np.stack([s, c], -1)], -2)


@dataclass(frozen=True, eq=False)
class Trajectory:
    """Solved trajectory.

    Attributes
    ----------
    positions : (T, 2) float64
        Frame positions (px, frame 0's axes), ``positions[0] == 0``.
    angles_rad : (T,) float64
    frame_info : (T, 2, 2) float64
        Information about each frame's position from the pairs touching it (after robust
        weighting), without the motion prior.
    pair_weight : (P,) float64
        Robust weight in [0, 1] each pair kept (0: rejected as an outlier or failed).
    pair_residual : (P,) float64
        Mahalanobis residual of each pair at the solution.
    """

    positions: np.ndarray
    angles_rad: np.ndarray
    frame_info: np.ndarray
    pair_weight: np.ndarray
    pair_residual: np.ndarray


def _prior_coefficients(dt, sigma_acc, cut=None):
    """The rows of :func:`_prior_rows` as (k, coeffs): row i weighs x[k[i] - 1], x[k[i]],
    x[k[i] + 1] by coeffs[i]."""
    t_n = len(dt) + 1
    k = np.arange(1, max(t_n - 1, 1))
    if cut is not None and k.size:
        k = k[~(cut[k - 1] | cut[k])]
    a = 1.0 / dt[k]
    b = 1.0 / dt[k - 1]
    s = sigma_acc * 0.5 * (dt[k] + dt[k - 1])
    return k, np.stack([b, -(a + b), a], 1) / s[:, None]


def _prior_rows(dt, sigma_acc, cut=None):
    """Second-difference (acceleration) prior rows for a 1-D chain with time steps dt.

    Residual: (x[t+1] - x[t]) / dt[t] - (x[t] - x[t-1]) / dt[t-1], with standard deviation
    sigma_acc * (dt[t] + dt[t-1]) / 2 (px per nominal frame squared). No row spans a link
    marked in ``cut`` (T-1,) (a gap).
    """
    t_n = len(dt) + 1
    if t_n < 3:
        return np.zeros((0, t_n))
    k, coef = _prior_coefficients(dt, sigma_acc, cut)
    rows = np.repeat(np.arange(len(k)), 3)
    cols = np.stack([k - 1, k, k + 1], 1).ravel()
    return sparse.csr_matrix((coef.ravel(), (rows, cols)), shape=(len(k), t_n))


def _prior_gram_bands(dt, sigma_acc, cut=None):
    """Diagonals 0, 1 and 2 of D^T D for the rows D of :func:`_prior_rows` (pentadiagonal),
    without forming D: (3, T), the diagonal d holding D^T D[t, t + d] at index t."""
    t_n = len(dt) + 1
    bands = np.zeros((3, t_n))
    if t_n < 3:
        return bands
    k, c = _prior_coefficients(dt, sigma_acc, cut)
    for i in range(3):
        np.add.at(bands[0], k - 1 + i, c[:, i] ** 2)
    np.add.at(bands[1], k - 1, c[:, 0] * c[:, 1])
    np.add.at(bands[1], k, c[:, 1] * c[:, 2])
    np.add.at(bands[2], k - 1, c[:, 0] * c[:, 2])
    return bands


def _robust_weights(m, kind):
    """Huber or Cauchy IRLS weights for normalised residuals m (Huber 1964; Holland & Welsch 1977)."""
    k = 3.0
    if kind == "huber":
        return np.where(m <= k, 1.0, k / np.maximum(m, 1e-12))
    return 1.0 / (1.0 + (m / k) ** 2)


def _rate_rows(dt, sigma_rate):
    """First-difference (random-walk) prior rows: (x[t+1] - x[t]) with standard deviation
    sigma_rate * sqrt(dt[t]). Where no data speaks, the solution stays constant instead of
    continuing a trend (a second-difference prior would extrapolate the nearest slope)."""
    t_n = len(dt) + 1
    if t_n < 2:
        return np.zeros((0, t_n))
    k = np.arange(t_n - 1)
    s = sigma_rate * np.sqrt(dt)
    rows = np.repeat(k, 2)
    cols = np.stack([k, k + 1], 1).ravel()
    vals = (np.stack([-1.0 / s, 1.0 / s], 1)).ravel()
    return sparse.csr_matrix((vals, (rows, cols)), shape=(t_n - 1, t_n))


def solve_angles(n_frames, pairs, dtheta, info, dt, *, sigma_acc_rad=1e-4, sigma_rate_rad=None,
                 iterations=4):
    """Robust least squares for frame angles from pairwise rotations.

    Parameters
    ----------
    n_frames : int
    pairs : (P, 2) int
    dtheta : (P,) float
        Rotation of frame j relative to frame i (radians).
    info : (P,) float
        Information of each measurement (rad^-2); 0 for unused pairs.
    dt : (T-1,) float
        Time steps in nominal frames.
    sigma_acc_rad : float
        Prior standard deviation of the angular acceleration per nominal frame squared.
    sigma_rate_rad : float, optional
        If given, a random-walk prior instead: standard deviation of the angle change per
        nominal frame. Frames no pair informs (no finger yet) then keep the angle of the
        nearest informed frame rather than extrapolating its trend. Default None.

    Returns
    -------
    angles : (T,) float64 with angles[0] == 0
    """
    pairs = np.asarray(pairs)
    use = info > 0
    w = np.ones(len(pairs))
    prior = _prior_rows(dt, sigma_acc_rad) if sigma_rate_rad is None else _rate_rows(dt, sigma_rate_rad)
    theta = np.zeros(n_frames)
    for it in range(iterations):
        wi = np.sqrt(info * w) * use
        p = len(pairs)
        rows = np.repeat(np.arange(p), 2)
        cols = pairs.ravel()
        vals = (np.stack([-wi, wi], 1)).ravel()
        a_mat = sparse.csr_matrix((vals, (rows, cols)), shape=(p, n_frames))
        b = wi * dtheta
        full = sparse.vstack([a_mat, prior]).tocsc()[:, 1:]
        rhs = np.concatenate([b, np.zeros(prior.shape[0])])
        nrm = (full.T @ full).tocsc() + sparse.identity(n_frames - 1, format="csc") * 1e-12
        sol = splinalg.spsolve(nrm, full.T @ rhs)
        theta = np.concatenate([[0.0], np.atleast_1d(sol)])
        r = (theta[pairs[:, 1]] - theta[pairs[:, 0]] - dtheta) * np.sqrt(info)
        m = np.abs(r)
        scale = max(1.0, 1.4826 * np.median(m[use])) if use.any() else 1.0
        w = _robust_weights(m / scale, "huber" if it < 1 else "cauchy")
    return theta


def solve_positions(n_frames, pairs, shift, info, angles_rad, dt, *, sigma_acc_px=0.05,
                    iterations=5, init_weight=None):
    """Robust least squares for frame positions from pairwise shifts.

    Minimises ``sum_p w_p e_p^T I_p' e_p + sum_t |acc_t|^2 / s_t^2`` with
    ``e_p = x_j - x_i - Rot(theta_i) delta_p`` and ``I_p' = Rot(theta_i) I_p Rot(theta_i)^T``,
    by iteratively reweighted least squares (Huber, then Cauchy weights on the Mahalanobis
    residual scaled by its robust spread).

    Parameters
    ----------
    n_frames : int
    pairs : (P, 2) int
    shift : (P, 2) float
        Position of j relative to i in frame i's axes (px).
    info : (P, 2, 2) float
        Information matrices (px^-2); zero for unused pairs.
    angles_rad : (T,) float
    dt : (T-1,) float
        Time steps in nominal frames (1 for consecutive frames, more across dropped frames).
    sigma_acc_px : float
        Prior acceleration standard deviation, px per nominal frame squared. Default 0.05.

    Returns
    -------
    Trajectory
    """
    pairs = np.asarray(pairs, dtype=np.int64)
    p_n = len(pairs)
    rt = rot(angles_rad[pairs[:, 0]])
    meas = np.einsum("pab,pb->pa", rt, shift)
    inf_r = rt @ info @ np.transpose(rt, (0, 2, 1))
    inf_r = 0.5 * (inf_r + np.transpose(inf_r, (0, 2, 1)))
    use = np.trace(inf_r, axis1=1, axis2=2) > 0
    # Whitening factor L^T with I = L L^T (2x2 Cholesky, with a floor for singular matrices).
    eps = 1e-12 * (np.trace(inf_r, axis1=1, axis2=2) + 1e-30)
    a11 = np.sqrt(np.maximum(inf_r[:, 0, 0], 0) + eps)
    l21 = inf_r[:, 1, 0] / a11
    a22 = np.sqrt(np.maximum(inf_r[:, 1, 1] - l21 ** 2, 0) + eps)
    # rows of L^T: [[a11, l21], [0, a22]]
    lt = np.zeros((p_n, 2, 2))
    lt[:, 0, 0] = a11
    lt[:, 0, 1] = l21
    lt[:, 1, 1] = a22
    lt[~use] = 0.0
    prior1 = _prior_rows(dt, sigma_acc_px)
    # Interleaved unknowns: x[t, 0] -> 2t, x[t, 1] -> 2t + 1.
    prior = sparse.kron(prior1, sparse.identity(2), format="csr") if prior1.shape[0] else \
        sparse.csr_matrix((0, 2 * n_frames))
    w = np.ones(p_n) if init_weight is None else np.asarray(init_weight, dtype=np.float64).copy()
    pos = np.zeros((n_frames, 2))
    m = np.zeros(p_n)
    for it in range(iterations):
        sw = np.sqrt(w)[:, None, None] * lt                     # (P, 2, 2)
        # Row k of pair p: sw[p, k, :] . (x_j - x_i) = sw[p, k, :] . meas_p
        rows = np.repeat(np.arange(2 * p_n), 4)
        ci = 2 * pairs[:, 0]
        cj = 2 * pairs[:, 1]
        cols = np.stack([
            np.stack([cj, cj + 1, ci, ci + 1], 1),
            np.stack([cj, cj + 1, ci, ci + 1], 1)], 1).reshape(-1)
        vals = np.stack([
            np.stack([sw[:, 0, 0], sw[:, 0, 1], -sw[:, 0, 0], -sw[:, 0, 1]], 1),
            np.stack([sw[:, 1, 0], sw[:, 1, 1], -sw[:, 1, 0], -sw[:, 1, 1]], 1)], 1).reshape(-1)
        a_mat = sparse.csr_matrix((vals, (rows, cols)), shape=(2 * p_n, 2 * n_frames))
        b = np.einsum("pab,pb->pa", sw, meas).reshape(-1)
        full = sparse.vstack([a_mat, prior]).tocsc()[:, 2:]
        rhs = np.concatenate([b, np.zeros(prior.shape[0])])
        nrm = (full.T @ full).tocsc()
        nrm = nrm + sparse.identity(nrm.shape[0], format="csc") * 1e-10
        sol = splinalg.spsolve(nrm, full.T @ rhs)
        pos = np.concatenate([[0.0, 0.0], np.atleast_1d(sol)]).reshape(n_frames, 2)
        e = pos[pairs[:, 1]] - pos[pairs[:, 0]] - meas
        we = np.einsum("pab,pb->pa", lt, e)
        m = np.sqrt((we ** 2).sum(1))
        scale = max(1.0, 1.4826 * float(np.median(m[use]))) if use.any() else 1.0
        w_new = _robust_weights(m / scale, "huber" if it < 2 else "cauchy")
        w = w_new if init_weight is None else w_new * np.asarray(init_weight)
        w[~use] = 0.0
    # Per-frame information from the pairs (robust-weighted), for confidence.
    frame_info = np.zeros((n_frames, 2, 2))
    wi = w[:, None, None] * inf_r
    np.add.at(frame_info, pairs[:, 0], wi)
    np.add.at(frame_info, pairs[:, 1], wi)
    return Trajectory(positions=pos, angles_rad=np.asarray(angles_rad, dtype=np.float64),
                      frame_info=frame_info, pair_weight=w, pair_residual=m)
