"""Geometries no one chose: random strips over the whole contract (2-64 rows, 16-512 columns).

Run from a clean checkout:  python benchmarks/bench_geometry.py  [--quick] [--seed N]

The accuracy suite and bench_random use a few chosen geometries; this draws the strip too.
Each swipe (stripstitch.simulate.swipe, seeded) cycles through 18 geometries from 2x256 to
64x48 (narrow ones included: 8x24, 20x16), draws a frame rate of 1-8 kHz, a speed of 30-200
mm/s capped so the finger moves at most 0.6 of the strip's rows per frame at the nominal
speed (profiles that accelerate go past it), a speed profile, 12-40 dB, a skew within 8
degrees, a turn in one swipe of three, a stall and a backtrack in about 30 % each, a skin
(normal, dry, wet), and in about 30 % a photographic texture (scikit-image's gravel, brick,
grass, moon) instead of a grown ridge pattern. Default mode only; errors against the
simulator's truth (stripstitch.evaluate), summarised per band of rows and for narrow strips.
Writes benchmarks/results/geometry[_quick].json/.md. Synthetic prints; speeds are an
unsourced modelling assumption (REFERENCE-VALUES.md section 7).
"""

from __future__ import annotations

import argparse
from concurrent.futures import ProcessPoolExecutor

import numpy as np

from _common import environment, fmt, span_summary, table, write

from stripstitch import evaluate as ev
from stripstitch import simulate, stitch

GEOMETRIES = ((2, 256), (3, 192), (4, 160), (5, 300), (6, 128), (8, 64), (8, 400), (10, 256),
              (12, 96), (12, 512), (16, 32), (16, 256), (24, 128), (32, 100), (48, 64),
              (64, 48), (8, 24), (20, 16))
TEXTURES = ("gravel", "brick", "grass", "moon")
PITCH_MM = 50.8e-3
BANDS = (("2-3 rows", 2, 3), ("4-7 rows", 4, 7), ("8-16 rows", 8, 16), ("20-64 rows", 17, 64))


def case(i, seed0):
    """Settings of swipe i (deterministic in seed0 + i)."""
    r = np.random.default_rng(seed0 + i)
    rows, cols = GEOMETRIES[i % len(GEOMETRIES)]
    rate = float(r.choice([1000.0, 2000.0, 3000.0, 4000.0, 6000.0, 8000.0]))
    vmax = 0.6 * max(rows - 1, 1) * PITCH_MM * rate
    p = dict(n_rows=rows, n_cols=cols, frame_rate_hz=rate,
             profile=str(r.choice(["constant", "human", "accel_decel"])),
             speed_mm_s=float(min(r.uniform(30, 200), vmax)), snr_db=float(r.uniform(12, 40)),
             skew_deg=float(r.uniform(-8, 8)),
             rotation_deg=float(r.choice([0.0, 0.0, r.uniform(-4, 4)])))
    skin = str(r.choice(["normal", "normal", "dry", "wet"]))
    if r.random() < 0.3:
        p["stalls"] = ((float(r.uniform(3, 8)), float(r.uniform(0.02, 0.08))),)
    if r.random() < 0.3:
        p["backtracks"] = ((float(r.uniform(4, 9)), float(r.uniform(0.2, 0.6))),)
    texture = str(r.choice(TEXTURES)) if r.random() < 0.3 else None
    return str(r.choice(simulate.PATTERNS)), texture, skin, p, seed0 + 500 + i, seed0 + 900 + i


def _finger(pattern, texture, skin, cols, finger_seed):
    if texture is not None:
        import skimage.data

        img = getattr(skimage.data, texture)()
        img = img.mean(axis=2) if img.ndim == 3 else img
        return simulate.texture_finger(img, pixel_um=25.4)
    width_mm = max(10.0, cols * PITCH_MM + 2.0)
    return simulate.make_finger(pattern, size_mm=(14.0, width_mm), rng=finger_seed, skin=skin)


