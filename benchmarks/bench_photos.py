"""Real textures: every photograph bundled with scikit-image swiped as a finger, in every mode.

Run from a clean checkout:  python benchmarks/bench_photos.py  [--quick]

The accuracy suite holds three photographs (gravel, grass, brick); the library must also hold
on textures it was never tuned on. Each image bundled with scikit-image (no download; colour
ones to grey, the retina and the Hubble field cut to their central 600 x 600 pixels,
binary_blobs seeded) becomes a finger surface at 25.4 um per image pixel
(stripstitch.simulate.texture_finger: detail finer than the plates), swiped at 100 mm/s with a
human speed profile at 25 dB over 8x192 at 4 kHz and 16x128 at 2 kHz, straight and slanted by
3 degrees (the same noise seed each time), and reconstructed by default mode, fast mode and
the streaming stitcher fed frame by frame. Span, along and across errors against the
simulator's truth over the frames with contact >= 0.5; events reported where the truth has
none (no swipe has a gap, stall or backtrack). Many of these images are not finger-like at
all (a text page, a phantom of flat ellipses, a colour wheel): wide areas without texture
show what the contact, gap and bridging logic does with them. Writes
benchmarks/results/photos[_quick].json/.md.
"""

from __future__ import annotations

import argparse
from concurrent.futures import ProcessPoolExecutor

import numpy as np

from _common import environment, fmt, span_summary, stitch_mode, table, write

from stripstitch import evaluate as ev
from stripstitch import simulate

PHOTOS = ("camera", "coins", "moon", "text", "page", "astronaut", "coffee", "chelsea", "rocket",
          "immunohistochemistry", "retina", "cell", "grass", "gravel", "brick", "clock",
          "hubble_deep_field", "colorwheel", "binary_blobs", "shepp_logan_phantom")
GEOMETRIES = ((8, 192, 4000.0), (16, 128, 2000.0))
SKEWS = (0.0, 3.0)
MODES = ("default", "fast", "stream")


def photo(name):
    """The named scikit-image image as a float grey-level array."""
    import skimage.data
    from skimage.color import rgb2gray

    im = skimage.data.binary_blobs(rng=5) if name == "binary_blobs" else getattr(skimage.data, name)()
    if im.ndim == 3:
        im = rgb2gray(im[..., :3])
    im = np.asarray(im, dtype=np.float64)
    if im.shape[0] > 700:
        c0, c1 = im.shape[0] // 2, im.shape[1] // 2
        im = im[c0 - 300:c0 + 300, c1 - 300:c1 + 300]
    return im


def run(args):
    name, geometry = args
    rows, cols, rate = geometry
    finger = simulate.texture_finger(photo(name), pixel_um=25.4)
    out = []
    for skew in SKEWS:
        cap = simulate.swipe(finger=finger, rng=11, n_rows=rows, n_cols=cols, frame_rate_hz=rate,
                             profile="human", speed_mm_s=100.0, snr_db=25.0, skew_deg=skew)
        for mode in MODES:
            res = stitch_mode(cap.frames, rate, mode)
            d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
            false = sum(int(d[k + "_false"]) for k in ("gap", "stall", "backtrack"))
            out.append({"case": f"{name} {rows}x{cols}", "photo": name, "rows": rows,
                        "skew_deg": skew, "mode": mode, "frames": int(cap.frames.shape[0]),
                        "span_error_pct": d["span_error_pct"], "along_rms_px": d["along_rms_px"],
                        "across_rms_px": d["across_rms_px"], "gap_true": int(d["gap_true"]),
                        "false_events": false,
                        "verdict": res.report.verdict})
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="six photographs, 8x192 only")
    ap.add_argument("--workers", type=int, default=2, help="processes (default 2)")
    args = ap.parse_args(argv)
    names = ("camera", "coins", "page", "coffee", "clock", "shepp_logan_phantom") if args.quick \
        else PHOTOS
    geoms = GEOMETRIES[:1] if args.quick else GEOMETRIES
    jobs = [(n, g) for n in names for g in geoms]
    with ProcessPoolExecutor(args.workers) as ex:
        rows = [r for rs in ex.map(run, jobs) for r in rs]
    groups = []
    for mode in MODES:
        for n_rows in sorted({r["rows"] for r in rows}):
            sel = [r for r in rows if r["mode"] == mode and r["rows"] == n_rows]
            groups.append({"mode": mode, "rows": n_rows, **span_summary(sel),
                           "false_events": int(sum(r["false_events"] for r in sel))})
    gcols = ["mode", "rows", "swipes", "median_abs_span_error_pct", "worst_abs_span_error_pct",
             "swipes_over_1pct", "median_along_rms_px", "median_across_rms_px", "false_events"]
    gheads = ["mode", "rows", "swipes", "span err % (median |.|)", "worst span err %",
              "over 1 %", "along rms px (median)", "across rms px (median)", "false events"]
    cols = ["case", "skew_deg", "mode", "frames", "span_error_pct", "along_rms_px",
            "across_rms_px", "false_events", "verdict"]
    heads = ["case", "skew deg", "mode", "frames", "span err %", "along rms px",
             "across rms px", "false events", "verdict"]
    by_mode = {m: np.abs([r["span_error_pct"] for r in rows if r["mode"] == m]) for m in MODES}
    md = (f"# Real textures{' (quick)' if args.quick else ''}\n\n"
          f"{len(names)} images bundled with scikit-image swiped as fingers (100 mm/s, human "
          "profile, 25 dB; straight and slanted 3 degrees). Median |span error| "
          + ", ".join(f"{m} {fmt(float(np.median(v)))} % (worst {fmt(float(np.max(v)))})"
                      for m, v in by_mode.items())
          + ". Not finger-like textures among them on purpose (see the module notes); the "
          "key-frame tracker chooses its edge filters per swipe by the residual (DEVELOPERS.md, "
          "'Edge rows').\n\n"
          + table(groups, gcols, gheads) + "\n\n## Every swipe\n\n" + table(rows, cols, heads)
          + "\n")
    print(md)
    paths = write("photos" + ("_quick" if args.quick else ""),
                  {"environment": environment(), "rows": rows, "groups": groups}, md)
    print("wrote", *paths)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
