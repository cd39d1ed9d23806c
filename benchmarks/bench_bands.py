"""Band benchmark: swipes across a band of the finger with no ridges (a flexion crease, a
scar), and photographic textures with blank areas between their objects.

Run from a clean checkout:  python benchmarks/bench_bands.py  [--quick]

A band at least as wide as the strip's rows leaves frames that show no texture at all in the
middle of a swipe: nothing overlaps the texture on both sides, so the travel across the band
can only come from the speed. Each swipe (stripstitch.simulate.swipe, seeded) is a grown
finger with one crease (stripstitch.simulate.with_crease, 0.3 to 1.2 mm wide, 35 to 65 % of
the way along the finger) or, one swipe in four, scikit-image's coins photograph (dark
background between the coins) as the finger surface; geometries 8x192 at 4 kHz and 16x128 at
2 kHz; a constant, human or accelerating speed profile of 60 to 150 mm/s; 15 to 35 dB; a skew
within 5 degrees. Methods side by side: stitch default and fast mode, the streaming stitcher,
and chains of scikit-image and OpenCV phase correlation (stripstitch.sweep.reconstruct).
Errors against the simulator's truth (stripstitch.evaluate); "band flagged": every frame that
saw only the band is inside a low_confidence or no_contact event. Writes
benchmarks/results/bands[_quick].json/.md. Synthetic prints; speeds are an unsourced modelling
assumption (REFERENCE-VALUES.md section 7).
"""

from __future__ import annotations

import argparse
from concurrent.futures import ProcessPoolExecutor

import numpy as np

from _common import environment, fmt, span_summary, table, write

from stripstitch import evaluate as ev
from stripstitch import simulate
from stripstitch.sweep import reconstruct

PATTERNS = ("arch", "tented_arch", "left_loop", "right_loop", "whorl", "twin_loop")
METHODS = ("default", "fast", "stream", "skimage_chain", "opencv_chain")
FINGER_MM = (14.0, 12.0)


def case(i, seed0=4100):
    """Settings of swipe i (deterministic in seed0 + i)."""
    r = np.random.default_rng(seed0 + i)
    rows, cols, rate = [(8, 192, 4000.0), (16, 128, 2000.0)][i % 2]
    p = dict(n_rows=rows, n_cols=cols, frame_rate_hz=rate,
             profile=str(r.choice(["constant", "human", "accel_decel"])),
             speed_mm_s=float(r.uniform(60, 150)), snr_db=float(r.uniform(15, 35)),
             skew_deg=float(r.uniform(-5, 5)))
    texture = "coins" if i % 4 == 3 else None
    band = (float(r.uniform(0.35, 0.65)), float(r.uniform(0.3, 1.2)))
    return str(r.choice(PATTERNS)), texture, band, p, seed0 + 300 + i, seed0 + 600 + i


def _finger(pattern, texture, band, finger_seed):
    if texture is not None:
        import skimage.data
        return simulate.texture_finger(getattr(skimage.data, texture)(), pixel_um=25.4)
    f = simulate.make_finger(pattern, size_mm=FINGER_MM, rng=finger_seed)
    return simulate.with_crease(f, at_mm=band[0] * FINGER_MM[0], width_mm=band[1])


def _band_frames(cap, n_rows):
    """Frames that saw only the band: no finger texture on any of their rows (the truth's
    ideal frames flat to within 2 % of the swipe's typical texture)."""
    ideal = np.asarray(cap.ideal_frames, dtype=np.float64)
    spread = ideal.std(axis=(1, 2))
    seen = cap.contact >= 0.5
    if not seen.any():
        return np.zeros(len(ideal), dtype=bool)
    typical = float(np.median(spread[seen]))
    idx = np.flatnonzero(seen)
    inside = np.zeros(len(ideal), dtype=bool)
    inside[idx[0]:idx[-1] + 1] = True
    return inside & (spread < 0.02 * typical)


