"""Frames from an independent generator: swipes drawn without stripstitch.simulate.

Run from a clean checkout:  python benchmarks/bench_independent.py  [--quick] [--seed N]

Every other benchmark draws its frames with the library's own simulator, so a habit the
simulator and the reconstruction share would go unseen. Here the frames come from code that
shares nothing with the library: a texture (a ridge pattern from an analytic phase field -- a
spiral, a loop bent around a core, or a waved arch, 7.5-11 px period, with slowly varying phase
noise and pores -- or a photograph bundled with scikit-image: brick, grass, gravel) held at a
quarter pixel; each plate the mean of 4 x 4 bilinear samples (scipy.ndimage.map_coordinates)
over its square, averaged over six poses across half a frame period (motion blur); per-column
gain (5 %) and offset (6 codes), Gaussian noise for 14-38 dB, rounded to 8-bit codes. Motion:
a smooth random speed around 0.2 to min(0.6 R, 2.5) px per frame (0.3 to 2 times it), over at
most about 25 mm of finger, with a stall in about a third of the swipes and a backtrack in
about a third, a skew within 8 degrees with a slow random lateral drift, and a turn of up to
4 degrees in one swipe of three. Six strips (8x192, 16x128, 12x160, 10x256, 24x96, 6x144) at
2-6 kHz. The texture covers every frame, so all frames count. Default, fast and streaming
modes. Errors against the generator's poses: span (first to last frame), along / across RMS
(px), rotation RMS (deg). Writes benchmarks/results/independent[_quick].json/.md. Synthetic
textures; speeds are an unsourced modelling assumption (REFERENCE-VALUES.md section 7).
"""

from __future__ import annotations

import argparse
from concurrent.futures import ProcessPoolExecutor

import numpy as np
from scipy import ndimage

from _common import environment, fmt, span_summary, stitch_mode, table, write


GEOMETRIES = ((8, 192), (16, 128), (12, 160), (10, 256), (24, 96), (6, 144))
MODES = ("default", "fast", "stream")
UP = 4                  # texture samples per pixel


def texture(rng, h_px, w_px):
    """(h_px * UP, w_px * UP) texture in [0, 1] and its name."""
    h, w = h_px * UP, w_px * UP
    kind = int(rng.integers(0, 4))
    if kind == 3:
        import skimage.data

        name = ("brick", "grass", "gravel")[int(rng.integers(0, 3))]
        img = getattr(skimage.data, name)().astype(np.float64)
        img = (img - img.min()) / np.ptp(img)
        z = ndimage.zoom(img, UP / 2.0, order=1)          # half a pixel per photo pixel
        reps = (int(np.ceil(h / z.shape[0])), int(np.ceil(w / z.shape[1])))
        return np.tile(z, reps)[:h, :w], name
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float64) / UP
    period = rng.uniform(7.5, 11.0)
    cy, cx = rng.uniform(0.35, 0.65) * h_px, rng.uniform(0.3, 0.7) * w_px
    if kind == 0:
        r = np.hypot(yy - cy, xx - cx)
        phase = r / period + rng.choice([-1, 1]) * np.arctan2(yy - cy, xx - cx) / (2 * np.pi)
        name = "spiral"
    elif kind == 1:
        bend = np.sqrt(np.maximum(0.0, (0.6 * w_px) ** 2 - (xx - cx) ** 2))
        phase = (yy + 0.35 * bend * np.exp(-((yy - cy) / (0.3 * h_px)) ** 2)) / period
        name = "loop"
    else:
        phase = (yy + 0.08 * h_px * np.sin(np.pi * xx / w_px) + 3.0 * np.sin(xx / 17.0)) / period
        name = "arch"
    wander = ndimage.gaussian_filter(rng.normal(size=(h, w)), 6 * UP) * 40.0
    f = np.clip(1.4 * (0.5 * np.cos(2 * np.pi * (phase + wander))) + 0.5, 0.0, 1.0)
    pores = ndimage.gaussian_filter(rng.normal(size=(h, w)), 0.6 * UP)
    f = np.clip(f - 0.4 * (pores > 2.2 * pores.std()) * f, 0.0, 1.0)
    return f, name


