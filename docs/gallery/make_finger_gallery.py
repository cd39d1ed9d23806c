"""Render one synthetic finger per pattern class into docs/gallery/fingers.png.

Run from a clean checkout:  python docs/gallery/make_finger_gallery.py [--seed N] [--out PATH]
Each panel shows the ridge map (dark = ridge) shaded by the contact footprint, with the
cores (red circles) and deltas (blue triangles) the finger was built from. Synthetic prints,
for testing only.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))
from stripstitch.simulate.finger import PATTERNS, make_finger  # noqa: E402


def render(seed=2026, out=Path(__file__).resolve().parent / "fingers.png"):
    fig, axes = plt.subplots(2, 3, figsize=(12, 11.5))
    for ax, pattern in zip(axes.ravel(), PATTERNS):
        f = make_finger(pattern, rng=seed)
        step = 2                                      # 25.4 um per displayed pixel
        # ink-like rendering: ridges dark on the pad, fading out where the skin lifts off
        ink = 0.5 * (1.0 + f.ridge[::step, ::step]) * f.contact[::step, ::step]
        ax.imshow(1.0 - ink, cmap="gray", vmin=0.0, vmax=1.0, interpolation="antialiased",
                  extent=(-0.5 * f.spacing_um / 1000, f.size_mm[1] - 0.5 * f.spacing_um / 1000,
                          f.size_mm[0] - 0.5 * f.spacing_um / 1000, -0.5 * f.spacing_um / 1000))
        for c in f.cores_um / 1000.0:
            ax.plot(c[1], c[0], "o", ms=13, mfc="none", mec="red", mew=2)
        for d in f.deltas_um / 1000.0:
            ax.plot(d[1], d[0], "^", ms=13, mfc="none", mec="tab:blue", mew=2)
        period = np.median(f.period_um[f.contact > 0.99])
        ax.set_title(f"{pattern}  (median period {period:.0f} um)", fontsize=11)
        ax.set_xlabel("across (mm)")
        ax.set_ylabel("along (mm), fingertip at 0")
    fig.suptitle(f"stripstitch synthetic fingers, 20 x 14 mm at 12.7 um, seed {seed} "
                 "(o core, ^ delta)", fontsize=12)
    fig.tight_layout()
    fig.savefig(out, dpi=90)
    plt.close(fig)
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seed", type=int, default=2026)
    ap.add_argument("--out", type=Path, default=Path(__file__).resolve().parent / "fingers.png")
    args = ap.parse_args(argv)
    print(render(args.seed, args.out))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
