"""Pipeline: ``stitch(frames, **options)`` composes preparation, registration, the trajectory
solve, fusion and the report into one :class:`~stripstitch.Reconstruction`."""

from __future__ import annotations

from types import SimpleNamespace

import numba
import numpy as np
from scipy.special import erf

from . import mosaic as _mosaic
from . import refine as _refine
from . import register as _reg
from . import report as _report
from . import track as _track
from . import trajectory as _traj
from ._jit import JIT
from ._types import Reconstruction, ReconstructionError
from ._validate import check_array, check_choice, check_frames, check_int, check_positive

__all__ = ["stitch"]

MODES = ("default", "fast")


def _pick_partners(chain_pos, failed, targets, *, max_lag=256, chunk=256):
    """Choose partners along the chain of contact frames whose displacement is nearly whole.

    Two frames whose relative displacement is an integer number of pixels sample the finger
    on the same grid, so the aliasing of the sharp ridge edges (a plate samples a ridge profile
    much sharper than its pitch) cancels between them; at half-pixel displacements it does
    not, and the shift estimate picks up an error of the order of a few hundredths of a pixel.
    For each frame and each integer target displacement ``n`` (along the swipe, either
    direction) the partner is the frame, within ``max_lag`` and not across a failed link,
    whose coarse displacement is closest to (n, round(across)). Target 0 pairs frames of a
    stall with the latest frame still in place. ``max_lag`` (256 frames) bounds the band of
    the normal equations, and so the memory of their sparse factorisation; a longer stall is
    tied together through a chain of such pairs.

    Returns
    -------
    (P, 2) int array of chain indices (i < j), and (P,) the distance of each pair's
    displacement from the nearest whole pixel (max over both axes).
    """
    n = len(chain_pos)
    fail_cum = np.concatenate([[0], np.cumsum(failed.astype(np.int64))])
    k_lag = int(min(max_lag, n - 1))
    if k_lag < 2:
        return np.zeros((0, 2), dtype=np.int64), np.zeros(0)
    lags = np.arange(1, k_lag + 1)
    out_i, out_j, out_c = [], [], []
    for s in range(0, n, chunk):
        k = np.arange(s, min(n, s + chunk))
        j = k[:, None] + lags[None, :]
        valid = j < n
        jj = np.minimum(j, n - 1)
        valid &= fail_cum[jj] == fail_cum[k][:, None]
        disp = chain_pos[jj] - chain_pos[k][:, None, :]
        da = np.abs(disp[..., 0])
        fa = np.abs(disp[..., 1] - np.round(disp[..., 1]))
        for target in targets:
            if target == 0:
                cost = np.hypot(da, disp[..., 1])
                ok = valid & (cost < 0.1) & (lags[None, :] >= 16)
                # the latest frame still in place
                score = np.where(ok, lags[None, :], -1)
                best = np.argmax(score, axis=1)
                sel = score[np.arange(len(k)), best] > 0
                c = cost[np.arange(len(k)), best]
            else:
                cost = np.maximum(np.abs(da - target), fa)
                cost = np.where(valid & (np.abs(disp[..., 1]) <= max(target, 3.0)), cost, np.inf)
                best = np.argmin(cost, axis=1)
                c = cost[np.arange(len(k)), best]
                sel = np.isfinite(c) & (c < 0.5)
            out_i.append(k[sel])
            out_j.append(jj[np.arange(len(k)), best][sel])
            out_c.append(c[sel])
    pi = np.concatenate(out_i)
    pj = np.concatenate(out_j)
    pc = np.concatenate(out_c)
    keep = pj > pi + 1
    pairs = np.stack([pi[keep], pj[keep]], 1)
    pairs, first = np.unique(pairs, axis=0, return_index=True)
    return pairs, pc[keep][first]


def _with_model_error(info, shift, *, floor_px=0.005, alias_px=0.25):
    """Add a model-error covariance to each pair's noise covariance and invert back.

    The noise-only information (from the Gauss-Newton Hessian and residual) ignores errors
    that do not average out over a pair: the aliasing of ridge edges, which vanishes at
    whole-pixel displacements and is largest near half a pixel, and interpolation error.
    Their allowance is ``(floor + alias * 2 d)^2`` per axis, d the distance of the
    displacement from the nearest whole pixel (0..0.5).
    """
    d = np.abs(shift - np.round(shift))
    s = floor_px + alias_px * 2.0 * d                           # (P, 2)
    eye = np.eye(2)[None]
    reg = info + eye * 1e-12 * (np.trace(info, axis1=1, axis2=2)[:, None, None] + 1e-12)
    cov = _inv2(reg) + eye * (s ** 2)[:, :, None]
    out = _inv2(cov)
    out[np.trace(info, axis1=1, axis2=2) <= 0] = 0.0
    return out


# The spread of float frames (their range over every value) is brought into this range of
# powers of two before anything else (see _unit_exponent).
_UNIT_EXP_RANGE = (-8, 40)


def _unit_exponent(x):
    """Power of two that brings float frames in any unit into a working range, or 0.

    The estimators are invariant to a global gain and offset, but some of their floors are
    absolute (a texture floor of 1e-9, histogram bins of a finite width), so frames read in
    farads (a plate's capacitance changes by about 1e-15 F between ridge and valley) or any
    unit far from the codes of an ADC failed as "no finger" or worse. Frames whose spread
    (their range, largest minus smallest value) lies outside 2**-8 .. 2**40 are scaled by
    2**-e, e the spread's binary exponent, which is exact (no rounding); others, and integer
    frames, are left as they are (0).
    """
    if x.dtype.kind != "f":
        return 0
    # the range, not the standard deviation: no squares to overflow or underflow, and only
    # the binary order of magnitude matters
    with np.errstate(over="ignore", invalid="ignore"):
        spread = float(np.max(x)) - float(np.min(x))
    if not np.isfinite(spread) or spread <= 0.0:
        return 0
    e = int(np.frexp(spread)[1])
    return -e if (e < _UNIT_EXP_RANGE[0] or e > _UNIT_EXP_RANGE[1]) else 0


def _inv2(m):
    """Inverse of each 2 x 2 matrix of ``m`` (N, 2, 2) by its adjugate: 409 matrices in 11 us
    against numpy.linalg.inv's 111 us (LAPACK per matrix)."""
    a, b, c, d = m[:, 0, 0], m[:, 0, 1], m[:, 1, 0], m[:, 1, 1]
    det = a * d - b * c
    out = np.empty_like(m)
    out[:, 0, 0] = d / det
    out[:, 0, 1] = -b / det
    out[:, 1, 0] = -c / det
    out[:, 1, 1] = a / det
    return out


def _min_eig2(m):
    """Smaller eigenvalue of each symmetric 2 x 2 matrix of ``m`` (N, 2, 2) (the upper
    triangle is used), in closed form: (a + d) / 2 - sqrt(((a - d) / 2)^2 + b^2) (409
    matrices: 9 us against numpy.linalg.eigvalsh's 124 us)."""
    a, b, d = m[:, 0, 0], m[:, 0, 1], m[:, 1, 1]
    return 0.5 * (a + d) - np.hypot(0.5 * (a - d), b)


def _confidence(frame_info, contact, pair_ok_frac):
    """Probability-like confidence that a frame's placement is within 0.25 px.

    From the smallest eigenvalue of the information the pairs give about the frame (the
    least determined direction; small for ridges parallel to the swipe), assuming Gaussian
    errors: P(|e| < 0.25) = erf(0.25 / (sqrt(2) sigma)).
    """
    lam = np.maximum(_min_eig2(0.5 * (frame_info + np.transpose(frame_info, (0, 2, 1)))), 0.0)
    sigma = 1.0 / np.sqrt(np.maximum(lam, 1e-12))
    conf = erf(0.25 / (np.sqrt(2.0) * sigma)) * pair_ok_frac
    conf[~contact] = 0.0
    return np.clip(conf, 0.0, 1.0)