def run(args):
    i, seed0 = args
    pattern, texture, band, p, finger_seed, seed = case(i, seed0)
    finger = _finger(pattern, texture, band, finger_seed)
    cap = simulate.swipe(pattern, finger=finger, rng=seed, **p)
    blank = _band_frames(cap, p["n_rows"])
    desc = (f"{texture or pattern} {p['n_rows']}x{p['n_cols']} {p['profile']} "
            f"{p['speed_mm_s']:.0f} mm/s {p['snr_db']:.0f} dB skew {p['skew_deg']:.1f}"
            + ("" if texture else f" band {band[1]:.2f} mm"))
    out = []
    for method in METHODS:
        row = {"case": desc, "method": method, "band_frames": int(blank.sum())}
        try:
            res = reconstruct(cap, method)
            d = ev.evaluate(res, cap, distortion=False).to_dict()
        except Exception as exc:                          # keep the benchmark going, record why
            row["error"] = f"{type(exc).__name__}: {exc}"
            out.append(row)
            continue
        flagged = np.zeros(len(blank), dtype=bool)
        for e in res.events:
            if e.kind in ("low_confidence", "no_contact"):
                flagged[e.first_frame:e.last_frame + 1] = True
        row.update({k: d.get(k) for k in ("span_error_pct", "along_rms_px", "across_rms_px", "ncc",
                                          "gap_true", "gap_false", "backtrack_false",
                                          "stall_false")})
        row["band_flagged"] = bool(flagged[blank].all()) if blank.any() else None
        out.append(row)
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="eight swipes")
    ap.add_argument("--seed", type=int, default=4100)
    ap.add_argument("--workers", type=int, default=2, help="processes (default 2)")
    args = ap.parse_args(argv)
    n = 8 if args.quick else 24
    with ProcessPoolExecutor(args.workers) as ex:
        rows = [r for rs in ex.map(run, [(i, args.seed) for i in range(n)]) for r in rs]
    summary = {}
    for m in METHODS:
        ok = [r for r in rows if r["method"] == m and "error" not in r]
        s = span_summary(ok) if ok else {"swipes": 0}
        s["false_events"] = int(sum((r["gap_false"] or 0) + (r["backtrack_false"] or 0)
                                    + (r["stall_false"] or 0) for r in ok))
        # (a swipe whose image could not be scored, e.g. no overlap with the truth, has none)
        nccs = [r["ncc"] for r in ok if r["ncc"] is not None]
        s["median_ncc"] = float(np.median(nccs)) if nccs else None
        s["unscored_images"] = len(ok) - len(nccs)
        with_band = [r for r in ok if r["band_flagged"] is not None]
        s["bands_flagged"] = f"{sum(r['band_flagged'] for r in with_band)}/{len(with_band)}"
        s["failed"] = sum(r["method"] == m and "error" in r for r in rows)
        summary[m] = s
    lines = [f"- {m}: span error median {fmt(s.get('median_abs_span_error_pct'))} %, worst "
             f"{fmt(s.get('worst_abs_span_error_pct'))} % ({s.get('swipes_over_1pct')} over 1 %), "
             f"along / across RMS median {fmt(s.get('median_along_rms_px'))} / "
             f"{fmt(s.get('median_across_rms_px'))} px, image NCC median "
             f"{fmt(s.get('median_ncc'))}"
             + (f" ({s['unscored_images']} image(s) not scored)" if s.get("unscored_images") else "")
             + f", false gap/stall/backtrack events {s['false_events']}, bands flagged "
             f"{s['bands_flagged']}" + (f", failed {s['failed']}" if s["failed"] else "")
             for m, s in summary.items()]
    cols = ["case", "method", "band_frames", "span_error_pct", "along_rms_px", "across_rms_px",
            "ncc", "gap_false", "band_flagged"]
    heads = ["case", "method", "band frames", "span err %", "along RMS px", "across RMS px",
             "NCC", "false gaps", "band flagged"]
    md = (f"# Ridge-free bands{' (quick)' if args.quick else ''}\n\n"
          f"{n} swipes across a band with no texture (a crease 0.3-1.2 mm wide on a grown "
          "finger, or the background between the coins of scikit-image's photograph); "
          "'band frames': frames that saw only the band.\n\n" + "\n".join(lines) + "\n\n"
          + table(rows, cols, heads) + "\n")
    print(md)
    paths = write("bands_quick" if args.quick else "bands",
                  {"environment": environment(), "seed": args.seed, "rows": rows,
                   "summary": summary}, md)
    print("wrote", *paths)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
