"""Joint trajectory solve: exact recovery, robustness to outliers, gaps bridged by the prior."""

import numpy as np

from stripstitch import trajectory as tj


def _walk(t_n, rng):
    steps = np.stack([0.5 + 0.2 * np.sin(np.arange(t_n - 1) / 15.0),
                      0.05 + 0.02 * np.cos(np.arange(t_n - 1) / 20.0)], 1)
    return np.vstack([[0.0, 0.0], np.cumsum(steps, 0)])


def _pairs(t_n, lags=(1, 4, 9)):
    return np.concatenate([np.stack([np.arange(t_n - k), np.arange(k, t_n)], 1) for k in lags])


def test_exact_measurements_recovered():
    rng = np.random.default_rng(0)
    pos = _walk(200, rng)
    pairs = _pairs(200)
    shift = pos[pairs[:, 1]] - pos[pairs[:, 0]]
    a = rng.standard_normal((len(pairs), 2, 2))
    info = 1e4 * (a @ a.transpose(0, 2, 1) + 0.1 * np.eye(2))     # anisotropic, SPD
    tr = tj.solve_positions(200, pairs, shift, info, np.zeros(200), np.ones(199))
    # Only the weak acceleration prior pulls against exact data: sub-millipixel error.
    np.testing.assert_allclose(tr.positions, pos, atol=2e-3)
    assert tr.positions[0].tolist() == [0.0, 0.0]


def test_rotation_applied_to_measurements():
    # With frame angles known, a shift measured in frame i's axes is rotated into frame 0's.
    t_n = 60
    ang = np.linspace(0.0, np.deg2rad(3.0), t_n)
    pos = _walk(t_n, None)
    pairs = _pairs(t_n, (1, 3))
    world = pos[pairs[:, 1]] - pos[pairs[:, 0]]
    rinv = tj.rot(-ang[pairs[:, 0]])
    shift = np.einsum("pab,pb->pa", rinv, world)
    info = np.tile(np.eye(2) * 1e4, (len(pairs), 1, 1))
    tr = tj.solve_positions(t_n, pairs, shift, info, ang, np.ones(t_n - 1))
    np.testing.assert_allclose(tr.positions, pos, atol=2e-3)


def test_outliers_rejected_by_robust_weights():
    rng = np.random.default_rng(1)
    pos = _walk(150, rng)
    pairs = _pairs(150)
    shift = pos[pairs[:, 1]] - pos[pairs[:, 0]] + rng.normal(0, 0.01, (len(pairs), 2))
    bad = rng.choice(len(pairs), 20, replace=False)
    shift[bad, 1] += 9.0                      # a ridge-period jump, the classic outlier
    info = np.tile(np.eye(2) / 0.01 ** 2, (len(pairs), 1, 1))
    tr = tj.solve_positions(150, pairs, shift, info, np.zeros(150), np.ones(149))
    assert np.abs(tr.positions - pos).max() < 0.05
    assert tr.pair_weight[bad].max() < 0.05 and np.median(np.delete(tr.pair_weight, bad)) > 0.9


def test_gap_bridged_at_constant_velocity():
    # No pair links frames 49 and 50: the acceleration prior carries the motion across.
    t_n = 100
    pos = np.stack([np.arange(t_n) * 0.8, np.zeros(t_n)], 1)
    pairs = _pairs(t_n, (1, 3))
    cross = (pairs[:, 0] <= 49) & (pairs[:, 1] >= 50)
    pairs = pairs[~cross]
    shift = pos[pairs[:, 1]] - pos[pairs[:, 0]]
    info = np.tile(np.eye(2) * 1e4, (len(pairs), 1, 1))
    tr = tj.solve_positions(t_n, pairs, shift, info, np.zeros(t_n), np.ones(t_n - 1))
    np.testing.assert_allclose(tr.positions, pos, atol=1e-2)


def test_angles_from_pairwise_rotations():
    t_n = 80
    ang = np.deg2rad(np.linspace(0, 2.0, t_n))
    pairs = _pairs(t_n, (1, 5))
    d = ang[pairs[:, 1]] - ang[pairs[:, 0]]
    theta = tj.solve_angles(t_n, pairs, d, np.full(len(pairs), 1e8), np.ones(t_n - 1))
    np.testing.assert_allclose(theta, ang, atol=1e-6)