def stitch(frames, *, pitch_um=50.8, frame_rate_hz=None, timestamps_s=None, calibration=None,
           mode="default", output_pitch_um=None, estimate_rotation=True, motion_prior_px=None,
           max_across_px=None, model_passes=None):
    """Reconstruct one fingerprint image from swipe-sensor frames.

    Parameters
    ----------
    frames : (T, R, C) array_like
        Raw strip frames, any real dtype and any unit (codes, volts, farads: float frames far
        from unit scale are scaled by an exact power of two inside and the image scaled
        back); rows (axis 1) run along the swipe. T >= 2, R >= 2.
    pitch_um : float, optional
        Plate pitch of the sensor in micrometres (both axes). Default is 50.8 (500 ppi).
    frame_rate_hz : float, optional
        Nominal frame rate; needed for speeds and durations in the report. Default is None
        (times in frames; derived from ``timestamps_s`` when given).
    timestamps_s : (T,) array_like, optional
        Frame times in seconds, strictly increasing. Jumps (dropped frames) are used by the
        motion model and reported as gaps. Default is None (uniform frames).
    calibration : object with ``apply(frames)``, optional
        A :class:`stripstitch.calibrate.Calibration` applied before anything else. Default None.
    mode : {"default", "fast"}
        Both place the frames with the key-frame tracker (:mod:`stripstitch.track`, one
        compiled pass); ``"default"`` then refines every frame against a model of the finger
        (stretch, shear, turn, pixel locking), ``"fast"`` stops there (no rotation), for
        drivers. Strips of fewer than 5 rows or 24 columns (too little overlap or texture per
        key frame for the tracker) take the multi-baseline pairs in both modes, several times slower
        (``result.options["placement"]`` says which). Default is "default".
    output_pitch_um : float or (2,) float, optional
        Resample the image to this pitch (e.g. 50.8 for exactly 500 ppi). Default is None
        (the sensor pitch).
    estimate_rotation : bool, optional
        Estimate in-plane rotation of the finger (read in the model refinement). Default is
        True (ignored in fast mode).
    motion_prior_px : float, optional
        Standard deviation of the motion prior (acceleration, px per frame squared). Default
        None: 20 m/s^2 at the given frame rate, else 0.05 px/frame^2.
    max_across_px : int, optional
        Largest lateral shift between successive frames searched. Default None: C // 8
        clipped to 3..12.
    model_passes : int, optional
        Passes of the final refinement of every frame against a super-resolved model of the
        finger (:mod:`stripstitch.refine`); 0 skips it. Default None: after the tracker 2 in
        default mode, then 3 more that correct the turn when the finger turns by a degree or
        more (on strips of 8 rows and 64 columns or more also run when the first reading
        came to 0.75 degrees but was not kept, and kept only if they find a turn of 0.8
        degrees), and 0 in fast mode; after the multi-baseline pairs 6.

    Returns
    -------
    Reconstruction

    Notes
    -----
    1. Per-plate offset and gain (fixed pattern) are removed; dead, stuck and noisy plates
       are excluded; frames without finger texture are set aside.
    2. The key-frame tracker places every frame in one pass: inverse-compositional
       Gauss-Newton with cubic-convolution interpolation (shift, offset) against the current
       and the previous key frame, started from a constant-velocity Kalman prediction that
       also carries the directions an overlap leaves open (ridges parallel to the shift);
       the key frames' positions are part of the filter's state (stochastic cloning [5]_),
       so their errors are corrected rather than inherited, and tracking runs outwards from
       the best-seen frame in the middle of the swipe.
    3. Strips of fewer than 5 rows or 24 columns: successive frames are matched by
       normalised cross-correlation over every integer shift (FFT) and refined by
       Gauss-Newton with a 2x2 information matrix per pair (cluster-robust over blocks of
       columns); frames are also paired at longer baselines at nearly whole-pixel
       displacements; positions are solved jointly by robust (Huber, then Cauchy)
       iteratively reweighted least squares with a weak acceleration prior; the fixed pattern
       is re-estimated against the fused image and the pairs refined again.
    4. Default mode: every frame is refined against a model of the finger finer than the
       plates (:mod:`stripstitch.refine`): this removes the pixel-locking bias of the
       pairwise shifts, the stretch and shear that overlaps hardly see, and reads the
       finger's turn (kept when it adds up to a degree or more).
    5. Every observation is placed at its sub-pixel position on a uniform grid and fused with
       bilinear weights; the report lists gaps, stalls, backtracks, low confidence, skew and
       rotation.

    References
    ----------
    .. [1] S. Baker and I. Matthews, "Lucas-Kanade 20 years on: a unifying framework",
           Int. J. Computer Vision 56(3), 221-255 (2004).
    .. [2] R. Keys, "Cubic convolution interpolation for digital image processing", IEEE
           Trans. ASSP 29(6), 1153-1160 (1981). doi:10.1109/TASSP.1981.1163711
    .. [3] P. W. Holland and R. E. Welsch, "Robust regression using iteratively reweighted
           least-squares", Comm. Statistics 6(9), 813-827 (1977).
    .. [4] H. Knutsson and C.-F. Westin, "Normalized and differential convolution", Proc.
           IEEE CVPR 1993, 515-523. doi:10.1109/CVPR.1993.341081
    .. [5] S. I. Roumeliotis and J. W. Burdick, "Stochastic cloning: a generalized framework
           for processing relative state measurements", Proc. IEEE ICRA 2002, 1788-1795.
           doi:10.1109/ROBOT.2002.1014801

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> from scipy import ndimage
    >>> tex = ndimage.gaussian_filter(rng.standard_normal((400, 64)), 2.0)
    >>> frames = np.stack([tex[2 * t: 2 * t + 8] for t in range(60)])
    >>> result = stitch(frames)
    >>> bool(np.allclose(np.diff(result.positions[:, 0]), 2.0, atol=0.05))
    True
    """
    x = check_frames(frames, min_frames=2, min_rows=2, min_cols=8)
    t_n, r_n, c_n = x.shape
    pitch_um = check_positive(pitch_um, name="pitch_um")
    check_choice(mode, MODES, name="mode")
    frame_rate_hz = check_positive(frame_rate_hz, name="frame_rate_hz", allow_none=True)
    if timestamps_s is not None:
        ts = check_array(timestamps_s, name="timestamps_s", shape=(t_n,))
        dts = np.diff(ts)
        if (dts <= 0).any():
            k = int(np.flatnonzero(dts <= 0)[0])
            raise ValueError(f"timestamps_s must be strictly increasing; got {ts[k]!r} then "
                             f"{ts[k + 1]!r} at frames {k} and {k + 1}")
        if frame_rate_hz is None:
            frame_rate_hz = float(1.0 / np.median(dts))
        times = ts - ts[0]
        dt_frames = dts * frame_rate_hz
    else:
        dt_frames = np.ones(t_n - 1)
        times = np.arange(t_n) / frame_rate_hz if frame_rate_hz else np.arange(t_n, dtype=float)
    if output_pitch_um is None:
        out_pitch_um = np.array([pitch_um, pitch_um])
    else:
        out_pitch_um = np.broadcast_to(np.asarray(output_pitch_um, dtype=np.float64), (2,)).copy()
        for k in range(2):
            check_positive(float(out_pitch_um[k]), name="output_pitch_um")
    if max_across_px is None:
        max_across_px = int(np.clip(c_n // 8, 3, 12))
    if motion_prior_px is None:
        motion_prior_px = (20.0 / frame_rate_hz ** 2 / (pitch_um * 1e-6)) if frame_rate_hz else 0.05
        motion_prior_px = float(max(motion_prior_px, 1e-3))
    else:
        motion_prior_px = check_positive(motion_prior_px, name="motion_prior_px")
    fast = mode == "fast"
    rotation = bool(estimate_rotation) and not fast
    model_passes = check_int(model_passes, name="model_passes", lo=0, hi=50, allow_none=True)

    if calibration is not None:
        if not hasattr(calibration, "apply"):
            raise TypeError("calibration must have an apply(frames) method (a "
                            f"stripstitch.calibrate.Calibration); got {type(calibration).__name__}")
        x = np.asarray(calibration.apply(x), dtype=np.float64)
    unit_exp = _unit_exponent(x)
    if unit_exp:
        x = np.ldexp(x.astype(np.float64), unit_exp)

    prep = _reg.prepare(x)
    chain = np.flatnonzero(prep.contact)
    if chain.size < 2:
        raise ReconstructionError("no finger found: fewer than two frames show finger texture "
                                  f"(of {t_n} frames); check the capture or the calibration")

    placed = _tracked_placement(x, prep, chain, dt_frames, max_across_px, motion_prior_px,
                                refit="stalled" if fast else True)
    if placed is not None:
        (positions, confidence, link_failed, prep_used, n_pairs, n_kept, limit_runs, keys,
         trk_out) = placed
        angles_deg = np.zeros(t_n)
        delay_steps = None
        placement = "key-frame tracker"
    else:
        (positions, angles_deg, confidence, link_failed, prep_used, n_pairs, n_kept, delay_steps,
         limit_runs) = _full_placement(x, prep, chain, dt_frames, frame_rate_hz=frame_rate_hz,
                            max_across_px=max_across_px, motion_prior_px=motion_prior_px)
        placement = "multi-baseline pairs"

    # ---- every frame against a super-resolved model of the finger ----
    # Passes: the stretch, shear and turn converge over several. From the tracker's placement
    # 2 (the 9 gap-free swipes of the 13-swipe suite it placed: median span error 0.031 /
    # 0.026 / 0.026 %, mean along RMS 0.066 / 0.063 / 0.063 px, mean across RMS 0.128 /
    # 0.145 / 0.160 px after 2 / 3 / 4 passes); from the pairs 6 (across RMS 0.127 / 0.101 /
    # 0.080 px after 4 / 6 / 8, but on a swipe of varying speed it creeps up again after 6).
    # Fast mode: none after the tracker. Strips of 2 or 3 rows take 12 from the pairs: their
    # pairs overlap by a row or two, where the registration can only interpolate linearly
    # along, which biases small shifts towards zero (2 rows: spans 0.5-12 % short), and the
    # refinement takes that out only slowly (8 simulated 2-row swipes of other seeds, 30-90
    # mm/s at 8 kHz: span error -0.5 to -11.8 %, median -3.1 %, after 6 passes; -0.2 to
    # -4.0 %, median -1.5 %, after 12; 3 rows: worst 2.09 -> 1.57 %; 4 rows: no change). On a
    # plane-wave texture (bench_scaling's) at 0.12-0.8 px/frame 6 and 12 passes agree within
    # 0.04 % of span, except at exactly 0.5 px/frame (two sampling phases, where the
    # refinement's fixed point is biased): 12 read 0.2-0.4 % longer.
    if model_passes is not None:
        n_model = int(model_passes)
    elif placed is not None:
        n_model = 0 if fast else _TRACKED_PASSES
    else:
        n_model = 6 if r_n > 3 else 12
    if n_model > 0:
        mw = (prep.contact & (confidence > 0.05)).astype(np.float32)[:, None, None] \
            * prep.plate_ok[None].astype(np.float32)
        if (mw > 0).any():
            def refine(iterations, **kw):
                return _refine.refine_positions(prep_used.z, mw, positions, np.radians(angles_deg),
                                                dt=dt_frames, sigma_acc_px=motion_prior_px,
                                                cut=link_failed, iterations=iterations,
                                                rotation=rotation, **kw)

            # A swipe whose first pass already established a turn goes to the turn passes
            # after that pass where its frames sample many along phases (the turning 8x192
            # swipe of bench_throughput.py 143 -> 115 ms). Where they sample few (a strip
            # moving by nearly whole pixels) the second sharp pass is kept: without it the
            # independent generator's fast turning swipes lost across (0.105 -> 0.456,
            # 0.243 -> 1.034 px). Measured against both passes: bench_random.py seeds 7000 /
            # 8000 rotation median 0.081 / 0.104 -> 0.079 / 0.093 deg, across 0.108 / 0.135
            # -> 0.107 / 0.134 px; bench_independent.py seeds 7000 / 7100 / 7200 no swipe
            # moved by 0.05 px; a 100-swipe set of narrow strips 14 better, 1 worse by 0.05
            # px across; but bench_rotation.py's 12 dB left loop 0.030 -> 0.057 deg and 10x256
            # whorl 0.064 -> 0.101 px, and bench_geometry.py's five seeds 3 better, 5 worse
            # (a 12x96 swipe at 2.4 px per frame 0.21 -> 0.56 px), medians unchanged.
            ref = refine(n_model, stop_if_turning=(rotation and model_passes is None
                                                   and placed is not None))
            positions = ref.positions.copy()
            if rotation:
                angles_deg = np.degrees(ref.angles_rad)
            # A finger that turns (by a degree or more: the refinement kept its turn) leaves
            # shear, stretch and turn that take longer to converge: three more passes, the
            # turn established, so the angles keep being corrected (min_turn_deg None: the
            # significance test of a first reading would stop them once the remaining turn is
            # small). Their model is smoothed wider across (0.8 px, on a grid as coarse:
            # _TURN_FINE_PX): a turned frame's plates fall between the columns the others
            # sampled, and the sharp model's linear interpolation there reads the twist short
            # (at the true placement of the suite's
            # 4-degree turn it read 7 % of the turn rate back; noise-free 3.6 %, 1.2 % at
            # 0.5 px across); where the along phases are concentrated the twist comes from a
            # model smoothed 0.8 px along too (see refine_positions). Measured on eight
            # turning swipes of other fingers and geometries (8x192, 12x160, 16x128, turns
            # of -4 to 6 degrees), against the earlier 2 passes of the sharp model: median
            # 0.44 -> 0.08 deg RMS, worst 1.68 -> 0.24; the suite's turn 0.16 -> 0.08.
            # Swipes that do not turn are not touched.
            # A finger can turn while it stalls, where the twist (read against travel) sees
            # nothing: each stall's turn is measured between its first and last frames and
            # carried into the angles from there on (see _stall_turns).
            stall_turned = False
            if model_passes is None and placed is not None and rotation:
                angles_deg, positions, stall_turned = _stall_turns(
                    prep_used.z, prep.plate_ok, positions, angles_deg, prep.contact, times,
                    frame_rate_hz, pitch_um)
            # A first reading of 0.75 degrees or more that was not kept (under a degree, or
            # under its significance test: see refine_positions' min_turn_deg) gets a second
            # opinion: the same three passes, kept only if the turn they establish over the
            # middle 80 % of the travel reaches 0.8 degrees. The first reading is the sharp
            # model's and reads part of a turn (a twin loop turning 3.6 degrees with a
            # backtrack read 1.4 at 2.3 standard errors; left unturned it came out 1.0 %
            # long and 5 px off across at its end; the passes read 3.1). See
            # _SECOND_OPINION_DEG for what was measured.
            turning = stall_turned or np.ptp(angles_deg[prep.contact]) >= 1.0
            second = (not turning and np.isfinite(ref.first_turn_deg)
                      and ref.first_turn_deg >= _SECOND_OPINION_READ_DEG
                      and r_n >= _SECOND_OPINION_MIN_ROWS and c_n >= _SECOND_OPINION_MIN_COLS)
            if model_passes is None and placed is not None and rotation and (turning or second):
                if turning:
                    # the tracker's links registered again with the turn known: its across
                    # path is what the passes keep where the frames sample few phases
                    positions = _turned_links_across(prep_used, positions, angles_deg, trk_out)
                ref2 = refine(3, min_turn_deg=None, smooth_px=(0.3, 0.8), twist_smooth_px=(0.8, 0.8),
                              fine_px=_TURN_FINE_PX)
                central2 = _central_turn_deg(ref2.positions, ref2.angles_rad, prep.contact)
                # (a turn the passes feed themselves: see _RUNAWAY_RATIO)
                runaway = (not stall_turned and np.isfinite(ref.first_turn_deg)
                           and central2 > _RUNAWAY_RATIO * ref.first_turn_deg)
                if (turning or central2 >= _SECOND_OPINION_DEG) and not runaway:
                    positions = ref2.positions.copy()
                    angles_deg = np.degrees(ref2.angles_rad)
            if placed is not None and np.ptp(angles_deg[prep.contact]) < 1.0:
                positions = _across_slope_from(positions, keys, r_n)
    if delay_steps is not None:
        positions = _with_along_steps(positions, delay_steps)
    positions, confidence, link_failed, blank_runs, end_blank = _bridge_blank_runs(
        prep, chain, positions, confidence, link_failed, times, r_n)
    return _finish(prep, prep_used, positions, angles_deg, confidence, link_failed,
                   unit_exp=unit_exp,
                   blank_runs=blank_runs, limit_runs=limit_runs, end_blank=end_blank,
                   dt_frames=dt_frames, times=times, frame_rate_hz=frame_rate_hz,
                   pitch_um=pitch_um, out_pitch_um=out_pitch_um, options={
                       "pitch_um": pitch_um, "frame_rate_hz": frame_rate_hz, "mode": mode,
                       "output_pitch_um": out_pitch_um.tolist(), "estimate_rotation": rotation,
                       "motion_prior_px": motion_prior_px, "max_across_px": max_across_px,
                       "timestamps": timestamps_s is not None,
                       "calibration": calibration is not None,
                       "n_pairs": int(n_pairs), "n_pairs_kept": int(n_kept),
                       "placement": placement})


# Model grid (px along, across) of the turn passes. Smoothed 0.8 px across, their model needs
# no nodes closer than that across (the curvature term of the frames' interpolation covers
# the rest): on the 0.5 px grid of the ordinary passes the turning 8x192 swipe of the
# throughput benchmark took 181 ms, on this one 150. Same swipes, same code otherwise:
# bench_rotation.py's swipes and 16 random ones of seed 8100, rotation RMS median 0.068 /
# 0.113 / 0.080 -> 0.039 / 0.107 / 0.068 deg, across 0.105 / 0.172 / 0.177 -> 0.111 / 0.145 /
# 0.192 px; bench_random.py seeds 7000 / 8000 (default) span median 0.043 / 0.050 -> 0.043 /
# 0.048 %, across 0.107 / 0.130 -> 0.108 / 0.135 px, false turns on unturned twin loops
# 1.04 / 1.36 / 1.18 -> 1.05 / 1.04 / 1.05 deg; bench_independent.py seeds 7000 / 7100 /
# 7200 (72 swipes from a generator outside the library) across median 0.055 / 0.093 /
# 0.062 -> 0.053 / 0.096 / 0.066 px, two swipes worse by more than 0.05 px (a spiral 0.10
# -> 0.15, a failing brick 0.35 -> 0.43).
# Along, 0.4 px instead of 0.25 (the smoothing stays 0.3 px): fewer nodes to smooth and fill,
# the turning 8x192 swipe of bench_throughput.py 114-116 -> 97 ms with the links below at
# two iterations (1.05 times real time), and the turn read better. On the 28 swipes of
# bench_rotation.py and 16 random turning ones of seed 9000 (four iterations for the links),
# rotation RMS median / mean 0.108 / 0.126 deg on the 0.25 px grid, 0.099 / 0.115 on 1/3,
# 0.097 / 0.111 on 0.4, 0.095 / 0.107 on 0.5. It is the grid, not a wider smoothing: 0.4 or
# 0.5 px of smoothing on the 0.25 px grid read 0.099 / 0.126 and 0.093 / 0.120 deg, across
# median 0.149 / 0.156 px. Not 0.5, as fast: bench_rotation.py's chosen 16x128 twin loop
# 0.039 -> 0.101 deg (0.061 on 0.4). With the links at two iterations, against the earlier
# grid at four: that set's rotation 0.096 / 0.111 deg, across median 0.149 -> 0.144 px (mean
# 0.193 -> 0.179), along 0.050 -> 0.048 px, span 0.040 -> 0.037 %; the accuracy suite's
# turning arch across 0.185 -> 0.112 px; bench_random.py seed 7000 rotation median 0.079 ->
# 0.070 deg, across median 0.107 -> 0.114 px (mean 0.144 -> 0.143; of 21 swipes that
# changed, 7 better and 4 worse by 0.01 px), an unturned twin loop's false 1.05-degree turn
# no longer kept by the second opinion (its span +0.18 -> +0.67 %, the ordinary passes'
# result); bench_independent.py seeds 7000 / 7100 / 7200 rotation median 0.176 / 0.030 /
# 0.065 -> 0.165 / 0.037 / 0.064 deg, across 0.056 / 0.083 / 0.075 -> 0.056 / 0.089 / 0.070
# px (a gravel 10x256 0.03 -> 0.08, a grass 6x144 0.24 -> 0.45, as with the links' change
# alone); bench_geometry.py seeds 300 / 13579, 9 of 72 changed, across median 0.180 ->
# 0.192 px (a 12x96 swipe 0.56 -> 0.20, an 8x64 one 0.16 -> 0.26). Two turn passes instead
# of three on this grid (a fifth less time again): across median 0.149 -> 0.188 px; not
# taken.
_TURN_FINE_PX = (0.4, 0.8)

# A turn (degrees) the first reading implied that gets the turn passes as a second opinion,
# and the turn those passes must establish over the middle of the travel to be kept (see
# stitch). 256 random swipes (bench_random.py's generator, seeds 7000-10000): 8 changed, 6
# real turns of 1.2-3.8 degrees recovered (rotation RMS 0.60-2.02 -> 0.03-0.54 deg, across
# 0.44-1.98 -> 0.10-0.49 px, worst span 1.005 -> 0.23 %) and 2 swipes that do not turn
# turned by 0.26 and 0.45 deg RMS, both with better images (NCC 0.962 -> 0.987, 0.972 ->
# 0.980). Read from 0.5 degrees, two more real turns were recovered but a tented arch was
# turned by 0.7 deg (NCC 0.978 -> 0.908); the turn over the whole travel as the test let
# through a false turn made while the fingertip arrived (1.2 degrees before the contact
# settled: across 0.09 -> 1.49 px). These thresholds were chosen on those four seeds.
# Only on strips of at least these many rows and columns: the twist is an along shift that
# changes across the strip, so narrow strips read it weakly, and there the passes invented
# turns of 1.4-3.9 degrees RMS on swipes that do not turn (bench_geometry.py: an 8x24
# photo texture at 13 dB, image NCC 0.979 -> 0.799; a 6x128 twin loop at 2.2 px per frame,
# 0.965 -> 0.853; an 8x24 twin loop), against two real turns recovered (8x64, 1.77 -> 0.34
# deg; 16x32, 1.14 -> 0.88 deg, which this limit leaves out).
_SECOND_OPINION_READ_DEG = 0.75
_SECOND_OPINION_DEG = 0.8
# The turn passes' own feedback. On a narrow strip the twist the model reads at the TRUE
# placement of a slanted swipe is not zero: a spot was seen by the strip's rows at across
# phases that spread with the slant in the frames' own axes (row r sees it (slant x r) px
# off), the model's across interpolation of aliased ridge edges errs differently at each
# phase, and that error, growing row by row, reads as a twist. A turn adds to the slant in
# the frames' axes, so the passes can feed their own turn. Measured on the noise-free
# frames of an 8x64 whorl slanted 5.5 degrees, at the true placement: 3.1 degrees over the
# swipe from the turn passes' model, 1.8 from the sharp one (0.1 / 0.04 unslanted). At
# 16.5 dB that swipe first read 1.67 degrees (the same finger on 96 / 128 / 192 columns:
# 1.3 / 0.9 / 0.5), and the passes turned it by 5.9 (rotation RMS
# 2.67 degrees, across RMS 2.78 px). A turn the passes establish over the middle of the
# travel at more than this many times the first reading is therefore not kept (the
# ordinary passes' result stands). The first reading is the sharp model's and reads part
# of a real turn (37-100 % on the turning swipes measured, so up to 2.7 times); the passes
# established at most 2.0 times it on those. Measured: 100 swipes on 8x64 / 8x96 / 16x64 /
# 8x128 / 8x192 strips (five patterns, slanted 0 or 3-7 degrees, turning 0 or 2-4), 3
# changed, all better: two invented turns gone (across RMS 2.01 -> 1.30 and 1.95 -> 1.13
# px), a real 3.1-degree turn that the passes read as 5.7 kept at the first reading's 2.35
# (rotation RMS 1.57 -> 1.19 degrees, across 1.24 -> 0.90 px); bench_random.py seeds 7000
# and 8000 (128 swipes) identical; bench_geometry.py seeds 300, 13579, 24681, 35791, 46802
# (180 swipes) only the 8x64 whorl changed (across 2.78 -> 0.32 px); bench_regular.py only
# its 16x128 arcs slanted 4 degrees (a false 3.2-degree turn dropped: along RMS 8.69 -> 3.25
# px, across 2.36 -> 1.22); the accuracy suite, bench_rotation.py, bench_independent.py,
# bench_photos.py and bench_patterns.py identical. Not removed: a false 2.4-degree turn on
# an 8x96 whorl (the passes at 1.8 times the first reading; across RMS 0.65 px, 0.15
# without a turn) and the passes' overshoot of real turns on 64-96 columns (3.2 degrees read
# as 5.6 on an 8x64 strip, still better than no turn: rotation RMS 1.48 against 1.95).
_RUNAWAY_RATIO = 3.0
_SECOND_OPINION_MIN_ROWS = 8
_SECOND_OPINION_MIN_COLS = 64


# Gauss-Newton iterations of _turned_links_across's registrations. They start from the
# refined placement (within a few hundredths of a pixel of where they end): two instead of
# four took 9.3 -> 6.3 ms of the turning 8x192 swipe (bench_throughput.py's), and moved the
# results within their scatter: bench_rotation.py's 28 swipes and 16 random turning ones of
# seed 9000 rotation median 0.108 -> 0.104 deg, across 0.149 -> 0.144 px; bench_random.py
# seed 7000 across median 0.107 -> 0.110 px, rotation 0.079 -> 0.079 deg;
# bench_independent.py's 72 swipes within 0.01 px of their medians, one worse by more than
# 0.05 px (a grass 6x144 swipe at 1.9 px per frame, 0.24 -> 0.45 px), one better (a failing
# brick 10x256, 0.43 -> 0.36).
_TURNED_LINK_ITERATIONS = 2


def _turned_links_across(prep, positions, angles_deg, trk_out):
    """Positions whose across path is the tracker's links registered again with each pair's
    relative turn held at the refined angles (along unchanged).

    The tracker registers a frame against its key by translation alone, in the key's own
    axes. On a turning swipe that costs twice: its steps must be turned by the key's angle
    into frame 0's axes (else the path bends by the turn's integral), and two frames turned
    by delta against each other register 0.02-0.08 px per mrad of delta off across (the turn
    makes the along shift vary across the strip, and where the ridges' orientation changes
    across it the along-across coupling turns that into an across error). The refinement
    cannot take either out where the frames sample few along phases (a strip moving a whole
    pixel per frame), so it keeps the tracker's path there. Each link between the tracker's
    key frames is registered again (:func:`register.refine_shifts`, the pair's relative turn
    held at the refined angles, from the current step), turned into frame 0's axes by its
    key's angle, and the across path rebuilt along the keys' tree of references (frames
    between keys follow their keys' correction in time); the turn passes then start from it.
    Measured (default mode, across RMS, before -> after): a 16x128 right loop turning 3
    degrees at 0.98 px per frame 1.25 -> 0.31 px (with the relative turn not held 1.18, held
    with the other sign 2.14); bench_random.py's turning swipes of seeds 7000 / 8000 / 9200
    mean 0.199 / 0.315 / 0.586 -> 0.182 / 0.250 / 0.482 px (4 / 10 / 3 better by more than
    0.05 px, 3 / 2 / 2 worse; medians of all 64 swipes 0.131 / 0.145 / 0.115 -> 0.127 /
    0.139 / 0.115); bench_rotation.py median 0.142 -> 0.139, mean 0.263 -> 0.196;
    bench_independent.py median 0.085 -> 0.078; bench_geometry.py 0.146 -> 0.131; spans
    within 0.01 % in median. The cost: a turning 8x192 swipe at 4 kHz 0.177 -> 0.190 s.
    Every frame's link registered again instead of the keys' gained a little more (random
    turning means 0.175 / 0.244 / 0.455 px) at twice the cost (0.256 s); rebuilding the along
    path too made spans worse (rotation benchmark median 0.062 -> 0.083 %, two false events
    on bench_random.py's seed 8000).

    ``trk_out``: (chain, the tracker's result, frame times, which chain frames are keys)
    from _tracked_placement.
    """
    chain, tr, times, keys = trk_out
    ref = tr.reference
    # the key frames' links only: they carry the path; a frame between keys errs by at most
    # one link's share, and follows its keys' correction in time
    k = np.flatnonzero(keys & (ref >= 0))
    if k.size < 2:
        return positions
    fa, fb = chain[k], chain[ref[k]]
    th = np.radians(angles_deg)
    # the current step of a from b, in b's axes (positions are in frame 0's: p + Rot(theta) u)
    d0 = positions[fa] - positions[fb]
    c, s_ = np.cos(th[fb]), np.sin(th[fb])
    init = np.stack([c * d0[:, 0] + s_ * d0[:, 1], -s_ * d0[:, 0] + c * d0[:, 1]], 1)
    # only the frames the links use (the registration prepares every frame it is given)
    used, local = np.unique(np.concatenate([fb, fa]), return_inverse=True)
    sub = SimpleNamespace(z=prep.z[used], plate_ok=prep.plate_ok)
    est = _reg.refine_shifts(sub, local.reshape(2, -1).T, init, init_angle=th[fa] - th[fb],
                             estimate_rotation=False, iterations=_TURNED_LINK_ITERATIONS)
    # Links within a stall (under half a pixel) and links over a turn of a degree or more (a
    # key held through a stall in which the finger turned, a few rows back) keep their step:
    # the stall's ends are placed by _stall_turns with the turn free, and registered with the
    # turn held such a link moved the path across by 1.3 px (bench_rotation.py's right loop
    # turning 1.9 degrees in a 48 ms stall: across RMS 0.55 -> 0.24 px with them kept).
    keep = (np.abs(th[fa] - th[fb]) >= np.radians(1.0)) | (np.abs(d0).max(axis=1) < 0.5)
    step = np.where((est.ok & ~keep)[:, None], est.shift, init)
    across = s_ * step[:, 0] + c * step[:, 1]
    n = len(chain)
    x = np.full(n, np.nan)
    roots = ref < 0                          # the start, and each frame after a failed link
    x[roots] = positions[chain[roots], 1]    # each tree anchored on the current path there
    ref = np.where(keys, ref, -1)            # walk the keys' tree only
    st = np.zeros(n)
    st[k] = across
    for _ in range(n):                       # along the tree of references, from its roots
        todo = np.flatnonzero(np.isnan(x) & (ref >= 0))
        todo = todo[~np.isnan(x[ref[todo]])]
        if todo.size == 0:
            break
        x[todo] = x[ref[todo]] + st[todo]
    good = ~np.isnan(x) & (keys | roots)
    if good.sum() < 2:
        return positions
    # frames between keys and off the chain move with their neighbours in time
    fr = chain[good]
    corr = positions[fr, 1] - x[good]
    out = positions.copy()
    out[:, 1] -= np.interp(times, times[fr], corr)
    return out - out[0]


def _central_turn_deg(positions, angles_rad, contact, frac=0.1):
    """Peak-to-peak turn (degrees) over the frames with finger in the middle of the travel
    (from ``frac`` to ``1 - frac`` of it)."""
    if contact.sum() < 2:
        return 0.0
    travel = _refine._travel_px(positions)
    tc = travel[contact]
    lo, hi = tc.min() + frac * np.ptp(tc), tc.max() - frac * np.ptp(tc)
    mid = contact & (travel >= lo) & (travel <= hi)
    return float(np.degrees(np.ptp(angles_rad[mid]))) if mid.any() else 0.0


# The refinement's across path, corrected by the slope the tracker's key links read against
# it (see _across_slope_from). The prior's standard deviation of that slope (px per px of
# along travel): _ACROSS_SLOPE_PRIOR on a slanted swipe, falling to _ACROSS_SLOPE_FLOOR
# below a slant of _ACROSS_SLOPE_FULL_SLANT (px across per px along)...
_ACROSS_SLOPE_PRIOR = 2e-3
_ACROSS_SLOPE_FLOOR = 3e-4
_ACROSS_SLOPE_FULL_SLANT = 0.01
# ... and falling to the floor again as the across phases the frames that saw a row sample
# spread from one pixel to two (slant times rows, px).
_ACROSS_SLOPE_SPREAD_PX = (1.0, 2.0)


def _across_slope_from(positions, keys, n_rows=None):
    """Refined positions with the across slope the tracker's key links read against them removed.

    The refinement's shear correction integrates a reading that is biased on slanted swipes
    (see refine's notes): its across error is mostly a constant slope, an across offset
    growing with the along position (64 random swipes of bench_random.py, seed 7000: across
    RMS median 0.141 px, 0.045 once the best line in the along position is taken out). The
    tracker's key links measure the across step between frames a few rows apart directly,
    without that bias but with noise. Each link's step against the refinement's step over
    the same frames (its across with the along held at the refinement's, through the link's
    own information) reads the slope: a weighted line through the origin (weights the links'
    across information, Cauchy weights for the outliers a link registered a ridge off gives),
    its standard error from the scatter. The slope is then shrunk towards zero by a Gaussian
    prior and removed. The prior's standard deviation is the spread of the refinement's own
    slope error on the random swipes (2.2e-3 RMS; ``_ACROSS_SLOPE_PRIOR``), falling to a floor
    (``_ACROSS_SLOPE_FLOOR``) on swipes that are not slanted, where the shear reading has no
    bias (noise-free frames read at the true placement: none at skew 0; see DEVELOPERS.md),
    and on swipes slanted so much that the frames which saw a row sampled it at across phases
    spread over two pixels or more (slant times ``n_rows``): the bias comes from a model
    interpolated between one-sided, concentrated across phases and is small once they span a
    pixel (seed 7000's 16-row swipes at 1.6-2.2 px of spread: refined slope errors within
    1.3e-3, against up to 7.6e-3 under a pixel). Where the links are precise (loops and
    whorls, 16-row strips) the tracker's slope stands; where they are noisy (arches, whose
    ridges across the swipe leave little across texture) the refinement's.

    Against the tracker's across path over 8 strip heights of travel
    (measured, default mode across RMS; before -> after): bench_random.py seeds 7000 / 8000 /
    9200 median 0.140 / 0.175 / 0.155 -> 0.131 / 0.145 / 0.115 px, mean 0.179 / 0.237 /
    0.268 -> 0.164 / 0.217 / 0.260 (11 / 11 / 9 swipes better by more than 0.05 px, 5 / 4 /
    4 worse: there the links read the slope wrong by more than their standard error, arches
    and tented arches of 8 rows mostly); bench_independent.py median 0.097 -> 0.085, mean
    0.201 -> 0.178 (5 better, none worse); bench_geometry.py median 0.136 -> 0.146, mean
    1.608 -> 1.579 (5 better, none worse); the accuracy suite median 0.056 -> 0.055, mean
    0.310 -> 0.307 (steady 8x192 0.028 -> 0.054: its first frames' offset, which the
    tracker's path over 8 strip heights had taken out). Tried: one prior for every swipe
    (2e-3: suite median 0.063, the steady 8x192 0.104, random medians 0.132 / 0.147 /
    0.110), one growing with the slant (4 % of it, floor 3e-4: suite 0.058, random 0.129 /
    0.141 / 0.125, a whorl slanted by 1.3 degrees whose refinement's slope error is 7.6e-3
    then kept most of it), no fall at a wide spread of phases (a 24x128 strip slanted by 7.7
    degrees, 3.2 px of spread: 0.060 -> 0.308 px; geometry median 0.193).

    ``keys``: (frame, its key frame, the measured step, its information), as
    _tracked_placement returns them; ``n_rows``: the strip's rows (None: no fall with the
    spread). Not used on turning swipes (see _turned_links_across: their links read a slope
    that is not the refinement's error).

    References
    ----------
    .. [1] P. W. Holland and R. E. Welsch, "Robust regression using iteratively reweighted
           least-squares", Communications in Statistics - Theory and Methods 6(9), 813-827
           (1977). doi:10.1080/03610927708827533
    .. [2] A. Gelman, J. B. Carlin, H. S. Stern, D. B. Dunson, A. Vehtari and D. B. Rubin,
           Bayesian Data Analysis, 3rd ed., CRC Press (2013), section 2.5 (a normal mean
           with known variance: the posterior mean shrinks the estimate by
           prior variance / (prior variance + its variance)).
    """
    a, b, step, info = keys
    if a.size < 3:
        return positions
    i11 = info[:, 1, 1]
    use = i11 > 0
    a, b, step, info, i11 = a[use], b[use], step[use], info[use], i11[use]
    if a.size < 3:
        return positions
    ref_step = positions[a] - positions[b]
    # the link's across step had its along been the refinement's
    across = step[:, 1] - info[:, 0, 1] / i11 * (ref_step[:, 0] - step[:, 0])
    diff = ref_step[:, 1] - across
    dy = ref_step[:, 0]
    var = 1.0 / i11
    w = np.ones_like(diff)
    slope = 0.0
    for _ in range(6):
        den = float(np.sum(w * dy * dy / var))
        if den <= 0.0:
            return positions
        slope = float(np.sum(w * dy * diff / var)) / den
        u = (diff - slope * dy) / np.sqrt(var)
        scale = 1.4826 * float(np.median(np.abs(u))) + 1e-12
        # Cauchy weights at 2.385 scales (95 % efficiency at the normal; common practice)
        w = 1.0 / (1.0 + (u / (2.385 * scale)) ** 2)
    u = (diff - slope * dy) / np.sqrt(var)
    s2 = float(np.sum(w * u * u)) / max(float(np.sum(w)) - 1.0, 1.0)
    se2 = s2 / float(np.sum(w * dy * dy / var))
    slant = float(np.sum(dy * ref_step[:, 1])) / max(float(np.sum(dy * dy)), 1e-12)
    share = min(1.0, abs(slant) / _ACROSS_SLOPE_FULL_SLANT)
    if n_rows is not None:
        lo, hi = _ACROSS_SLOPE_SPREAD_PX
        share *= float(np.clip((hi - abs(slant) * n_rows) / (hi - lo), 0.0, 1.0))
    tau2 = _ACROSS_SLOPE_FLOOR ** 2 + (_ACROSS_SLOPE_PRIOR * share) ** 2
    gain = tau2 / (tau2 + se2)
    out = positions.copy()
    out[:, 1] -= gain * slope * (positions[:, 0] - positions[0, 0])
    return out


def _stall_turns(z, plate_ok, positions, angles_deg, contact, times, frame_rate_hz, pitch_um,
                 *, min_turn_deg=0.2, min_gain=0.3):
    """Turns made while the finger stalls, carried into the angles.

    The refinement reads a turn from the twist, an along shift growing across the strip and
    with the travel; a finger that turns on the spot travels nothing, so that turn is lost and
    every later frame keeps the angle it had before. Each stall (speed along the swipe under
    2 mm/s for 10 ms and at least 16 frames) is measured directly: the mean of its last
    four frames against the mean of its first four (:func:`register.frame_turn`). A turn of
    ``min_turn_deg`` or more beyond what the angles already hold, which lowers the residual
    by ``min_gain`` (relative) or more, ramps in over the stall and stays from there on; so
    does the shift between the ends that the same fit finds (returned with the angles and a
    flag: any turn found). The residual rule tells a turn from aliasing: measured turns of
    0.5-1.3 degrees lowered it by 86-660 %, stalls that did not turn by under 1 %, but the
    ends of a slow swipe that only hovered near the speed limit (1.5 mm/s at 1 kHz) read
    "turns" of 0.5 degrees at 3-8 % (with a 2 % rule the swipe came out turned by 1 degree).
    The shift, measured with the tracker's keys renewed in stalls (see track.py): on
    bench_rotation.py's right loop turning 1.9 degrees in a 48 ms stall, span error -0.25 ->
    -0.03 % (-1.28 % before either), along / across RMS 0.20 / 0.52 -> 0.10 / 0.24 px;
    scikit-image's gravel photograph swiped at 0.77 px per frame on an 8x192 strip, turning
    2 degrees in a stall of 170 frames, +0.12 -> +0.06 %, along RMS 0.11 -> 0.05 px.

    Measured on four simulated swipes that turned 0.5 to 1.4 degrees while stalled (8x192 and
    16x128, 24-34 dB): -1.07 / -0.56 / -1.34 / 0.98 degrees found for -1.26 / -0.54 / -1.43 /
    1.02, where the angles held none; four stalls that did not turn read 0.001-0.003 degrees.
    """
    t_n = len(angles_deg)
    # The report's stall rule (at least 16 frames: the ends are means of four).
    vel, v_stall, min_len = _report._stall_rule(positions, times, frame_rate_hz, pitch_um)
    min_len = max(16, min_len)
    # Along the swipe only: a turn on the spot reads as a drift across (the placement has no
    # turn in it), at 0.04 px per frame for a 2-degree turn over 160 frames at 4 kHz, which
    # the report's speed rule would count as motion.
    still = (np.abs(vel[:, 0]) < v_stall) & contact
    out = np.asarray(angles_deg, dtype=np.float64).copy()
    pos = np.asarray(positions, dtype=np.float64).copy()
    turned = False
    for a, b in _report._runs(still):
        if b - a + 1 < min_len:
            continue
        za = z[a:a + 4].astype(np.float64).mean(0)
        zb = z[b - 3:b + 1].astype(np.float64).mean(0)
        # The shift between the ends in frame a's axes.
        th = np.radians(out[a])
        d = pos[b] - pos[a]
        shift = np.array([np.cos(th) * d[0] + np.sin(th) * d[1], -np.sin(th) * d[0] + np.cos(th) * d[1]])
        if abs(shift[0]) > 0.25 * z.shape[1]:
            # A slow swipe (a low frame rate) can stay under the speed for its whole length:
            # ends that no longer share most of their rows are no stall to measure.
            continue
        turn, fit, gain = _reg.frame_turn(za, zb, plate_ok, shift)
        extra = turn - (out[b] - out[a])
        if abs(extra) < min_turn_deg or gain < min_gain:
            continue
        ramp = np.zeros(t_n)
        ramp[a:b + 1] = np.linspace(0.0, 1.0, b - a + 1)
        ramp[b + 1:] = 1.0
        out += extra * ramp
        # The shift between the ends from the same fit, in frame 0's axes, ramped in likewise:
        # the tracker registered the stalled frames by translation alone, and a turn on the
        # spot reads as a drift (the finger's pad off the strip's centre turns by it too).
        s_fit = np.array([np.cos(th) * fit[0] - np.sin(th) * fit[1],
                          np.sin(th) * fit[0] + np.cos(th) * fit[1]])
        pos += (s_fit - d)[None, :] * ramp[:, None]
        turned = True
    return out, pos - pos[0], turned


def _texture_power(prep, chain, noise, along):
    """Signal power of each chain frame: its texture's variance above the temporal noise
    (std ``noise``), the median of that over the chain, and the static pattern (R, C) it is
    measured about.

    Texture here is what changes over the swipe: a blank frame shows the static (fixed)
    pattern left over after preparation, which the per-plate median over the swipe removes.
    ``along``: the chain frames' along positions (so a stall counts once in the median).
    """
    # Per-plate median over about 40 frames spread evenly over the finger's length, not its
    # duration: a long stall would make the stalled finger's texture the "static" level,
    # against which the blank frames at the ends look textured (a 14 dB swipe that stalled
    # for 37 % of its frames reported five gaps where the finger arrived and left).
    along = np.asarray(along, dtype=np.float64)
    order = np.argsort(along, kind="stable")
    targets = np.linspace(along[order[0]], along[order[-1]], 40)
    k = np.clip(np.searchsorted(along[order], targets), 0, len(order) - 1)
    sub = chain[np.unique(order[k])]
    if sub.size < 8:
        sub = chain[:: max(1, len(chain) // 40)]
    # the per-plate median by a sort along the frames (the same values as np.median, three
    # times faster here: it runs on every swipe)
    srt = np.sort(prep.z[sub], axis=0)
    static = 0.5 * (srt[(len(sub) - 1) // 2] + srt[len(sub) // 2])
    tex = _texture_about(prep.z, chain, static.astype(np.float32), prep.plate_ok)
    sig2 = np.maximum(tex ** 2 - float(noise) ** 2, 0.0)
    return sig2, float(np.median(sig2)), static


def _steady_velocity(times, positions, min_steps):
    """Velocity (px per time unit) of frames at ``times``, ``positions``: the mean step
    without the steps more than half a pixel from the median one (a registration that
    landed a ridge period off; the median alone is biased where the steps alternate, as
    pixel locking leaves them). None with fewer than ``min_steps`` steps kept."""
    dt_k = np.diff(np.asarray(times, dtype=np.float64))
    ok = dt_k > 0
    st = np.diff(np.asarray(positions, dtype=np.float64), axis=0)[ok]
    dk = dt_k[ok]
    if dk.size < min_steps:
        return None
    med_v = np.median(st / dk[:, None], axis=0)
    keep = np.hypot(*(st - med_v * dk[:, None]).T) <= 0.5
    if keep.sum() < min_steps:
        return None
    return st[keep].sum(axis=0) / dk[keep].sum()


def _bridge_blank_runs(prep, chain, positions, confidence, link_failed, times, r_n):
    """Frames in the middle of the swipe that show no texture at all (a band of the finger
    without ridges, a crease or a scar, at least as wide as the strip) cannot be registered:
    what they match is noise, no frame overlaps the texture on both sides, and the link
    across them used to be taken for a too-fast jump (a gap pushed to at least a strip
    length). A run of faint frames with blank ones among them (or frames where the finger
    was not seen at all), with clear texture on both sides, of at least _BRIDGE_MIN_FRAMES
    frames or 3 with some out of contact (a too-fast jump blurs a few frames, in contact)
    and long enough that at the speed measured on both
    sides the finger travelled at least half a strip length in it, is carried at
    the mean of those two velocities (exact for a constant acceleration); the frames after
    it keep their placement relative to each other, the links in it are no gap, and its
    frames get a low confidence (reported as low_confidence; still fused, since the band
    they show is real). Returns positions, confidence, link_failed, the bridged runs:
    (first frame, last frame, travel px, uncertainty px) each, and the blank frames at the
    swipe's ends that the contact test let through (T,) bool: a low SNR leaves it no split
    between blank and textured frames, and such frames, matching only noise and the fixed
    pattern's remains, are placed as if still (the report does not count them as contact)."""
    t_n = positions.shape[0]
    end_blank = np.zeros(t_n, dtype=bool)
    if chain.size < 8:
        return positions, confidence, link_failed, [], end_blank
    sig2, med, static = _texture_power(prep, chain, prep.noise_sigma, positions[chain, 0])
    if med <= 0.0:
        return positions, confidence, link_failed, [], end_blank
    # The leading and trailing runs of blank chain frames, only where the contact test let
    # the swipe's first (last) frame through, i.e. found no blank frames there at all: where
    # it did split, frames next to the split are the finger's soft edge, whose texture this
    # measure (against a frame-to-frame noise estimate that a fast swipe's motion inflates)
    # can read as nothing (a 16x128 demo swipe at 1 px per frame: a quarter of the strip
    # touched, read 0).
    blank_c = sig2 < _END_BLANK_FRAC * med
    k0, k1 = 0, chain.size
    if not blank_c.all():
        k0 = int(np.argmin(blank_c)) if chain[0] == 0 else 0
        k1 = chain.size - int(np.argmin(blank_c[::-1])) if chain[-1] == t_n - 1 else chain.size
        end_blank[chain[:k0]] = True
        end_blank[chain[k1:]] = True
    # per frame, over the finger's extent: faint (incl. not in contact) and blank
    faint = np.zeros(t_n, dtype=bool)
    blank = np.zeros(t_n, dtype=bool)
    faint[chain[0]:chain[-1] + 1] = True
    blank[chain[0]:chain[-1] + 1] = True
    faint[chain] = sig2 < _FAINT_FRAC * med
    blank[chain] = sig2 < _BLANK_FRAC * med
    clear = np.zeros(t_n, dtype=bool)
    clear[chain] = ~faint[chain]
    # rows with texture on a typical clear frame (a dead or stuck row is blank on every frame)
    typical = None
    if link_failed.any():
        sub = np.flatnonzero(clear)
        sub = sub[np.linspace(0, sub.size - 1, min(sub.size, 40)).astype(int)] if sub.size else sub
        typical = (np.median(_row_power(prep, sub, static), axis=0) >= _FAINT_FRAC * med
                   if sub.size else np.zeros(prep.z.shape[1], dtype=bool))
    positions = np.array(positions, dtype=np.float64, copy=True)
    confidence = np.array(confidence, dtype=np.float64, copy=True)
    link_failed = np.array(link_failed, dtype=bool, copy=True)
    # For the carry only, the ends also reach over frames that equal the swipe's first (last)
    # frame up to a tenth of the typical texture power: frames without the finger show the
    # same fixed-pattern rest, which, with a weak finger texture, can read as texture
    # against the swipe's median pattern (scikit-image's Shepp-Logan phantom swiped over
    # 16x128 in fast mode: 0.40 of the median; DEVELOPERS.md). Only where links failed among
    # them (a finger placed before it moves matches itself and fails no link).
    k0c, k1c = k0, k1
    if link_failed.any():
        ok_p = prep.plate_ok
        if chain[0] == 0:
            d = _texture_about(prep.z, chain[:64], prep.z[chain[0]].astype(np.float32), ok_p)
            k0c = max(k0, int(np.argmax(np.append(d ** 2 >= _END_BLANK_FRAC * med, True))))
        if chain[-1] == t_n - 1:
            tail = chain[-64:][::-1]
            d = _texture_about(prep.z, tail, prep.z[chain[-1]].astype(np.float32), ok_p)
            n_tail = int(np.argmax(np.append(d ** 2 >= _END_BLANK_FRAC * med, True)))
            k1c = min(k1, chain.size - n_tail)
    if k0c > 0 or k1c < chain.size:
        _carry_blank_ends(chain, k0c, k1c, clear, positions, confidence, link_failed, times,
                          r_n)
    runs = []
    # runs of faint frames over the finger's extent: a..f-1 each
    c0, c1 = int(chain[0]), int(chain[-1])
    edges = np.diff(np.concatenate([[0], faint[c0:c1 + 1].astype(np.int8), [0]]))
    cand = list(zip(np.flatnonzero(edges == 1) + c0, np.flatnonzero(edges == -1) + c0))
    # ... and failed links between two frames that are not faint, where a band narrower than
    # the strip passes: texture on both sides of it stays in view, so no frame is faint
    # against a swipe whose median frame is weakly textured (a 16x128 strip over the
    # background between the coins of scikit-image's photograph at 15 dB: the two frames read
    # 0.59 and 0.39 of the median, their textured rows did not overlap, and the failed link
    # was taken for a gap, span +14.6 %); an empty run (a == f) between them.
    for k in np.flatnonzero(link_failed[c0:c1]) + c0:
        if not faint[k] and not faint[k + 1] and c0 < k and k + 1 < c1:
            cand.append((k + 1, k + 1))
    for a, f in sorted(cand):
        f0, f1 = int(a) - 1, int(f)                  # clear frames on either side
        if f0 < chain[0] or f1 > chain[-1]:
            continue                                 # the finger's ends
        # A band narrower than the strip: the links across it failed (nothing but the band in
        # their overlap) and a frame shows the band's edge passing through its rows. A too-fast
        # jump blurs whole frames; it does not leave some rows textured and others blank.
        band_edge = (link_failed[max(f0 - 1, 0):f1 + 1].any()
                     and _shows_band_edge(prep, np.arange(f0, f1 + 1), static, med, typical,
                                          r_n))
        if not band_edge and not blank[a:f1].any():
            continue                                 # faint texture only
        vel = [v_side for v_side in (_clear_side_velocity(f0, -1, clear, positions, times, r_n),
                                     _clear_side_velocity(f1, 1, clear, positions, times, r_n))
               if v_side is not None]
        if len(vel) < 2:
            continue
        v = 0.5 * (vel[0] + vel[1])
        dt = times[f1] - times[f0]
        n_run = f1 - f0 - 1
        unseen = n_run > int(np.count_nonzero(prep.contact[a:f1]))
        # (frames where the finger was not seen at all are no jump's blur, however short the
        # travel across them: a 0.41 mm crease at 0.32 px per frame on 8 rows, 7 frames out
        # of contact, 3.5 px of travel; left to the tracker, fast mode held them on the
        # fixed pattern's rest and reported a false 1.2 px backtrack, span -1.4 %)
        if not band_edge and ((n_run < _BRIDGE_MIN_FRAMES and not (unseen and n_run >= 3))
                              or (np.hypot(*(v * dt)) < 0.5 * r_n and not unseen)):
            continue                                 # too short for a blank band: a jump
        # The first registrations after the band (and the last before it) are searches
        # that can land a ridge period off (a simulated whorl: a 7.7 px step between two
        # clear frames at 0.33 px per frame, span +4.9 %): steps next to the run that
        # disagree with their side's speed by more than a quarter strip are bridged too.
        tol = max(1.0, 0.25 * r_n)
        for _ in range(r_n):
            step = positions[f1 + 1] - positions[f1] if f1 + 1 < t_n else None
            if (step is None or not clear[f1 + 1] or times[f1 + 1] <= times[f1]
                    or np.hypot(*(step - vel[1] * (times[f1 + 1] - times[f1]))) <= tol):
                break
            f1 += 1
        for _ in range(r_n):
            step = positions[f0] - positions[f0 - 1] if f0 >= 1 else None
            if (step is None or not clear[f0 - 1] or times[f0] <= times[f0 - 1]
                    or np.hypot(*(step - vel[0] * (times[f0] - times[f0 - 1]))) <= tol):
                break
            f0 -= 1
        dt = times[f1] - times[f0]
        new_f1 = positions[f0] + v * dt
        positions[f1:] += new_f1 - positions[f1]
        w = ((times[f0:f1 + 1] - times[f0]) / dt)[:, None]
        positions[f0:f1 + 1] = positions[f0] + w * (new_f1 - positions[f0])
        link_failed[f0:f1] = False
        travel = float(np.hypot(*(v * dt)))
        disagree = 0.5 * float(np.hypot(*(vel[0] - vel[1]))) * dt
        sigma = float(np.sqrt(_BRIDGE_SIGMA_PX ** 2 + disagree ** 2
                              + (_BRIDGE_SPEED_FRAC * travel) ** 2))
        conf = _carried_confidence(sigma)
        # (a band crossed between two frames: the frame after it, placed by the carry, is
        # the run, and the travel is reported as for any run, from the frame before it to
        # the frame after it)
        if f1 - f0 >= 2:
            lo_f, hi_f = f0 + 1, f1 - 1
        else:
            lo_f = hi_f = f1
            if f1 + 1 < t_n:
                travel = float(np.hypot(*(positions[f1 + 1] - positions[f0])))
        run = np.arange(lo_f, hi_f + 1)
        run = run[prep.contact[run]]
        confidence[run] = np.minimum(confidence[run], conf)
        runs.append((int(lo_f), int(hi_f), travel, sigma))
    return positions, confidence, link_failed, runs, end_blank


def _clear_side_velocity(f, side, clear, positions, times, r_n):
    """Velocity (px per time unit) of frame ``f`` and the clear frames next to it on one side
    (``side`` -1 before it, +1 after), over two strip lengths of travel (at least R frames, at
    most 64): a slow swipe's speed from a few frames is noisy (a whorl across a 1.1 mm band
    at 0.32 px per frame: -0.54 % of span from one strip length, -0.05 % from two). None
    with too few frames (see _steady_velocity)."""
    t_n = positions.shape[0]
    m = 1
    while (m < 64 and 0 <= f + side * m < t_n and clear[f + side * m]
           and (m < r_n or abs(positions[f + side * m, 0] - positions[f, 0]) < 2 * r_n)):
        m += 1
    lo, hi = sorted((f, f + side * (m - 1)))
    if hi - lo < 2 or times[hi] <= times[lo]:
        return None
    return _steady_velocity(times[lo:hi + 1], positions[lo:hi + 1], 2)


def _carried_confidence(sigma):
    """Confidence of frames carried by a measured speed with placement uncertainty ``sigma``
    px (a blank run, a run at the strip's limit, a blank end): P(|e| < 0.25 px) as in
    _confidence, at least 0.06 (over the fusion's 0.05: the band they show is real)."""
    return max(float(erf(0.25 / (np.sqrt(2.0) * sigma))), 0.06)


def _carry_blank_ends(chain, k0, k1, clear, positions, confidence, link_failed, times, r_n):
    """Links that failed among the blank frames at the swipe's ends (chain frames before
    ``chain[k0]`` and from ``chain[k1]`` on, see _bridge_blank_runs) are no gap: a gap needs
    the finger's texture on both sides, and these frames show only what is left of the fixed
    pattern (when the finger's texture is weak, e.g. a finger with broad ridge-free areas,
    that rest can reach the clear-texture share of _gap_links, which then pushed each failed
    link a strip length: a 16x128 swipe came out 10 % long with a gap reported where the
    finger arrived). Where such a link failed, the frames beyond it are carried from the
    frame after it (registered with the nearest clear frame) at the speed measured over that
    clear frame and its clear neighbours (as a blank run's, with its confidence), and the
    links there no longer count as failed. In place; positions are taken again relative to
    frame 0."""
    t_n = positions.shape[0]
    moved = False
    ok = np.flatnonzero(clear[chain[k0:k1]]) + k0          # clear chain frames between the ends
    if ok.size == 0:
        return
    for f, side, blank_end in ((int(chain[ok[0]]), 1, k0 > 0),
                               (int(chain[ok[-1]]), -1, k1 < chain.size)):
        # f: the clear frame nearest that end; the links from the end to it
        span = slice(0, f) if side > 0 else slice(f, t_n - 1)
        if not blank_end or not link_failed[span].any():
            continue
        v = _clear_side_velocity(f, side, clear, positions, times, r_n)
        if v is None:
            continue
        # the frames beyond the failed links nearest f (those between registered with f)
        bad = np.flatnonzero(link_failed[span]) + span.start
        a = int(bad[-1]) + 1 if side > 0 else int(bad[0])
        ends = np.arange(0, a) if side > 0 else np.arange(a + 1, t_n)
        dt = times[ends] - times[a]
        positions[ends] = positions[a] + dt[:, None] * v[None, :]
        link_failed[span] = False
        travel = float(np.hypot(*(v * np.max(np.abs(dt)))))
        sigma = float(np.hypot(_BRIDGE_SIGMA_PX, _BRIDGE_SPEED_FRAC * travel))
        conf = _carried_confidence(sigma)
        confidence[ends] = np.minimum(confidence[ends], conf)
        moved = True
    if moved:
        positions -= positions[0]


def _row_power(prep, frames, static):
    """Texture power above the temporal noise of each row of ``frames`` (about ``static``,
    less each frame's mean over the good plates, as _texture_power measures frames), shape
    (len(frames), R); NaN for rows with fewer than an eighth of their plates good."""
    ok = prep.plate_ok
    d = prep.z[np.asarray(frames, dtype=np.intp)].astype(np.float64) - static
    mu = np.where(ok, d, 0.0).sum(axis=(1, 2)) / max(int(ok.sum()), 1)
    d = np.where(ok, d - mu[:, None, None], 0.0)
    n_row = ok.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        p = (d * d).sum(axis=2) / n_row - float(prep.noise_sigma) ** 2
    p[:, n_row < max(2, ok.shape[1] // 8)] = np.nan
    return p


def _shows_band_edge(prep, frames, static, med, typical, r_n):
    """Whether one of ``frames`` shows the edge of a ridge-free band: at least
    ``max(2, min(4, R // 4))`` successive rows blank (power under _BLANK_FRAC of the swipe's
    median ``med``) that are textured on a typical frame (``typical``), and a clear row (at
    least _FAINT_FRAC of it) elsewhere in the frame."""
    if typical is None or not typical.any():
        return False
    p = _row_power(prep, frames, static)
    return bool(_band_edge_rows((p < _BLANK_FRAC * med) & typical[None, :],
                                p >= _FAINT_FRAC * med).any())


def _band_edge_rows(blank, clear):
    """Per frame, from its rows' (F, R) blank and clear flags: at least max(2, min(4, R // 4))
    successive blank rows and a clear row (the batch path's and the stream's test)."""
    r_n = blank.shape[1]
    need = max(2, min(4, r_n // 4))
    if r_n < need + 1:
        return np.zeros(blank.shape[0], dtype=bool)
    runs = np.lib.stride_tricks.sliding_window_view(blank, need, axis=1).all(axis=-1)
    return runs.any(axis=1) & clear.any(axis=1)


# A frame is faint when its texture power (above the noise) is under this share of the
# swipe's median, blank under the second (no texture left to register).
_FAINT_FRAC = 0.25
_BLANK_FRAC = 0.03
# Frames at the swipe's ends with less texture than this share of the median are not counted
# as contact by the report (see _bridge_blank_runs).
_END_BLANK_FRAC = 0.1
# Placement error (px) assumed for frames carried across a blank run at the measured speed.
_BRIDGE_SIGMA_PX = 0.5
# ... plus this share of the travel across the run: the speed within it is not measured (on
# bench_bands.py's human-profile swipes the speed dipped inside two bands, by a quarter of
# the travel across them; constant and accelerating ones erred by under 2 %).
_BRIDGE_SPEED_FRAC = 0.15
# A blank run has at least this many frames, or at least 3 of which some show no finger at
# all: a too-fast jump blurs a few frames to blank, but the finger is still seen on them (the
# demo's 16x128 swipe jumping 24 px per frame for three frames; with 3 here it was bridged,
# called usable and came out 34 px off), while a crease's skin does not touch the sensor and
# a band of a photograph as wide as the strip lasts longer (10-50 frames on bench_bands.py's
# swipes).
_BRIDGE_MIN_FRAMES = 6


def _overlap_limit(link_gap, link_ok, along, times_ch, r_n):
    """Gap runs that are the strip's own limit rather than a jump: where the links around
    a run that held moved at least _LIMIT_FRAC of R - 1 rows per frame, successive frames
    overlap by a row or less and fail to register from the speed alone (a 2-row strip at
    1.0-1.1 px per frame: every row of the finger is seen, by frames that never share one).
    Such a run is no gap: the placement's motion model carries it at the speed around it,
    instead of pushing each link out to a strip height (that 2-row swipe: 11 false gaps,
    span +23 %). ``link_gap``, ``link_ok``: per chain link; ``along``, ``times_ch``: the
    chain frames' along positions (the links that held are read) and times. Returns the
    new link_gap and the runs (first link, last link, speed px per frame) taken out."""
    link_gap = np.array(link_gap, dtype=bool, copy=True)
    link_ok = np.asarray(link_ok, dtype=bool)
    n = link_gap.size
    if not link_gap.any() or r_n < 2 or n < 4:
        return link_gap, []
    dt = np.diff(np.asarray(times_ch, dtype=np.float64))
    speed = np.abs(np.diff(np.asarray(along, dtype=np.float64))) / np.where(dt > 0, dt, np.inf)
    runs = []
    k = 0
    while k < n:
        if not link_gap[k]:
            k += 1
            continue
        e = k
        while e + 1 < n and link_gap[e + 1]:
            e += 1
        lo, hi = max(0, k - _LIMIT_LINKS), min(n, e + 1 + _LIMIT_LINKS)
        held = np.flatnonzero(link_ok[lo:hi]) + lo
        if held.size >= 4:
            v = float(np.median(speed[held]))
            if v >= _LIMIT_FRAC * (r_n - 1):
                link_gap[k:e + 1] = False
                runs.append((k, e, v))
        k = e + 1
    return link_gap, runs


def _push_limit(positions, chain, cpairs, runs, dt_frames, r_n):
    """Each failed link of a run at the strip's limit (see _overlap_limit) moved at least
    R - 1 rows (it did not register): steps the motion model left shorter are lengthened to
    that, in place (the links that held next to it, at the limit themselves, read short)."""
    links = np.zeros(len(cpairs), dtype=bool)
    for k, e, _ in runs:
        links[k:e + 1] = True
    _push_gaps(positions, chain, cpairs, links, dt_frames, r_n - 1)


def _limit_frames(runs, chain, confidence):
    """Chain-link runs of _overlap_limit as frame runs (first frame, last frame, speed px per
    frame, uncertainty px of the travel across them), their inner frames' confidence lowered
    (in place) to that of a placement known to _BRIDGE_SIGMA_PX plus _BRIDGE_SPEED_FRAC of
    the travel (as a blank run's: the speed within the run is not measured)."""
    out = []
    for k, e, v in runs:
        a, b = int(chain[k]), int(chain[e + 1])
        travel = v * (e - k + 1)
        sigma = float(np.hypot(_BRIDGE_SIGMA_PX, _BRIDGE_SPEED_FRAC * travel))
        conf = _carried_confidence(sigma)
        confidence[a + 1:b] = np.minimum(confidence[a + 1:b], conf)
        out.append((a, b, float(v), sigma))
    return out


# A run of failed links is the strip's limit (see _overlap_limit) when the links around it
# (this many on either side) that held moved at least this share of R - 1 rows per frame.
_LIMIT_FRAC = 0.75
_LIMIT_LINKS = 16


def _strong_frames(prep, chain, noise, along):
    """Frames with clear texture (for telling a gap from faint frames at the finger's ends):
    signal power above the temporal noise (std ``noise``; at low SNR a blank frame's spread
    is the noise) at least a quarter of the swipe's median (see _texture_power); and frames
    with full texture, at least _FULL_FRAC of the median."""
    sig2, med, _ = _texture_power(prep, chain, noise, along)
    return sig2 >= _FAINT_FRAC * med, sig2 >= _FULL_FRAC * med


# A frame shows the finger's full texture when its texture power reaches this share of the
# swipe's median: a gap's two sides must each hold one (see _gap_links).
_FULL_FRAC = 0.5


def _gap_links(link_ok, strong, full=None):
    """Failed links that are gaps: each run of successive failed links whose outer frames,
    and the next frame outward on each side, show clear texture (a finger arriving or leaving
    fades over several frames; a too-fast swipe has full texture on both sides of the jump,
    while the frames within it may be blurred by the motion). An outer frame blurred by the
    jump's own motion counts on its side if it still registered with its outward neighbour
    and the next two frames outward are clear (a fingertip's faint frames have faint
    neighbours). ``full`` (per frame, optional): each side must also hold, somewhere between
    the run and the swipe's end on that side, a frame with the finger's full texture: a
    fingertip's edge fades in over many frames, and a link can fail among its frames while
    they are still clear but weak (a finger with a broad ridge-free rim, frames at a third to
    half of the median texture: a link failed three frames after the contact began and was
    called a gap, the frames before it pushed a strip length away)."""
    link_ok = np.asarray(link_ok, dtype=bool)
    n = link_ok.size
    s = np.concatenate([[False, False], np.asarray(strong, dtype=bool), [False, False]])   # s[k + 2] = strong[k]
    ok = np.concatenate([[False], link_ok, [False]])                   # ok[k + 1] = link_ok[k]
    out = np.zeros(link_ok.shape, dtype=bool)
    if full is None:
        full_left = full_right = np.ones(n + 1, dtype=bool)
    else:
        full = np.asarray(full, dtype=bool)
        full_left = np.logical_or.accumulate(full)                     # a full frame at or before k
        full_right = np.logical_or.accumulate(full[::-1])[::-1]        # ... at or after k

    def side(f, d):
        # frame f (outer frame of the run), d = -1 outward to the left, +1 to the right
        if not (full_left[f] if d < 0 else full_right[f]):
            return False
        if s[f + 2] and s[f + d + 2]:
            return True
        link_out = ok[f + 1] if d > 0 else ok[f]                       # link f..f+d
        return bool(link_out and s[f + d + 2] and s[f + 2 * d + 2])

    k = 0
    while k < n:
        if link_ok[k]:
            k += 1
            continue
        e = k
        while e + 1 < n and not link_ok[e + 1]:
            e += 1
        # links k..e join frames k..e+1: outer frames k and e+1
        if side(k, -1) and side(e + 1, +1):
            out[k:e + 1] = True
        k = e + 1
    return out


@numba.njit(**JIT)
def _texture_about(z, frames, static, ok):
    """Standard deviation over the good plates of z[k] - static, for each k in ``frames``."""
    r_n, c_n = static.shape
    out = np.zeros(frames.shape[0])
    for i in range(frames.shape[0]):
        k = frames[i]
        s = 0.0
        s2 = 0.0
        n = 0
        for r in range(r_n):
            for c in range(c_n):
                if ok[r, c]:
                    d = float(z[k, r, c]) - float(static[r, c])
                    s += d
                    s2 += d * d
                    n += 1
        if n > 0:
            mu = s / n
            out[i] = np.sqrt(max(s2 / n - mu * mu, 0.0))
    return out


# The tracker registers each frame against a key frame up to 0.75 (R - 1) rows away, so on
# short strips the overlaps are a few rows, of which the edge rows (one-sided gradients) are
# a large share. Measured, left loop 8 x 128 @ 4 kHz, 80 mm/s, tracker alone vs the
# multi-baseline pairs (span error): R = 4: +16 % vs -0.04 % at 30 dB; R = 5: +5.8 % vs -0.36 %;
# R = 6: +1.1 % vs -0.04 %; R = 7: +0.6 % vs -0.01 %; R = 8: -0.35 % vs -0.04 % at 30 dB, and
# at 12 / 10 dB the tracker (then refined) held where the pairs drifted (across RMS 0.16 vs
# 0.63 px; span +0.15 % vs -0.77 %). The filter's own drift estimate did not separate these
# (it passed R = 4 at 30 dB and failed R = 8 at 12 dB), so the row count decides. Those were
# single swipes at 0.39 px per frame; over 84 simulated swipes of 6 and 7 rows (160 columns,
# 4 kHz, 0.2-2.8 px per frame, constant and human profiles, four finger classes, 25-35 dB;
# default mode) the tracker placed 58 better: median |span error| 0.95 -> 0.22 % at 0.8-2.8
# px per frame (over 1 %: 23 -> 8 of 48), 0.033 -> 0.017 % at 0.2-0.6 (worst 4.2 -> 0.50 %),
# where the pairs' along steps drift (an outside generator's 6x144 strip at 2.3 px per frame:
# -6.8 % against -0.43 %). 32 more with skew, stalls and backtracks at 1-6 kHz: median span
# 0.52 -> 0.20 %, along / across RMS 0.67 / 1.23 -> 0.28 / 0.25 px (across worse on 8). At
# 5 rows it helped less (median 0.92 -> 0.71 %, better on 12 of 24) and at 4 it did worse
# (1.12 -> 1.73 %), so the pairs kept 2-5 rows until the key frames' edge filters were
# chosen per swipe (track.track's symmetric_edges="auto"; the one-sided windows are the
# edge rows' bias above). Then on 90 swipes of 5 rows drawn as bench_few_rows.py's (seeds
# 5000-5089: 2-8 kHz, 96-256 columns, 0.1-0.65 (R - 1) px per frame, 15-40 dB, a quarter
# with a stall), pairs -> tracker: default mode span median 0.62 / 1.14 -> 0.45 / 0.41 % on
# the first 30 / the other 60, over 1 %: 11 / 31 -> 4 / 12, worst 23 / 81 -> 1.7 / 10.7 %,
# along RMS median 0.67 / 1.30 -> 0.37 / 0.30 px, across 0.74 / 0.95 -> 0.31 / 0.36 px,
# false events 0 / 5 -> 1 / 5; fast mode (all 90) 0.90 -> 0.49 %, over 1 %: 42 -> 18; the
# streaming stitcher 2.09 -> 0.69 %, over 1 %: 61 -> 35, false events 33 -> 12. At 4 rows
# still not (the same draw: median 0.85 -> 0.70 %, along 0.85 -> 0.59 px, but better on 43
# of 90 and false events 6 -> 9; with six model passes after the tracker, as the pairs get,
# 0.69 %, better on 49 of 90, false events 9): the pairs keep 2-4 rows. The streaming stitcher
# shares the switch; its tracker against its pairs window on 48 such swipes (0.4-2.2 px per
# frame): better on 40, median |span error| 1.21 -> 0.35 %, over 1 %: 26 -> 8.
_TRACK_MIN_ROWS = 5
# ... and a strip of fewer than 24 columns shows the tracker too little texture per key: 16
# simulated swipes of 16 columns (8 to 32 rows, four finger classes, 25 dB) placed by the
# tracker erred by 0.16-172 px RMS along (median 3.9; ridge-period jumps, two false gaps), by
# the pairs 0.06-11.7 (median 2.5; 12 of the 16 better along and across together). At 24 columns neither path was better
# (2 of 4 each), so the switch stops there.
_TRACK_MIN_COLS = 24


# Frames before the first and after the last tracked frame move on at the velocity of the
# nearest this many tracked frames (held still, as before, they put frames the simulator
# counts in contact (pad coverage 0.4-0.6 as the fingertip arrives or leaves) behind by
# their travel: an 8x64 arch -1.7 % of span, a 12x96 loop -0.8 %).
_EDGE_VELOCITY_FRAMES = 8


def _spread(times, chain, chain_pos):
    """Positions of all frames from those of the chain frames: linear in time between chain
    frames, at the velocity of the nearest ``_EDGE_VELOCITY_FRAMES`` chain frames beyond
    either end; relative to frame 0. (These frames have no weight in the image.)"""
    t_n = len(times)
    out = np.empty((t_n, 2))
    tc = times[chain]
    for k in range(2):
        out[:, k] = np.interp(times, tc, chain_pos[:, k])
    n = min(_EDGE_VELOCITY_FRAMES, len(chain))
    if n >= 2:
        m = len(chain)
        for sel, side, edge in ((slice(0, n), times < tc[0], 0),
                                (slice(m - n, m), times > tc[-1], m - 1)):
            dt = tc[sel][-1] - tc[sel][0]
            if side.any() and dt > 0:
                v = (chain_pos[sel][-1] - chain_pos[sel][0]) / dt
                out[side] = chain_pos[edge] + (times[side] - tc[edge])[:, None] * v[None, :]
    return out - out[0]


def _tracked_placement(x, prep, chain, dt_frames, max_across_px, motion_prior_px, *, refit):
    """The key-frame tracker's placement (:mod:`stripstitch.track`); None for strips of
    fewer than ``_TRACK_MIN_ROWS`` rows or ``_TRACK_MIN_COLS`` columns. ``refit``: True to
    refit the fixed pattern against the fused image where there are no blank frames;
    "stalled" (fast mode) not to. Either way it is first estimated again with the frames
    weighted by their tracked travel where there are none and the finger stood still for at
    least ``_STALLED_REPREPARE_STILL`` of the tracked links. Returns positions, confidence,
    failed links, the prepared frames used, the numbers of links and links kept, the overlap-limit runs, the key links (frame,
    key frame, measured step, its information; see _across_slope_from), and (chain, the
    tracker's result, frame times, which chain frames are keys) for _turned_links_across."""
    t_n, r_n, c_n = prep.z.shape
    if r_n < _TRACK_MIN_ROWS or c_n < _TRACK_MIN_COLS:
        return None
    times = np.concatenate([[0.0], np.cumsum(dt_frames)])

    # Default mode registers smoothed frames (see _TRACK_PREFILTER_PX) where the first,
    # unsmoothed tracking found the overlaps wide enough; fast mode does not.
    pre = _TRACK_PREFILTER_PX if (refit is True and r_n >= _PREFILTER_MIN_ROWS) else 0.0

    # The key frames' half-sample filters at the strip's edges (track.track's
    # symmetric_edges): "auto" tracks the swipe with both and keeps the placement whose
    # registrations leave the smaller residual. The edge-symmetric filters win on textures
    # finer than the plates (photographs, the simulated fingers' flat-topped ridges), the
    # shifted windows on smooth band-limited ones. Fast mode (the tracker's placement is
    # final): against the edge-symmetric filters everywhere, the same placements on the
    # accuracy suite, bench_random.py seeds 7000 / 8000 and 80 scikit-image photographs (the
    # residual chose them on every one), the tests' band-limited textures at 8x64 along RMS
    # 0.10-0.20 -> 0.008-0.08 px; 6- and 7-row strips (which had the shifted windows) of
    # bench_few_rows.py's draw, 30 each: span median 0.36 / 0.30 -> 0.20 / 0.15 %, along
    # 0.31 / 0.30 -> 0.21 / 0.12 px. Default mode's model passes start from the tracker: on
    # 6 and 7 rows the choice helped there too (span median 0.26 / 0.21 -> 0.22 / 0.16 %,
    # along 0.28 / 0.16 -> 0.16 / 0.12 px, across 0.27 / 0.21 -> 0.19 / 0.18 px); on 8 rows
    # and more it did not (the suite's along / across medians 0.036 / 0.054 -> 0.058 / 0.073
    # px; photographs and random swipes within 0.02 %), so there the shifted windows stay
    # (see DEVELOPERS.md, "Edge rows").
    sym = "auto" if (refit is not True or r_n <= _EDGE_CHOICE_DEFAULT_MAX_ROWS) else False

    def run(p, smooth=0.0):
        return _track.track(p.z, p.plate_ok, chain, times=times, max_across_px=max_across_px,
                            sigma_acc_px=motion_prior_px, prefilter_px=smooth,
                            symmetric_edges=sym)

    def spread(tr):
        return _spread(times, chain, tr.positions)

    tr = run(prep)
    if pre:
        dt_ch = np.diff(times[chain])
        step = np.abs(np.diff(tr.positions[:, 0]))[tr.link_ok] / np.maximum(dt_ch[tr.link_ok], 1.0)
        if step.size == 0 or float(np.percentile(step, 95)) > _PREFILTER_MAX_STEP * r_n:
            pre = 0.0
    smoothed = False
    if refit == "stalled" or refit is True:
        still = np.abs(np.diff(tr.positions[:, 0])) < 0.02
        refit = refit is True
        if (still.size and float(np.mean(still)) >= _STALLED_REPREPARE_STILL
                and (~prep.contact).sum() < 8):
            # The finger still for a good share of the links and no blank frames: the
            # per-plate statistics again, each frame weighted by the travel the tracker found
            # since the frame before (a stall counts about once), and tracked again; default
            # mode then refits against the fused image from there.
            prep = _reg.prepare(x, frame_weights=_travel_weights(spread(tr), prep.contact))
            tr = run(prep)
    if refit and (~prep.contact).sum() < 8:
        # Without blank frames the fixed pattern was estimated from the finger itself (the
        # per-plate mean over the swipe), which also holds the mean texture each plate saw:
        # a static pattern that pulls every registration towards zero shift. Refitted
        # against the fused image, then tracked again. (With blank frames the refit did not
        # help: 13-swipe suite, median span error 0.031 % without, 0.070 % with.)
        # The refit's rows keep the first estimate's mean gain: its line fits read the rows'
        # mean gains 0.5-4.5 % apart on swipes whose sensor has none (stalls, photographs;
        # with the true positions too), a static profile that shortened fast swipes
        # (bench_independent.py, 72 swipes of seeds 7000 / 7100 / 7200: mean span error
        # 0.086 -> 0.075 %, along RMS mean 0.209 -> 0.182 px, across median 0.070 -> 0.069;
        # of 48, 0.082 -> 0.062 % with the worst 0.549 -> 0.381 %; the accuracy suite's
        # 12 dB brick photograph -0.395 -> -0.264 %, across median 0.063 -> 0.054 px). Only
        # here: on strips of 2-5 rows (the pairs' refit) it moved single swipes by up to
        # 1.4 % of span either way (bench_few_rows.py, 10 per row count).
        prep2 = _refit_fixed_pattern(x, prep, spread(tr), np.zeros(t_n), row_gains=False)
        if prep2 is not None:
            prep = prep2
            tr = run(prep, pre)
            smoothed = True
    if pre and not smoothed:
        tr = run(prep, pre)
    link_ok = tr.link_ok
    placed = tr.reference >= 0
    limit_runs = []
    if link_ok.all():
        link_gap = np.zeros(len(link_ok), dtype=bool)
    else:
        noise = float(np.median(tr.sigma[placed])) if placed.any() else prep.noise_sigma
        strong, full = _strong_frames(prep, chain, noise, tr.positions[:, 0])
        link_gap = _gap_links(link_ok, strong, full)
        link_gap, limit_runs = _overlap_limit(link_gap, link_ok, tr.positions[:, 0],
                                              times[chain], r_n)
    # Frames out of contact: placed along the trajectory by time (weight 0 in the image).
    positions = spread(tr)
    cpairs = np.stack([chain[:-1], chain[1:]], 1)
    _push_gaps(positions, chain, cpairs, link_gap, dt_frames, r_n)
    _push_limit(positions, chain, cpairs, limit_runs, dt_frames, r_n)
    # Confidence from each frame's registration (the frame tracking started from: its
    # neighbour's).
    info = _with_model_error(tr.info, tr.positions - tr.positions[np.maximum(tr.reference, 0)])
    k0 = tr.start
    nb = k0 + 1 if k0 + 1 < len(chain) and placed[k0 + 1] else k0 - 1
    if 0 <= nb < len(chain) and placed[nb]:
        info[k0] = info[nb]
        placed = placed.copy()
        placed[k0] = True
    frame_info = np.zeros((t_n, 2, 2))
    frame_info[chain] = info
    ok_frac = np.zeros(t_n)
    ok_frac[chain] = placed
    confidence = _confidence(frame_info, prep.contact, ok_frac)
    link_failed = _failed_links(t_n, cpairs, link_gap)
    limit_runs = _limit_frames(limit_runs, chain, confidence)
    # Key links (frame, its key, the measured step, its information) for the refinement's
    # long-range across path (see _across_slope_from); the chain, the tracker's result and
    # the frame times for a turning swipe's (see _turned_links_across).
    is_key = np.isin(np.arange(len(chain)), tr.reference)
    kk = np.flatnonzero(is_key & (tr.reference >= 0))
    keys = (chain[kk], chain[tr.reference[kk]], tr.positions[kk] - tr.positions[tr.reference[kk]],
            tr.info[kk])
    return (positions, confidence, link_failed, prep, int(len(chain) - 1), int(link_ok.sum()),
            limit_runs, keys, (chain, tr, times, is_key))


# Strips of at most this many rows take the along steps from the delay between their rows
# (register.row_delay) wherever it was read, after the refinement too: the pairs overlap by a
# row or two and are pulled towards zero shift, and the refinement takes that out only
# slowly and not entirely. Eight simulated 2-row swipes (30-90 mm/s at 8 kHz, 20-40 dB):
# span error -0.2 to -4.0 % (median -1.5 %) before, -0.14 to +0.11 % with the delay; 3 rows:
# worst 1.57 -> 0.13 %. Seven harder 2-row swipes (stall and backtrack, 12 dB, 8 degree
# slant, too fast, dropped frames, 0.74 px/frame, a 3 degree turn): -2.9 / +76 / -1.9 /
# -4.0 / -0.33 / -14.9 / -1.1 % before, +0.54 / +7.5 / +0.62 / -2.5 / -0.42 / -1.8 / -0.60 %
# with it. Read after the refinement, the refinement's along steps (which it drifts off
# by its own zero-shift bias on so few rows) would be worse: 12 passes from the delay's
# start left the eight 2-row swipes at -0.8 to +0.0 %.
# Strips of 4-7 rows take it only where the finger moves at least _DELAY_MIN_SPEED px per
# frame, read between the first and last rows (row_step R - 1: the longest delay, so it
# stays over a frame up to R - 1 px per frame). There the few frames that see a row sample
# few sub-pixel phases: the pairs lock towards whole pixels and the refinement, which needs
# many phases, leaves them (a 4x160 arch at 0.85 px per frame came out 4.4 % long). Slower,
# the refinement does better than the delay (20 random 4-7 row swipes at 0.1-1.3 px per
# frame, 2-8 kHz, 15-40 dB: delay everywhere made the slow ones worse, e.g. 0.16 -> 0.54 %
# on the suite's 4-row 10 dB strip at 0.39 px per frame; gated at 0.45 px per frame: median
# |span error| 0.64 -> 0.35 %, worst 24 -> 11 %, the slow ones unchanged).
# Model passes after the tracker placed the frames (see stitch).
_TRACKED_PASSES = 2
# Default mode's tracker registers frames smoothed by a Gaussian of this many px (track.track's
# prefilter_px) on strips of at least _PREFILTER_MIN_ROWS rows. The plates alias the
# flat-topped ridges' harmonics, which makes registrations lock towards whole pixels; where
# the finger moves a near-constant fraction of a pixel per frame every link locks the same
# way and the model passes cannot take it out (all frames sample one sub-pixel phase): a
# steady 100 mm/s swipe on 16x128 at 2 kHz (0.984 px per frame) came out +0.12 to +0.38 %
# long, 0.11-0.31 px along RMS (three fingers), now -0.03 to +0.06 %, 0.01-0.06 px; 200 mm/s
# (1.97 px per frame) +0.09 to +0.21 % -> -0.10 to +0.03 %. Measured besides (default mode,
# before -> after): bench_random.py across median 0.125 -> 0.107 px, along 0.052 -> 0.046;
# 18 x 14 mm fingers across mean 0.319 -> 0.288 px; the accuracy suite along median 0.070 ->
# 0.036 px, span median 0.064 -> 0.046 %; bench_rotation.py along 0.049 -> 0.038. Worse: the
# photographed brick and gravel textures of bench_independent.py at 1.9 px per frame on
# 16x128 (along 0.23 -> 0.56 and 0.07 -> 0.12 px; their fine detail is what the smoothing
# takes, and the left-out edge rows shorten the overlaps), bench_bands.py's span median
# 0.095 -> 0.098 %, the suite's too-fast 16x128 swipe across its gap -1.6 -> -2.3 %, and
# turning swipes at whole-pixel speed, where the lock had hidden half of the along bias of
# the tracker's translation-only links of turned frames (16x128 at 0.98 px per frame turning
# 2-3 degrees, three fingers: -0.32 / -0.08 / +0.55 -> -0.78 / -0.31 / +0.27 %). Not on
# strips of fewer rows (8x192, whose 200 mm/s swipes at 4 kHz are as whole-pixel and still
# come out 0.16-0.45 % long: the two left-out rows are a quarter of the overlap; with the
# reach shortened to keep it, the whole-pixel swipes came out within 0.06 %, but the suite's
# 12 dB brick texture -0.4 -> -2.3 %, its steady 8x192 0.017 -> 0.050 px along) nor in fast
# mode (the tracker's placement is final there; bench_independent.py's fast along median
# 0.125 -> 0.219 px).
# sigma 0.5 took out half as much of the locking (noise-free frames, partial contact: link
# bias 0.035 -> 0.015 px against 0.001 at 0.7) and left the photographs as they were at 0.7.
# Cost (a second tracking where the fixed pattern is not refitted): 16x128 at 2 kHz 2.47x ->
# 2.20x real time on one core (bench_throughput.py).
# ... and only where the unsmoothed tracking's along steps stay within this share of the
# strip's rows (95th percentile): the two rows left out are then a small part of every
# overlap. (A 32x384 swipe at 1 kHz with steps of up to 27 px: its smoothed links locked a
# ridge period short, span +2.0 -> -33.9 %.)
_TRACK_PREFILTER_PX = 0.7
# Most rows on which default mode's tracker chooses its edge filters (see _tracked_placement).
_EDGE_CHOICE_DEFAULT_MAX_ROWS = 7
_PREFILTER_MIN_ROWS = 12
_PREFILTER_MAX_STEP = 0.5
# The fixed pattern is estimated again (see _tracked_placement) only where the tracker
# found the finger still for at least this share of its links and there are no blank frames:
# a stall's frames repeat one stretch of finger, and where the contact test finds no blank
# frames (low SNR) and the frames' change does not rise clearly above the noise
# (register.prepare's stall rule then stays off), that stretch stays in the per-plate means as
# a static pattern that pulls every shift towards zero. The second estimate weighs each frame
# by its tracked travel and costs a second tracking (an 8x192 at 14 dB, 534 frames: 15 -> 46
# ms, 8.9x -> 2.9x real time). Measured on 128 random swipes (bench_random.py seeds 9200 and
# 7000, fast mode; 7 of them changed): that swipe, still for a third of its frames, -5.6 ->
# -0.15 %; two more -1.3 -> -0.04 % and -1.9 -> -0.67 %; one +0.07 -> +0.16 %; seed 9200 none
# over 1 % (was 2), worst 0.85 %; medians 0.115 / 0.158 -> 0.108 / 0.159 % (seed 7000's along
# RMS median 0.133 -> 0.149 px: two stalled swipes 0.08 -> 0.17 and 0.12 -> 0.23 px along,
# their spans within 0.2 %); bench_independent.py (no blank frames on any swipe) better on all
# seven that changed, along median 0.136 -> 0.127 px, worst span 0.41 -> 0.33 %; the accuracy
# suite identical. Refitting against the fused image instead (default mode's way): the same
# cost, -5.6 -> -1.5 %. Default mode does both, this first: its refit is fitted against an
# image fused from the placement the stall-laden pattern gave (scikit-image's brick
# photograph over an 8x192 strip, standing still for half of 330 frames at 20 dB: span error
# -1.11 -> -0.12 %, along RMS 0.56 -> 0.15 px; bench_random.py seeds 7000 / 8000 / 9200,
# default mode, 10 of 192 swipes changed: across mean 0.145 / 0.186 / 0.195 -> 0.145 / 0.168
# / 0.170 px, a turning 8x192 stall 1.97 -> 0.34 px and another 1.26 -> 0.24 px across, the
# worst 0.05 -> 0.15 px across and -0.21 -> -0.33 % span; the accuracy suite identical).
_STALLED_REPREPARE_STILL = 0.1

_DELAY_MAX_ROWS = 7
_DELAY_MIN_SPEED = 0.45
# Links whose speed is interpolated between delay estimates: both within this many frames.
_DELAY_REACH = 8.0
_DELAY_SIGMA_PX = 0.05


def _delay_settings(r_n):
    """row_delay's row separation and the slowest speed (px/frame) it is taken at."""
    if r_n <= 3:
        return {"row_step": 1, "min_speed": 0.0}
    return {"row_step": r_n - 1, "min_speed": _DELAY_MIN_SPEED}


def _with_along_steps(positions, steps):
    """``positions`` with the along-swipe steps replaced where ``steps`` is finite."""
    d = np.diff(positions, axis=0)
    d[:, 0] = np.where(np.isfinite(steps), steps, d[:, 0])
    return np.vstack([[0.0, 0.0], np.cumsum(d, axis=0)])


def _delay_along(prep, positions, link_failed, dt_frames, row_step=1, min_speed=0.0):
    """Along-swipe steps from the delay between rows ``row_step`` apart
    (:func:`register.row_delay`) where it was read (interpolated between estimates at most
    ``_DELAY_REACH`` frames away on either side) and the speed is at least ``min_speed``
    px/frame, the pairs' elsewhere and across gaps. Returns the new positions and the steps
    taken from the delay (NaN where not; None if there were none)."""
    t_n = positions.shape[0]
    link_failed = np.asarray(link_failed, dtype=bool)
    # Each delay's across offset drawn towards the swipe's line, the median across-to-along
    # ratio of a first reading: where ridges run straight over the strip its peak slid along
    # them (see register._DELAY_ACROSS_PENALTY). The line from the pairs' placement instead
    # did as well on 3-5 rows but worse on 2 (their across is poor over one row of overlap:
    # bench_rows.py's 2-row swipes lost up to 0.3 px along).
    rd = _reg.row_delay(prep.z, prep.plate_ok, dt_frames=dt_frames, row_step=row_step,
                        across_slope="auto")
    steps = np.full(t_n - 1, np.nan)
    ok = rd.valid & np.isfinite(rd.along_px)
    if ok.sum() < 8:
        return positions, None
    times = np.concatenate([[0.0], np.cumsum(dt_frames)])
    when = np.interp(rd.time[ok], np.arange(t_n), times)
    order = np.argsort(when, kind="stable")
    when, speed = when[order], rd.along_px[ok][order]
    mid = 0.5 * (times[1:] + times[:-1])
    k = np.searchsorted(when, mid)
    before = np.where(k > 0, mid - when[np.maximum(k - 1, 0)], np.inf)
    after = np.where(k < when.size, when[np.minimum(k, when.size - 1)] - mid, np.inf)
    v = np.interp(mid, when, speed)
    use = ((before <= _DELAY_REACH) & (after <= _DELAY_REACH) & ~link_failed
           & (np.abs(v) >= min_speed))
    steps[use] = v[use] * np.asarray(dt_frames, dtype=np.float64)[use]
    return _with_along_steps(positions, steps), steps


def _push_gaps(positions, chain, cpairs, link_gap, dt_frames, r_n):
    """Across a link with no overlap (too fast, no dropped frame to explain it) the frames
    moved by at least the strip's height: the motion alone would place them too close and
    overlay rows that were never seen together. Push what follows out to ``r_n`` rows (in
    place; the strip's height for a gap, R - 1 for a link at its limit, see _push_limit)."""
    if not np.any(link_gap):
        return
    direction = np.sign(np.nanmedian(np.diff(positions[chain, 0]))) or 1.0
    for i, j in cpairs[np.asarray(link_gap, dtype=bool)]:
        if np.sum(dt_frames[i:j] - 1.0) >= 0.5:
            continue
        step = direction * (positions[j, 0] - positions[i, 0])
        if step < r_n:
            positions[j:, 0] += direction * (r_n - step)


def _failed_links(t_n, cpairs, link_gap):
    link_failed = np.zeros(t_n - 1, dtype=bool)
    for i, j in cpairs[np.asarray(link_gap, dtype=bool)]:
        link_failed[i:j] = True
    return link_failed


# Farthest (px, either axis) a long-baseline partner's coarse start may lie from the shift
# the trajectory so far predicts (coarse_shifts' window of 1.5 px, and 1 px of slack).
_PARTNER_REACH_PX = 2.5


def _full_placement(x, prep, chain, dt_frames, *, frame_rate_hz, max_across_px, motion_prior_px):
    """Multi-baseline pairwise registration, robust trajectory solve and model refinement."""
    t_n, r_n, c_n = x.shape
    # ---- successive pairs: coarse search with a temporal prior, then refinement ----
    cpairs = np.stack([chain[:-1], chain[1:]], 1)
    zn = _reg._row_normalise(prep.z, prep.plate_ok)
    max_along = r_n - 1
    pool = max(2, int(round(0.002 * frame_rate_hz))) if frame_rate_hz else 8
    coarse, score, _ = _reg.coarse_chain(zn, cpairs, max_along=max_along,
                                         max_across=max_across_px, pool=pool)
    atlas = _reg._Atlas(prep.z)
    grads = _reg._template_gradients(prep.z)
    est_c = _reg.refine_shifts(prep, cpairs, coarse, estimate_rotation=False,
                               iterations=3, atlas=atlas, grads=grads)
    # A link fails when nothing overlaps: the coarse NCC is at noise level or the refined
    # overlap is too small to place the frame.
    # (The refined NCC decides: the coarse score is taken at the pooled shift, which lags
    # where the velocity changes abruptly, e.g. when a stall begins.)
    link_ok = est_c.ok & (est_c.ncc > 0.5)
    # A failed link is a gap (the finger moved past the strip between the two frames) only
    # when both frames show clear texture. While the fingertip arrives or leaves, frames
    # with faint texture fail to match for want of texture, not of overlap: the motion prior
    # bridges them, their low confidence keeps them out of the image, and nothing is pushed
    # apart.
    # The noise is what is left after aligning the links that held (each pair's residual,
    # per frame); successive differences would count a fast swipe's motion as noise.
    noise = float(np.median(est_c.sigma[link_ok])) if link_ok.any() else prep.noise_sigma
    along = np.concatenate([[0.0], np.cumsum(np.where(link_ok, est_c.shift[:, 0], 0.0))])
    strong, full = _strong_frames(prep, chain, noise, along)
    link_gap = _gap_links(link_ok, strong, full)
    times_ch = np.concatenate([[0.0], np.cumsum(dt_frames)])[chain]
    link_gap, limit_runs = _overlap_limit(link_gap, link_ok, along, times_ch, r_n)
    chain_steps = np.where(link_ok[:, None], est_c.shift, np.nan)
    # Coarse chain positions (failed links bridged by the neighbours' median step).
    fill = np.nanmedian(chain_steps, axis=0) if np.isfinite(chain_steps).any() else np.zeros(2)
    chain_steps = np.where(np.isfinite(chain_steps), chain_steps, fill)
    chain_pos = np.vstack([[0.0, 0.0], np.cumsum(chain_steps, axis=0)])

    # ---- longer baselines, at nearly whole-pixel displacements ----
    # Longest target: at least two rows of overlap. Pass 1 uses short targets only (the
    # chain it predicts them from drifts where half-pixel steps are aliased); pass 2 picks
    # the long baselines from pass 1's solved trajectory.
    reach = max(1, min(r_n - 2, int(np.floor(0.75 * (r_n - 1)))))
    short_targets = sorted({1, min(2, reach)})
    long_targets = sorted({0, 1, max(1, reach // 2), reach})
    iters = 3

    def build_pairs(cpos, targets):
        """Successive links that held, plus partners picked from chain positions ``cpos``;
        every partner's start comes from a coarse search around the predicted shift."""
        lp, _ = _pick_partners(cpos, ~link_ok, targets)
        pairs = cpairs[link_ok]
        init = est_c.shift[link_ok]
        if len(lp):
            lpairs = chain[lp]
            pred = cpos[lp[:, 1]] - cpos[lp[:, 0]]
            linit, _, _ = _reg.coarse_shifts(zn, lpairs, max_along=max_along,
                                             max_across=max_across_px + 4, prior=pred,
                                             prior_window_px=1.5)
            # A partner whose coarse peak lies away from the prediction (coarse_shifts takes
            # a clearly stronger peak anywhere) is dropped: on a narrow strip the long
            # baselines' strongest peak is often a ridge period off, and many of them off
            # alike outvote the robust weights. 20x16 strips (bench_geometry.py, seeds
            # 300-303, five swipes): span -7.8 / -17.0 / -10.6 / -11.5 / -32.1 % -> +0.2 /
            # -8.2 / -0.3 / +0.1 / -2.9 %, false backtracks 9 -> 1 (two then ran off across,
            # 10 px RMS); bench_rows.py's 2-row 12 dB swipe -0.78 -> -0.16 %; random 2-5 row
            # swipes (see register._DELAY_ACROSS_PENALTY) worst 10.2 / 5.8 / 10.8 / 22.8 ->
            # 6.1 / 5.8 / 9.8 / 22.4 %, 8 better and 3 worse by more than 0.05 % of 120.
            near = np.abs(linit - pred).max(axis=1) <= _PARTNER_REACH_PX
            lpairs, linit = lpairs[near], linit[near]
            pairs = np.concatenate([pairs, lpairs])
            init = np.concatenate([init, linit])
        return pairs, init

    def solve(pairs, init):
        est = _reg.refine_shifts(prep, pairs, init, estimate_rotation=False, iterations=iters,
                                 atlas=atlas, grads=grads)
        good = est.ok & (est.ncc > 0.5) & (np.abs(est.shift - init).max(axis=1) < 1.5)
        info = _with_model_error(est.info, est.shift)
        info = np.where(good[:, None, None], info, 0.0)
        tr = _traj.solve_positions(t_n, pairs, est.shift, info, np.zeros(t_n), dt_frames,
                                   sigma_acc_px=motion_prior_px)
        return est, good, tr

    pairs, init = build_pairs(chain_pos, short_targets)
    est, good, tr = solve(pairs, init)
    prep_used = prep
    # Second pass: the fixed pattern re-estimated against the fused image, partners
    # re-picked from the solved trajectory (the successive chain drifts where aliasing
    # biases half-pixel steps), and everything refined again.
    prep2 = _refit_fixed_pattern(x, prep, tr.positions, np.degrees(tr.angles_rad))
    if prep2 is not None:
        prep = prep2
        atlas = grads = zn = None            # let the old ones go before the new exist
        zn = _reg._row_normalise(prep.z, prep.plate_ok)
        atlas = _reg._Atlas(prep.z)
        grads = _reg._template_gradients(prep.z)
    # Partners re-picked from the solved trajectory (frame 0's axes -> chain positions).
    # Translation only: on a narrow strip a free rotation per pair makes every shift
    # noisier (the two are nearly confounded over a few rows), and the few tenths of a
    # degree aliasing puts into each pair's angle turned straight swipes. The finger's
    # turn is read later, against the model of the whole finger (refine: twist).
    # One pass: the model refinement below takes the placement the rest of the way (a
    # second pairwise pass changed the suite's medians by nothing and cost 15 %).
    pairs, init = build_pairs(tr.positions[chain], long_targets)
    est, good, tr = solve(pairs, init)
    prep_used = prep
    # The pairwise stage is done: its upsampled frames, gradients and normalised copies (about
    # 50 KB a frame of 8 x 192) need not outlive it.
    atlas = grads = zn = None

    positions = tr.positions.copy()
    angles_deg = np.degrees(tr.angles_rad)
    _push_gaps(positions, chain, cpairs, link_gap, dt_frames, r_n)
    _push_limit(positions, chain, cpairs, limit_runs, dt_frames, r_n)
    # Pairs kept per frame, for confidence.
    kept = np.zeros(t_n)
    total = np.zeros(t_n)
    np.add.at(kept, pairs.ravel(), np.repeat(tr.pair_weight * good, 2))
    np.add.at(total, pairs.ravel(), 1.0)
    ok_frac = np.where(total > 0, kept / np.maximum(total, 1), 0.0)
    link_failed = _failed_links(t_n, cpairs, link_gap)
    frame_info = tr.frame_info
    delay_steps = None
    if r_n <= _DELAY_MAX_ROWS:
        positions, delay_steps = _delay_along(prep_used, positions, link_failed, dt_frames,
                                              **_delay_settings(r_n))
        if r_n == 3:
            # From a pixel per frame the neighbouring rows' delay is under a frame, read
            # between lags with a bias of about 1.4 % of the speed (exact rows at 1.5 px per
            # frame); the first and last rows, two apart, see it over a frame there. Taken
            # where those read at least 1 px per frame: exact-shift 3-row swipes peaking at
            # 1.5 / 2.06 px per frame +1.17 / +0.77 % -> -0.20 / -0.29 %. (Everywhere, the
            # single pair of rows read the slower random 3-row swipes worse: worst 0.13 ->
            # 0.19 %, a stalled one 0.5 -> 1.6 %.)
            positions, far = _delay_along(prep_used, positions, link_failed, dt_frames,
                                          row_step=2, min_speed=1.0)
            if far is not None:
                delay_steps = far if delay_steps is None else \
                    np.where(np.isfinite(far), far, delay_steps)
    if delay_steps is not None:
        # Frames on a link the delay read get its along information, so the least determined
        # direction is the one the pairs still place (across). Its error: the speed averages
        # over at least 4 px of travel; measured along RMS 0.01-0.10 px on eight simulated
        # 2-row swipes (bench_rows), taken as 0.05 px. And the pairs a frame kept no longer
        # measure how well it is placed, only its successive links do (the longer baselines
        # that fail on one row of overlap were the pairs' way to place it along): on the
        # suite's 2-row strip half the pairs failed, the mean confidence was 0.49 and a swipe
        # placed within 0.11 % of its span was called unusable.
        on = np.zeros(t_n, dtype=bool)
        read = np.isfinite(delay_steps)
        on[:-1] |= read
        on[1:] |= read
        frame_info = frame_info.copy()
        frame_info[on, 0, 0] += 1.0 / _DELAY_SIGMA_PX ** 2
        held = np.zeros(t_n)
        links = np.zeros(t_n)
        np.add.at(held, cpairs.ravel(), np.repeat(link_ok.astype(np.float64), 2))
        np.add.at(links, cpairs.ravel(), 1.0)
        ok_frac = np.where(on & (links > 0), held / np.maximum(links, 1.0), ok_frac)
    confidence = _confidence(frame_info, prep.contact, np.clip(ok_frac, 0, 1))
    limit_runs = _limit_frames(limit_runs, chain, confidence)
    return (positions, angles_deg, confidence, link_failed, prep_used, len(pairs), int(good.sum()),
            delay_steps, limit_runs)


def _finish(prep, prep_used, positions, angles_deg, confidence, link_failed, *, dt_frames, times,
            frame_rate_hz, pitch_um, out_pitch_um, options, blank_runs=(), limit_runs=(),
            end_blank=None, unit_exp=0):
    """Fusion, events and report (``end_blank``: frames the report does not count as
    contact, see _bridge_blank_runs; ``unit_exp``: the frames were scaled by 2**unit_exp,
    see _unit_exponent, and the image is scaled back)."""
    r_n = prep.z.shape[1]
    # ---- fusion ----
    scale = float(np.median(prep_used.gain))
    level = float(np.mean(prep_used.offset))
    fw = (prep.contact & (confidence > 0.05)).astype(np.float32)
    if not (fw > 0).any() or not prep.plate_ok.any():
        fw = prep.contact.astype(np.float32)
    pitch_px = out_pitch_um / pitch_um
    # The fusion is a weighted mean, so the prepared values are fused and the image mapped
    # back to input units afterwards (no frame-sized copy); weight = frame weight x plate
    # usable, without a frame-sized weight array.
    mos = _mosaic._fuse(prep_used.z, np.asarray(positions, dtype=np.float64),
                        np.asarray(angles_deg, dtype=np.float64),
                        np.broadcast_to(fw[:, None, None], prep_used.z.shape),
                        prep.plate_ok.astype(np.float64), np.asarray(pitch_px, dtype=np.float64),
                        0.05)
    mos = _mosaic.Mosaic(image=np.ldexp(mos.image * scale + level, -unit_exp), weight=mos.weight,
                         origin_px=mos.origin_px, pitch_px=mos.pitch_px)

    # ---- events and report ----
    contact = prep.contact if end_blank is None else prep.contact & ~end_blank
    events = _report.find_events(positions=positions, angles_deg=angles_deg,
                                 confidence=confidence, contact=contact,
                                 link_failed=link_failed, link_dt_frames=dt_frames,
                                 times_s=times, frame_rate_hz=frame_rate_hz, n_rows=r_n,
                                 pitch_um=pitch_um, blank_runs=blank_runs,
                                 limit_runs=limit_runs)
    rep = _report.make_report(events=events, positions=positions, angles_deg=angles_deg,
                              confidence=confidence, contact=contact, times_s=times,
                              frame_rate_hz=frame_rate_hz, n_rows=r_n, pitch_um=pitch_um,
                              image=mos.image, n_plates=int(prep.plate_ok.sum()),
                              n_cols=int(prep.plate_ok.any(axis=0).sum()))
    return Reconstruction(image=mos.image, positions=positions, angles=angles_deg,
                          confidence=confidence, events=events, report=rep, weight=mos.weight,
                          origin_px=mos.origin_px, pitch_um=out_pitch_um,
                          sensor_pitch_um=pitch_um,
                          frame_rate_hz=frame_rate_hz if frame_rate_hz else float("nan"),
                          options=options)


def _travel_weights(positions, contact):
    """Per-frame weights for the per-plate statistics (register.prepare's ``frame_weights``):
    each frame's travel since the previous one, weighed as prepare weighs the frames' change
    (register._novelty_weights)."""
    step = np.hypot(*np.diff(positions, axis=0).T)
    return _reg._novelty_weights(np.concatenate([step[:1], step]), contact)


def _refit_fixed_pattern(x, prep, positions, angles_deg, *, row_gains=True):
    """Per-plate offset and gain re-estimated against the fused image.

    The first estimate (per-plate mean over contact frames) also holds the mean of the finger
    texture each plate saw, a static pattern that pulls shifts towards zero. With positions
    known, each plate's offset and gain follow from a line fit of its readings against the
    fused image sampled where the plate was.

    ``row_gains`` False: the fitted gains keep their pattern within each row, but every
    row's mean gain is the first estimate's. Every row sees the same finger, so what the fit
    reads from row to row is mostly its own error, and a static gain pattern along the swipe
    (it multiplies the texture by the same profile in every frame) pulls the along shifts
    towards zero like an offset pattern does (see the caller).
    """
    scale = float(np.median(prep.gain))
    level = float(np.mean(prep.offset))
    values = prep.z * np.float32(scale) + np.float32(level)
    w = prep.contact.astype(np.float32)[:, None, None] * prep.plate_ok[None].astype(np.float32)
    if not (w > 0).any():
        return None
    mos = _mosaic.fuse(values, positions, angles_deg, weights=w)
    del values, w
    img = np.nan_to_num(mos.image, nan=level)
    seen = np.isfinite(mos.image).astype(np.float64)
    t_n, r_n, c_n = x.shape
    # Per-plate sums for the line fit reading = g * ref + o over the contact frames, the fused
    # image sampled bilinearly where each plate looked (one compiled pass, nothing per frame
    # kept).
    n, sr, sx, srr, srx = (np.zeros((r_n, c_n)) for _ in range(5))
    th = np.deg2rad(np.asarray(angles_deg, dtype=np.float64))
    _plate_line_sums(x, prep.contact, np.asarray(positions, dtype=np.float64), np.cos(th),
                     np.sin(th), np.array([(r_n - 1) / 2.0, (c_n - 1) / 2.0]),
                     np.asarray(mos.origin_px, dtype=np.float64), img, seen, n, sr, sx, srr, srx)
    if (n[prep.plate_ok] < 8).any():
        return None
    nn = np.maximum(n, 1.0)
    rx = sr / nn
    xx = sx / nn
    var_r = srr / nn - rx ** 2
    cov_rx = srx / nn - rx * xx
    gain = cov_rx / np.maximum(var_r, 1e-12)                   # reading = g * ref + o
    gain = np.where(prep.plate_ok, np.clip(gain, 0.5, 2.0), 1.0)
    offset = xx - gain * rx
    if not row_gains:
        # row means over the usable plates of the fitted gains (in input units: gain *
        # scale) set to the first estimate's, each plate's line turned about its reading at
        # the reference level (that reading kept: measured slightly better on
        # bench_independent.py's swipes than the line refitted through the means)
        ok = prep.plate_ok
        cnt = np.maximum(ok.sum(axis=1, keepdims=True), 1)
        row_mean = lambda a: np.where(ok, a, 0.0).sum(axis=1, keepdims=True) / cnt
        first = np.broadcast_to(np.asarray(prep.gain, dtype=np.float64), gain.shape)
        at_level = offset + gain * level
        gain = np.where(ok, gain * row_mean(first) / np.maximum(row_mean(gain * scale), 1e-12), 1.0)
        offset = np.where(ok, at_level - gain * level, offset)
    z = np.empty(x.shape, dtype=np.float32)
    step = max(1, 200_000 // (r_n * c_n))
    for s0 in range(0, t_n, step):                       # chunks: no frame-sized doubles
        sl = slice(s0, min(t_n, s0 + step))
        z[sl] = ((x[sl] - offset) / gain - level) / scale
    z[:, ~prep.plate_ok] = 0.0
    return _reg.Prepared(z=z, plate_ok=prep.plate_ok, offset=offset, gain=gain * scale,
                         contact=prep.contact, texture=prep.texture, noise_sigma=prep.noise_sigma)


@numba.njit(**JIT)
def _plate_line_sums(x, contact, pos, cos_t, sin_t, cf, origin, img, seen, n, sr, sx, srr, srx):
    """For every plate, sums over the contact frames of 1, ref, reading, ref^2, ref * reading,
    with ref the image sampled bilinearly where the plate looked (indices clamped at the
    border, as scipy.ndimage.map_coordinates order 1 mode "nearest"), wherever the bilinear
    sample of ``seen`` (zero outside, mode "constant") exceeds 0.99 (in place)."""
    t_n, r_n, c_n = x.shape
    hh, ww = img.shape
    for t in range(t_n):
        if not contact[t]:
            continue
        ct = cos_t[t]
        st = sin_t[t]
        for r in range(r_n):
            u0 = r - cf[0]
            for c in range(c_n):
                q0, q1 = _mosaic.plate_point(pos[t, 0], pos[t, 1], ct, st, cf[0], cf[1], u0,
                                             c - cf[1])
                q0 += origin[0]
                q1 += origin[1]
                i0 = int(np.floor(q0))
                i1 = int(np.floor(q1))
                a0 = q0 - i0
                a1 = q1 - i1
                cov = 0.0
                for di in range(2):
                    k0 = i0 + di
                    if k0 < 0 or k0 >= hh:
                        continue
                    wa = a0 if di == 1 else 1.0 - a0
                    for dj in range(2):
                        k1 = i1 + dj
                        if k1 < 0 or k1 >= ww:
                            continue
                        cov += wa * (a1 if dj == 1 else 1.0 - a1) * seen[k0, k1]
                if cov <= 0.99:
                    continue
                c0 = min(max(q0, 0.0), hh - 1.0)
                c1 = min(max(q1, 0.0), ww - 1.0)
                j0 = int(np.floor(c0))
                j1 = int(np.floor(c1))
                b0 = c0 - j0
                b1 = c1 - j1
                jp0 = min(j0 + 1, hh - 1)
                jp1 = min(j1 + 1, ww - 1)
                ref = ((1.0 - b0) * ((1.0 - b1) * img[j0, j1] + b1 * img[j0, jp1])
                       + b0 * ((1.0 - b1) * img[jp0, j1] + b1 * img[jp0, jp1]))
                v = float(x[t, r, c])
                n[r, c] += 1.0
                sr[r, c] += ref
                sx[r, c] += v
                srr[r, c] += ref * ref
                srx[r, c] += ref * v