def motion(rng, n_rows, t_max):
    """Poses (along, across px; angle deg) per frame, and what was put in."""
    v0 = rng.uniform(0.2, min(0.6 * n_rows, 2.5))
    t_n = int(np.clip(480.0 / v0, 200, t_max))
    t = np.arange(t_n)
    wobble = ndimage.gaussian_filter1d(rng.normal(size=t_n), t_n / 12, mode="nearest")
    v = v0 * np.clip(1 + 0.25 * wobble * np.sqrt(t_n / 12), 0.3, 2.0)
    put = []
    if rng.random() < 0.35:
        a, n = int(rng.integers(t_n // 4, t_n // 2)), int(rng.integers(40, 200))
        v = v * (1 - np.clip(np.minimum(t - a, a + n - t) / 10.0, 0, 1))
        put.append("stall")
    if rng.random() < 0.3:
        a, n = int(rng.integers(t_n // 2, 3 * t_n // 4)), int(rng.integers(30, 80))
        v = v * (1 - 1.8 * np.clip(np.minimum(t - a, a + n - t) / 8.0, 0, 1))
        put.append("backtrack")
    skew = np.radians(rng.uniform(-8, 8))
    drift = ndimage.gaussian_filter1d(rng.normal(size=t_n), t_n / 8) * 0.02 * np.sqrt(t_n / 8)
    y = np.concatenate([[0.0], np.cumsum(v[1:])])
    x = np.concatenate([[0.0], np.cumsum(v[1:] * np.tan(skew) + drift[1:])])
    turn = float(rng.choice([0.0, 0.0, rng.uniform(-4, 4)]))
    ang = turn * (y - y.min()) / max(np.ptp(y), 1e-9)
    return y, x, ang, v0, float(np.degrees(skew)), turn, put


def frames_at(rng, tex, y, x, ang, n_rows, n_cols, origin, snr_db, steps=6, exposure=0.5):
    """Frames whose plate (r, c) sees the texture at the pose's plate square (library
    convention: frames[t + 1][r, c] ~ frames[t][r + dy, c + dx] for a step (dy, dx))."""
    rr, cc = np.meshgrid(np.arange(n_rows) - (n_rows - 1) / 2, np.arange(n_cols) - (n_cols - 1) / 2,
                         indexing="ij")
    sub = (np.arange(UP) + 0.5) / UP - 0.5
    dy, dx = np.gradient(y), np.gradient(x)
    out = np.empty((len(y), n_rows, n_cols))
    for k in range(len(y)):
        th = np.radians(ang[k])
        c, s = np.cos(th), np.sin(th)
        acc = np.zeros((n_rows, n_cols))
        for e in ((np.arange(steps) + 0.5) / steps - 0.5) * exposure:
            for a in sub:
                for b in sub:
                    u0, u1 = rr + a, cc + b
                    py = origin[0] + y[k] + e * dy[k] + c * u0 - s * u1
                    px = origin[1] + x[k] + e * dx[k] + s * u0 + c * u1
                    acc += ndimage.map_coordinates(tex, [py * UP, px * UP], order=1,
                                                   mode="constant", cval=0.0)
        out[k] = acc / (steps * UP * UP)
    noise = out.std() / 10 ** (snr_db / 20)
    gain = 1 + 0.05 * rng.normal(size=n_cols)
    offset = 6 * rng.normal(size=n_cols)
    codes = 40 + 150 * (out * gain + rng.normal(size=out.shape) * noise) + offset
    return np.clip(np.round(codes), 0, 255).astype(np.uint8)


def make(i, seed0):
    rng = np.random.default_rng(seed0 + i)
    n_rows, n_cols = GEOMETRIES[i % len(GEOMETRIES)]
    rate = float(rng.choice([2000.0, 3000.0, 4000.0, 6000.0]))
    y, x, ang, v0, skew, turn, put = motion(rng, n_rows, int(rng.integers(500, 1600)))
    tex, name = texture(rng, int(np.ptp(y) + 3 * n_rows + 100), int(n_cols + np.ptp(x) + 60))
    origin = (30 + n_rows - y.min(), 30 + n_cols / 2 - min(0.0, x.min()))
    snr = float(rng.uniform(14, 38))
    frames = frames_at(rng, tex, y, x, ang, n_rows, n_cols, origin, snr)
    desc = (f"{name} {n_rows}x{n_cols} {rate / 1000:.0f} kHz {v0:.2f} px/frame {snr:.0f} dB "
            f"skew {skew:.1f} turn {turn:.1f}" + "".join(" " + p for p in put))
    truth = np.stack([y - y[0], x - x[0]], 1)
    return frames, truth, ang - ang[0], rate, turn, desc


def run(args):
    i, seed0 = args
    frames, truth, ang, rate, turn, desc = make(i, seed0)
    out = []
    for mode in MODES:
        res = stitch_mode(frames, rate, mode)
        e = res.positions - truth
        span = 100.0 * ((res.positions[-1, 0] - res.positions[0, 0]) / (truth[-1, 0] - truth[0, 0]) - 1)
        # (the generator injects no gap: span_summary counts every swipe)
        out.append({"case": desc, "mode": mode, "turn_deg": turn, "gap_true": 0,
                    "span_error_pct": float(span),
                    "along_rms_px": float(np.sqrt(np.mean(e[:, 0] ** 2))),
                    "across_rms_px": float(np.sqrt(np.mean(e[:, 1] ** 2))),
                    "rotation_rms_deg": float(np.sqrt(np.mean((res.angles - ang) ** 2))),
                    "placement": res.options.get("placement", "-"),
                    "events": ",".join(sorted({ev.kind for ev in res.events
                                               if ev.kind in ("gap", "stall", "backtrack")}))})
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="six swipes")
    ap.add_argument("--seed", type=int, default=7000)
    ap.add_argument("--workers", type=int, default=2, help="processes (default 2)")
    args = ap.parse_args(argv)
    n = 6 if args.quick else 24
    with ProcessPoolExecutor(args.workers) as ex:
        rows = [r for rs in ex.map(run, [(i, args.seed) for i in range(n)]) for r in rs]
    summary, lines = {}, []
    for mode in MODES:
        mine = [r for r in rows if r["mode"] == mode]
        turning = [r["rotation_rms_deg"] for r in mine if r["turn_deg"]]
        s = summary[mode] = {
            **span_summary(mine),
            "median_rotation_rms_deg_turning": float(np.median(turning)) if turning else None}
        lines.append(f"- {mode}: span error median {fmt(s['median_abs_span_error_pct'])} %, worst "
                     f"{fmt(s['worst_abs_span_error_pct'])} % ({s['swipes_over_1pct']} of "
                     f"{s['swipes']} over 1 %); along / across RMS median "
                     f"{fmt(s['median_along_rms_px'])} / {fmt(s['median_across_rms_px'])} px; "
                     f"rotation RMS median on the turning swipes "
                     f"{fmt(s['median_rotation_rms_deg_turning'])} deg")
    cols = ["case", "mode", "placement", "span_error_pct", "along_rms_px", "across_rms_px",
            "rotation_rms_deg", "events"]
    heads = ["case", "mode", "placement", "span err %", "along rms px", "across rms px",
             "rot rms deg", "events reported"]
    md = (f"# Frames from an independent generator{' (quick)' if args.quick else ''}\n\n{n} swipes "
          f"(seed {args.seed}; see make()) drawn without the library's simulator; fast mode and "
          "the streaming stitcher ignore rotation:\n\n" + "\n".join(lines)
          + "\n\n" + table(rows, cols, heads) + "\n")
    print(md)
    paths = write("independent_quick" if args.quick else "independent",
                  {"environment": environment(), "seed": args.seed, "rows": rows,
                   "summary": summary}, md)
    print("wrote", *paths)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
