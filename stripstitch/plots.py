"""Plots of evaluation results: speed profile, position error, CRB, envelope, distortion, report.

Needs matplotlib (optional extra ``plot``); it is imported inside the functions and figures are
made with :class:`matplotlib.figure.Figure` (no pyplot state). Each function draws on a given
``ax`` or makes its own figure, and returns the figure.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "plot_speed_profile",
    "plot_position_error",
    "plot_pair_crb",
    "plot_envelope",
    "plot_distortion",
    "report_page",
]


def _figure(ax, figsize=(6.0, 3.5)):
    if ax is not None:
        return ax.figure, ax
    try:
        from matplotlib.figure import Figure
    except ImportError as exc:                   # optional extra "plot"
        raise ImportError("plots need matplotlib: pip install 'stripstitch[plot]'") from exc
    fig = Figure(figsize=figsize, layout="constrained")
    return fig, fig.add_subplot()


def _speed_mm_s(positions, times_s, pitch_um):
    pos = np.asarray(positions, float)
    t = np.asarray(times_s, float)
    dt = np.diff(t)
    v = np.diff(pos[:, 0]) * pitch_um / 1000.0 / np.where(dt > 0, dt, np.nan)
    return 0.5 * (t[1:] + t[:-1]), v


def plot_speed_profile(result, capture, *, ax=None):
    """Estimated and true along-swipe speed (mm/s) against time.

    Parameters
    ----------
    result : Reconstruction or similar (``positions``)
    capture : stripstitch.simulate.Capture (``positions``, ``times_s``, ``pitch_um``)
    ax : matplotlib Axes, optional
        Default is None (new figure).

    Returns
    -------
    matplotlib.figure.Figure
    """
    fig, ax = _figure(ax)
    pitch = float(capture.pitch_um)
    t, v_true = _speed_mm_s(capture.positions, capture.times_s, pitch)
    _, v_est = _speed_mm_s(result.positions, capture.times_s, pitch)
    ax.plot(1e3 * t, v_true, color="k", lw=1.5, label="true")
    ax.plot(1e3 * t, v_est, color="C1", lw=0.8, label="estimated")
    ax.set_xlabel("time (ms)")
    ax.set_ylabel("along-swipe speed (mm/s)")
    ax.legend(loc="best", fontsize="small")
    ax.set_title("speed profile")
    return fig


def plot_position_error(evaluation, capture, *, ax=None):
    """Along and across position error (px) against time."""
    fig, ax = _figure(ax)
    err = evaluation.trajectory.position_error_px
    t = 1e3 * np.asarray(capture.times_s, float)
    ax.plot(t, err[:, 0], label="along", color="C0")
    ax.plot(t, err[:, 1], label="across", color="C2")
    ax.axhline(0.0, color="0.6", lw=0.5)
    ax.set_xlabel("time (ms)")
    ax.set_ylabel("position error (px)")
    ax.legend(loc="best", fontsize="small")
    ax.set_title("position error")
    return fig


def plot_pair_crb(evaluation, *, ax=None):
    """Per-pair increment error beside the Cramer-Rao bound (Robinson & Milanfar 2004)."""
    fig, ax = _figure(ax)
    inc = np.abs(evaluation.trajectory.increment_error_px)
    k = np.arange(inc.shape[0])
    ax.semilogy(k, inc[:, 0], ".", ms=2, color="C0", label="|increment error| along")
    ax.semilogy(k, inc[:, 1], ".", ms=2, color="C2", label="|increment error| across")
    if evaluation.bounds is not None:
        std = evaluation.bounds.std_px
        ax.semilogy(k, std[:, 0], "-", lw=1, color="C0", label="CRB std along")
        ax.semilogy(k, std[:, 1], "--", lw=1, color="C2", label="CRB std across")
    ax.set_xlabel("frame pair")
    ax.set_ylabel("px")
    ax.legend(loc="best", fontsize="x-small")
    ax.set_title("increment error vs Cramer-Rao bound")
    return fig


def plot_envelope(env, *, pitch_um=50.8, overlap_rows=0.0, fig=None):
    """Envelope heat map (rows x frame rate -> highest true speed) beside the no-gap bound.

    Parameters
    ----------
    env : stripstitch.sweep.Envelope
        From ``envelope(table, x="speed_mm_s", by=("n_rows", "frame_rate_hz"))``.
    pitch_um : float, optional
        Plate pitch for the analytic bound v = f (R - overlap) p. Default is 50.8.
    overlap_rows : float, optional
        Overlap in the analytic bound. Default is 0.
    fig : matplotlib Figure, optional
        Default is None (new figure).

    Returns
    -------
    matplotlib.figure.Figure
    """
    if fig is None:
        fig, _ = _figure(None, figsize=(10.0, 4.0))
        fig.clear()
    if tuple(env.by) != ("n_rows", "frame_rate_hz"):
        raise ValueError(f"env must be grouped by ('n_rows', 'frame_rate_hz'); got {tuple(env.by)}")
    rows = sorted({g[0] for g in env.groups})
    rates = sorted({g[1] for g in env.groups})
    grid = np.full((len(rows), len(rates)), np.nan)
    for (r, f), lim in zip(env.groups, env.limit):
        grid[rows.index(r), rates.index(f)] = lim
    ax1, ax2 = fig.subplots(1, 2)
    im = ax1.imshow(grid, origin="lower", aspect="auto", cmap="viridis")
    ax1.set_xticks(range(len(rates)), [f"{f:g}" for f in rates], rotation=45)
    ax1.set_yticks(range(len(rows)), [str(r) for r in rows])
    ax1.set_xlabel("frame rate (Hz)")
    ax1.set_ylabel("rows")
    for i in range(len(rows)):
        for j in range(len(rates)):
            if np.isfinite(grid[i, j]):
                ax1.text(j, i, f"{grid[i, j]:g}", ha="center", va="center", color="w", fontsize=7)
    fig.colorbar(im, ax=ax1, label="highest true speed (mm/s)")
    ax1.set_title("measured envelope")
    fr = np.geomspace(min(rates), max(rates), 50)
    for k, r in enumerate(rows):
        ax2.plot(rates, grid[k], "o-", color=f"C{k % 10}", label=f"{r} rows measured")
        bound = fr * (r - overlap_rows) * pitch_um / 1000.0
        ax2.plot(fr, bound, ":", color=f"C{k % 10}", label=f"{r} rows no-gap bound")
    ax2.set_xscale("log")
    ax2.set_yscale("log")
    ax2.set_xlabel("frame rate (Hz)")
    ax2.set_ylabel("speed (mm/s)")
    ax2.legend(fontsize="x-small", ncol=2)
    ax2.set_title("measured vs analytic bound f (R - overlap) p")
    return fig


def plot_distortion(dmap, *, ax=None):
    """Distortion map: displacement length (colour) with arrows (exaggerated x10)."""
    fig, ax = _figure(ax, figsize=(4.0, 6.0))
    d = dmap.displacement_px
    mag = np.hypot(d[..., 0], d[..., 1])
    c = dmap.centres_px
    extent = None
    if c.shape[0] > 1 and c.shape[1] > 1:
        step = (c[1, 0, 0] - c[0, 0, 0], c[0, 1, 1] - c[0, 0, 1])
        extent = (c[0, 0, 1] - step[1] / 2, c[0, -1, 1] + step[1] / 2,
                  c[-1, 0, 0] + step[0] / 2, c[0, 0, 0] - step[0] / 2)
    im = ax.imshow(mag, extent=extent, cmap="magma", aspect="equal")
    ok = np.isfinite(d).all(axis=-1)
    ax.quiver(c[..., 1][ok], c[..., 0][ok], 10 * d[..., 1][ok], 10 * d[..., 0][ok], angles="xy",
              scale_units="xy", scale=1.0, color="c", width=0.004)
    fig.colorbar(im, ax=ax, label="displacement (px)")
    ax.set_xlabel("across (px)")
    ax.set_ylabel("along (px)")
    ax.set_title(f"distortion (rms {dmap.rms_px:.2f} px)")
    return fig


def report_page(result, capture, evaluation=None, path=None, *, title="swipe report"):
    """One-page PNG report of one swipe: images, speed, errors, CRB, distortion and numbers.

    Parameters
    ----------
    result : Reconstruction or similar
    capture : stripstitch.simulate.Capture
    evaluation : stripstitch.evaluate.Evaluation, optional
        Default is None (computed with :func:`stripstitch.evaluate.evaluate`).
    path : path-like, optional
        Where to write the PNG. Default is None (not written).
    title : str, optional
        Page title. Default is "swipe report".

    Returns
    -------
    matplotlib.figure.Figure
    """
    from .evaluate import evaluate

    ev = evaluate(result, capture) if evaluation is None else evaluation
    fig, _ = _figure(None, figsize=(11.7, 8.3))
    fig.clear()
    gs = fig.add_gridspec(3, 4)
    truth = np.asarray(capture.true_image, float)
    a = fig.add_subplot(gs[:, 0])
    a.imshow(truth, cmap="gray", aspect="equal")
    a.set_title("truth")
    a = fig.add_subplot(gs[:, 1])
    shown = ev.similarity.aligned if ev.similarity is not None else np.asarray(result.image, float)
    a.imshow(shown, cmap="gray", aspect="equal")
    a.set_title("reconstruction (aligned)")
    plot_speed_profile(result, capture, ax=fig.add_subplot(gs[0, 2]))
    plot_position_error(ev, capture, ax=fig.add_subplot(gs[1, 2]))
    plot_pair_crb(ev, ax=fig.add_subplot(gs[2, 2]))
    if ev.distortion is not None:
        plot_distortion(ev.distortion, ax=fig.add_subplot(gs[:2, 3]))
    a = fig.add_subplot(gs[2, 3])
    a.axis("off")
    d = ev.to_dict()
    keys = ["n_frames", "span_error_pct", "along_rms_px", "across_rms_px", "rotation_rms_deg",
            "ncc", "ssim", "distortion_rms_px", "period_ratio_along", "period_ratio_across",
            "gap_true", "gap_reported", "gap_false"]
    lines = [f"{k}: {d[k]:.4g}" if isinstance(d.get(k), float) else f"{k}: {d.get(k)}"
             for k in keys if k in d]
    verdict = getattr(getattr(result, "report", None), "verdict", None)
    if verdict:
        lines.append(f"verdict: {verdict}")
    a.text(0.0, 1.0, "\n".join(lines), va="top", family="monospace", fontsize=8)
    fig.suptitle(title)
    if path is not None:
        fig.savefig(path, dpi=100)
    return fig