def run(args):
    i, seed0 = args
    pattern, texture, skin, p, finger_seed, seed = case(i, seed0)
    finger = _finger(pattern, texture, skin, p["n_cols"], finger_seed)
    cap = simulate.swipe(pattern, finger=finger, rng=seed, **p)
    res = stitch(cap.frames, pitch_um=float(cap.pitch_um), frame_rate_hz=p["frame_rate_hz"])
    d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
    px_frame = p["speed_mm_s"] / PITCH_MM / p["frame_rate_hz"]
    desc = (f"{texture or pattern}{'' if texture else ' ' + skin} {p['n_rows']}x{p['n_cols']} "
            f"{p['frame_rate_hz'] / 1000:.0f} kHz {p['profile']} {px_frame:.2f} px/frame "
            f"{p['snr_db']:.0f} dB skew {p['skew_deg']:.1f} turn {p['rotation_deg']:.1f}"
            + (" stall" if "stalls" in p else "") + (" backtrack" if "backtracks" in p else ""))
    row = {"case": desc, "rows": p["n_rows"], "cols": p["n_cols"], "frames": int(len(cap.frames)),
           "placement": dict(res.options).get("placement"),
           "verdict": res.report.verdict}
    for k in ("span_error_pct", "along_rms_px", "across_rms_px", "rotation_rms_deg", "gap_true",
              "gap_detected", "gap_false", "stall_true", "stall_detected", "stall_false",
              "backtrack_true", "backtrack_detected", "backtrack_false"):
        row[k] = d.get(k)
    return row


def _summary(rows):
    out = {**span_summary(rows),
           "false_events": int(sum((r["gap_false"] or 0) + (r["stall_false"] or 0)
                                   + (r["backtrack_false"] or 0) for r in rows)),
           "unusable": int(sum(r["verdict"] != "usable" for r in rows))}
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="eighteen swipes (each geometry once)")
    ap.add_argument("--seed", type=int, default=300)
    ap.add_argument("--workers", type=int, default=2, help="processes (default 2)")
    args = ap.parse_args(argv)
    n = len(GEOMETRIES) if args.quick else 2 * len(GEOMETRIES)
    with ProcessPoolExecutor(args.workers) as ex:
        rows = list(ex.map(run, [(i, args.seed) for i in range(n)]))
    groups = [(name, [r for r in rows if lo <= r["rows"] <= hi]) for name, lo, hi in BANDS]
    groups.append(("narrow (< 32 columns)", [r for r in rows if r["cols"] < 32]))
    groups.append(("all", rows))
    summary = {name: _summary(g) for name, g in groups if g}
    lines = [f"- {name}: {s['swipes']} swipes, span error median "
             f"{fmt(s['median_abs_span_error_pct'])} %, worst "
             f"{fmt(s['worst_abs_span_error_pct'])} % "
             f"({s['swipes_over_1pct']} over 1 %), along / across RMS median "
             f"{fmt(s['median_along_rms_px'])} / {fmt(s['median_across_rms_px'])} px, events "
             f"reported where the truth has none {s['false_events']}, called unusable "
             f"{s['unusable']}" for name, s in summary.items()]
    cols = ["case", "placement", "frames", "span_error_pct", "along_rms_px", "across_rms_px",
            "rotation_rms_deg", "gap_true", "gap_false", "stall_true", "stall_detected",
            "stall_false", "backtrack_true", "backtrack_detected", "backtrack_false", "verdict"]
    heads = ["case", "placement", "T", "span err %", "along rms px", "across rms px",
             "rot rms deg", "gaps", "false gaps", "stalls", "found", "false", "backtracks",
             "found", "false", "verdict"]
    md = (f"# Geometries{' (quick)' if args.quick else ''}\n\n{n} swipes on random strips "
          f"(seed {args.seed}; see case()), default mode:\n\n" + "\n".join(lines)
          + "\n\n" + table(rows, cols, heads) + "\n")
    print(md)
    paths = write("geometry_quick" if args.quick else "geometry",
                  {"environment": environment(), "seed": args.seed, "rows": rows,
                   "summary": summary}, md)
    print("wrote", *paths)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
