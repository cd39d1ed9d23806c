"""Render docs/gallery/frames.png: what the simulated strip sensor delivers, beside the truth.

    python docs/gallery/make_frames_gallery.py [--out docs/gallery/frames.png]

For three demo swipes (demo_data/*.npz; regenerated with demo_data/make_demo.py if missing) the
figure shows, per row: a few consecutive raw frames, the "line-scan" view (the first plate row of
every frame stacked in time, i.e. the frames as they arrive, without motion correction), the true
image of the swept region with the footprints of some frames, and the truth trajectory (along
and across position, contact fraction) with the events shaded. Synthetic prints, test data only.
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from stripstitch.simulate import Capture  # noqa: E402

CASES = [
    ("steady_8x192_4khz", "steady swipe, 8 x 192 @ 4 kHz"),
    ("human_slanted_stall_backtrack_8x192_4khz", "human swipe: skew, rotation, stall, backtrack"),
    ("fast_gap_16x128_2khz", "fast swipe, 16 x 128 @ 2 kHz: dropped frames, too-fast gap"),
]
EVENT_COLOURS = {"stall": "tab:orange", "backtrack": "tab:red", "gap": "tab:purple", "no_contact": "0.85"}


def load(name):
    path = ROOT / "demo_data" / f"{name}.npz"
    if not path.exists():
        import subprocess
        subprocess.run([sys.executable, str(ROOT / "demo_data" / "make_demo.py")], check=True)
    return Capture.from_npz(path)


def footprint(cap, t):
    """Corners (5, 2) of frame t's footprint in true-image index coordinates (closed polygon)."""
    r, c = cap.frames.shape[1:]
    cf = np.array([(r - 1) / 2, (c - 1) / 2])
    corners = np.array([[-0.5, -0.5], [-0.5, c - 0.5], [r - 0.5, c - 0.5], [r - 0.5, -0.5], [-0.5, -0.5]]) - cf
    th = math.radians(cap.angles[t])
    rot = np.array([[math.cos(th), -math.sin(th)], [math.sin(th), math.cos(th)]])
    return cap.true_origin_px + cf + cap.positions[t] + corners @ rot.T


def main(argv=None):
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=str(Path(__file__).resolve().parent / "frames.png"))
    args = ap.parse_args(argv)

    fig = plt.figure(figsize=(15, 4.6 * len(CASES)))
    grid = fig.add_gridspec(len(CASES), 4, width_ratios=[1.25, 0.9, 0.9, 1.5], wspace=0.28, hspace=0.32)
    for row, (name, title) in enumerate(CASES):
        cap = load(name)
        t_count, n_r, n_c = cap.frames.shape
        lo, hi = np.percentile(cap.frames[cap.contact > 0.5], [1, 99])

        # 1. A few consecutive raw frames, in the middle of the swipe.
        sub = grid[row, 0].subgridspec(6, 1, hspace=0.15)
        t0 = int(np.argmax(cap.contact >= 0.99)) + t_count // 4
        for k in range(6):
            ax = fig.add_subplot(sub[k])
            ax.imshow(cap.frames[t0 + k], cmap="gray", vmin=lo, vmax=hi, aspect="equal", interpolation="nearest")
            ax.set_xticks([])
            ax.set_yticks([])
            ax.set_ylabel(f"{t0 + k}", rotation=0, labelpad=14, fontsize=8, va="center")
            if k == 0:
                ax.set_title(f"{title}\nraw frames {t0}..{t0 + 5} ({n_r} x {n_c} codes)", fontsize=9)

        # 2. Line-scan view: plate row 0 of every frame, in arrival order (no motion correction).
        ax = fig.add_subplot(grid[row, 1])
        ax.imshow(cap.frames[:, 0, :], cmap="gray", vmin=lo, vmax=hi, aspect="auto", interpolation="nearest")
        ax.set_title("as delivered: row 0 of each frame\n(no motion correction)", fontsize=9)
        ax.set_xlabel("column")
        ax.set_ylabel("frame")

        # 3. True image with a few frame footprints.
        ax = fig.add_subplot(grid[row, 2])
        ax.imshow(cap.true_image, cmap="gray", vmin=lo, vmax=hi, interpolation="nearest")
        for t in np.linspace(0, t_count - 1, 7).astype(int):
            poly = footprint(cap, t)
            ax.plot(poly[:, 1], poly[:, 0], lw=0.9, color="tab:cyan")
        ax.set_title(f"truth: true image {cap.true_image.shape[0]} x {cap.true_image.shape[1]} px\n"
                     "with 7 frame footprints", fontsize=9)
        ax.set_xlabel("across (px)")
        ax.set_ylabel("along (px)")

        # 4. Truth trajectory and events.
        ax = fig.add_subplot(grid[row, 3])
        t_ms = cap.times_s * 1e3
        for e in cap.events:
            if e.kind in EVENT_COLOURS:
                ax.axvspan(t_ms[e.first_frame], t_ms[e.last_frame] + 0.5e3 / cap.frame_rate_hz,
                           color=EVENT_COLOURS[e.kind], alpha=0.45 if e.kind != "no_contact" else 0.6, lw=0,
                           label=e.kind)
        ax.plot(t_ms, cap.positions[:, 0], color="k", lw=1.2, label="along (px)")
        ax.plot(t_ms, cap.positions[:, 1], color="tab:blue", lw=1.2, label="across (px)")
        ax.set_xlabel("time (ms)")
        ax.set_ylabel("position (px, frame-0 axes)")
        ax2 = ax.twinx()
        ax2.plot(t_ms, cap.contact, color="tab:green", lw=1.0, ls="--", label="contact")
        ax2.set_ylim(-0.05, 1.05)
        ax2.set_ylabel("contact fraction", color="tab:green")
        handles, labels = ax.get_legend_handles_labels()
        seen = {}
        for h, lab in zip(handles, labels):
            seen.setdefault(lab, h)
        h2, l2 = ax2.get_legend_handles_labels()
        ax.legend(list(seen.values()) + h2, list(seen.keys()) + l2, fontsize=7, loc="upper left")
        ax.set_title(f"truth: {t_count} frames, SNR {cap.snr_db:.0f} dB", fontsize=9)
    fig.suptitle("stripstitch simulator: strip frames and their ground truth (synthetic prints, test data only)",
                 fontsize=12)
    fig.savefig(args.out, dpi=90, bbox_inches="tight")
    print(f"wrote {args.out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
