"""Accuracy benchmark: a named suite of simulated swipes x reconstruction methods.

Run from a clean checkout:  python benchmarks/bench_accuracy.py  [--quick]

Methods, side by side in one run: stripstitch ``stitch`` (mode "default" and "fast"), the
streaming stitcher (``StreamingStitcher``, frames pushed one by one), and
chains of skimage.registration.phase_cross_correlation (upsample_factor 20) and
cv2.phaseCorrelate between successive frames (positions = cumulative sums, image through
stripstitch.mosaic.fuse). Also the per-pair error of default mode against the Cramer-Rao bound
with and without the motion prior, and default mode's floor on the same swipes' noise-free
frames. Prints a table and writes
benchmarks/results/accuracy[_quick].json/.md.
Synthetic prints; speeds are an unsourced modelling assumption (REFERENCE-VALUES.md section 7).
"""

from __future__ import annotations

import argparse
import functools
import time

import numpy as np

from _common import environment, fmt, table, write

from stripstitch import evaluate as ev
from stripstitch import simulate, stitch
from stripstitch.sweep import reconstruct

METHODS = ("default", "fast", "stream", "skimage_chain", "opencv_chain")

#: name -> swipe parameters (simulate.swipe keywords plus finger pattern/seed).
SUITE = {
    "steady_8x192_4k": dict(pattern="right_loop", n_rows=8, n_cols=192, frame_rate_hz=4000.0,
                            speed_mm_s=100.0, snr_db=30.0),
    "steady_16x128_2k": dict(pattern="whorl", n_rows=16, n_cols=128, frame_rate_hz=2000.0,
                             speed_mm_s=100.0, snr_db=30.0),
    "accel_decel_8x192": dict(pattern="left_loop", profile="accel_decel", n_rows=8, n_cols=192,
                              frame_rate_hz=4000.0, speed_mm_s=150.0, snr_db=30.0),
    "human_stall_backtrack": dict(pattern="right_loop", profile="human", n_rows=8, n_cols=192,
                                  frame_rate_hz=4000.0, speed_mm_s=100.0, snr_db=25.0, skew_deg=5.0,
                                  stalls=((4.0, 0.03),), backtracks=((7.0, 0.4),)),
    "rotation_arch": dict(pattern="arch", n_rows=8, n_cols=192, frame_rate_hz=4000.0,
                          speed_mm_s=100.0, snr_db=30.0, rotation_deg=4.0),
    "too_fast_16x128_2k": dict(pattern="whorl", n_rows=16, n_cols=128, frame_rate_hz=2000.0,
                               speed_mm_s=100.0, snr_db=30.0, too_fast=((5.0, 1.0),)),
    "rows2_8k": dict(pattern="tented_arch", n_rows=2, n_cols=192, frame_rate_hz=8000.0,
                     speed_mm_s=50.0, snr_db=40.0),
    "rows4_snr10": dict(pattern="left_loop", n_rows=4, n_cols=128, frame_rate_hz=4000.0,
                        speed_mm_s=80.0, snr_db=10.0),
    "rows32_1k_fast": dict(pattern="twin_loop", n_rows=32, n_cols=96, frame_rate_hz=1000.0,
                           speed_mm_s=150.0, snr_db=20.0),
    "snr40_tented": dict(pattern="tented_arch", n_rows=8, n_cols=192, frame_rate_hz=4000.0,
                         speed_mm_s=100.0, snr_db=40.0),
    "speed300_8x192": dict(pattern="right_loop", n_rows=8, n_cols=192, frame_rate_hz=4000.0,
                           speed_mm_s=300.0, snr_db=30.0),
    "dropped_frames": dict(pattern="whorl", n_rows=8, n_cols=192, frame_rate_hz=4000.0,
                           speed_mm_s=100.0, snr_db=30.0, drop_frames=tuple(range(150, 156))),
    "slanted_human_twin": dict(pattern="twin_loop", profile="human", n_rows=8, n_cols=160,
                               frame_rate_hz=3000.0, speed_mm_s=120.0, snr_db=20.0, skew_deg=10.0),
    # the low end of the 12-40 dB range, on both target geometries
    "snr12_8x192_4k": dict(pattern="whorl", n_rows=8, n_cols=192, frame_rate_hz=4000.0,
                           speed_mm_s=100.0, snr_db=12.0),
    "snr12_human_16x128_2k": dict(pattern="left_loop", profile="human", n_rows=16, n_cols=128,
                                  frame_rate_hz=2000.0, speed_mm_s=120.0, snr_db=12.0),
    # real photographic textures (bundled with scikit-image) as the finger surface, at 25.4 um
    # per image pixel: detail finer than the plates (simulate.texture_finger)
    "photo_gravel_8x192": dict(texture="gravel", n_rows=8, n_cols=192, frame_rate_hz=4000.0,
                               speed_mm_s=100.0, snr_db=25.0),
    "photo_grass_human_16x128": dict(texture="grass", profile="human", n_rows=16, n_cols=128,
                                     frame_rate_hz=2000.0, speed_mm_s=100.0, snr_db=20.0,
                                     skew_deg=4.0),
    "photo_brick_8x192_snr12": dict(texture="brick", n_rows=8, n_cols=192, frame_rate_hz=4000.0,
                                    speed_mm_s=80.0, snr_db=12.0),
}
QUICK = ("steady_8x192_4k", "steady_16x128_2k", "human_stall_backtrack", "too_fast_16x128_2k")
FINGER_MM = (12.0, 10.0)


@functools.lru_cache(maxsize=None)
def _finger(pattern, seed):
    return simulate.make_finger(pattern, size_mm=FINGER_MM, rng=seed)


@functools.lru_cache(maxsize=None)
def _texture_finger(texture):
    import skimage.data
    return simulate.texture_finger(getattr(skimage.data, texture)(), pixel_um=25.4)


def make_capture(name, seed=0):
    p = dict(SUITE[name])
    if "texture" in p:
        return simulate.swipe(finger=_texture_finger(p.pop("texture")), rng=seed, **p)
    pattern = p.pop("pattern")
    return simulate.swipe(pattern, finger=_finger(pattern, 1000 + list(SUITE).index(name)),
                          rng=seed, **p)


COLUMNS = ["case", "method", "n_frames", "span_error_pct", "along_rms_px", "along_max_px",
           "across_rms_px", "rotation_rms_deg", "increment_rms_along_px", "crb_rms_along_px",
           "ncc", "ssim", "overlap_fraction", "distortion_rms_px", "scale_along", "period_ratio_along",
           "period_ratio_across", "gap_true", "gap_detected", "gap_false", "stall_detected",
           "backtrack_detected", "verdict", "seconds"]
HEADERS = ["case", "method", "T", "span err %", "along rms", "along max", "across rms",
           "rot rms deg", "incr rms", "CRB rms", "NCC", "SSIM", "covered", "dist rms", "scale along",
           "period along", "period across", "gaps", "gaps found", "false gaps", "stalls found",
           "backtr found", "verdict", "s"]


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small subset of the suite")
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)
    names = QUICK if args.quick else tuple(SUITE)
    rows, scores = [], {m: [] for m in METHODS}
    prior_rows = []
    for name in names:
        cap = make_capture(name, args.seed)
        # Per-pair error with and without the motion prior (default mode; "without": an
        # acceleration allowance of 100 px per frame^2, which leaves every frame to its own
        # registrations). Smoothing with the prior can push the per-pair error below the
        # pairwise Cramer-Rao bound, so both figures are reported.
        for label, kw in (("with prior", {}), ("without prior", {"motion_prior_px": 100.0})):
            try:
                res = stitch(cap.frames, pitch_um=float(cap.pitch_um),
                             frame_rate_hz=float(cap.frame_rate_hz),
                             timestamps_s=np.asarray(cap.times_s, dtype=np.float64), **kw)
                d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
                prior_rows.append({"case": name, "prior": label,
                                   "increment_rms_along_px": d["increment_rms_along_px"],
                                   "crb_rms_along_px": d["crb_rms_along_px"],
                                   "ratio_to_crb": d["increment_rms_along_px"] / d["crb_rms_along_px"],
                                   "span_error_pct": d["span_error_pct"],
                                   "placement": res.options.get("placement")})
            except Exception as exc:                     # keep the suite going, record why
                prior_rows.append({"case": name, "prior": label, "error": f"{type(exc).__name__}: {exc}"})
        # The same swipe's noise-free frames (no noise, fixed pattern or quantisation): what
        # the default mode still errs there is its floor, set by detail the plates alias
        # (the ridges are sharper than the pitch), which the Cramer-Rao bound, computed from
        # the gradients of the sampled frames, does not count. The noisy run's increments
        # are then compared with the bound and the floor added in quadrature.
        try:
            res = stitch(np.asarray(cap.ideal_frames, dtype=np.float64), pitch_um=float(cap.pitch_um),
                         frame_rate_hz=float(cap.frame_rate_hz),
                         timestamps_s=np.asarray(cap.times_s, dtype=np.float64))
            d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
            floor = d["increment_rms_along_px"]
            prior_rows.append({"case": name, "prior": "noise-free frames",
                               "increment_rms_along_px": floor, "span_error_pct": d["span_error_pct"],
                               "placement": res.options.get("placement")})
            for r in prior_rows:
                if r["case"] == name and r.get("prior") == "with prior" and "error" not in r:
                    r["floor_rms_along_px"] = floor
                    r["ratio_to_crb_and_floor"] = r["increment_rms_along_px"] / float(
                        np.hypot(r["crb_rms_along_px"], floor))
        except Exception as exc:                         # keep the suite going, record why
            prior_rows.append({"case": name, "prior": "noise-free frames",
                               "error": f"{type(exc).__name__}: {exc}"})
        for method in METHODS:
            t0 = time.perf_counter()
            try:
                res = reconstruct(cap, method)
                secs = time.perf_counter() - t0
                e = ev.evaluate(res, cap)
            except Exception as exc:                      # keep the suite going, record why
                rows.append({"case": name, "method": method, "error": f"{type(exc).__name__}: {exc}"})
                print(f"{name:24s} {method:14s} FAILED {exc}", flush=True)
                continue
            d = e.to_dict()
            d.update(case=name, method=method, seconds=secs,
                     verdict=getattr(getattr(res, "report", None), "verdict", "-"))
            rows.append(d)
            scores[method].append(e.events)
            print(f"{name:24s} {method:14s} span {fmt(d['span_error_pct'])} %  along rms "
                  f"{fmt(d['along_rms_px'])} px  NCC {fmt(d.get('ncc'))}  {secs:.2f} s", flush=True)
    summary = []
    for method in METHODS:
        mine = [r for r in rows if r.get("method") == method and "error" not in r]
        pooled = ev.combine_event_scores(scores[method]) if scores[method] else None
        span = np.array([abs(r["span_error_pct"]) for r in mine if r.get("span_error_pct") is not None])
        summary.append({
            "method": method, "cases": len(mine),
            "median_abs_span_error_pct": float(np.median(span)) if span.size else None,
            "cases_span_under_1pct": int((span < 1.0).sum()),
            "median_along_rms_px": float(np.median([r["along_rms_px"] for r in mine])) if mine else None,
            "median_ncc": float(np.median([r["ncc"] for r in mine if r.get("ncc") is not None])) if mine else None,
            "event_precision": pooled.precision["all"] if pooled else None,
            "event_recall": pooled.recall["all"] if pooled else None,
            "gap_recall": pooled.recall.get("gap") if pooled else None,
            "gap_false": pooled.counts["gap"]["false"] if pooled else None,
        })
    scols = ["method", "cases", "median_abs_span_error_pct", "cases_span_under_1pct",
             "median_along_rms_px", "median_ncc", "event_precision", "event_recall", "gap_recall",
             "gap_false"]
    t1 = table(rows, COLUMNS, HEADERS)
    t2 = table(summary, scols)
    t3 = table(prior_rows, ["case", "prior", "increment_rms_along_px", "crb_rms_along_px",
                            "ratio_to_crb", "floor_rms_along_px", "ratio_to_crb_and_floor",
                            "span_error_pct", "placement"],
               ["case", "frames", "incr rms along", "CRB rms along", "incr / CRB",
                "floor rms", "incr / (CRB + floor)", "span err %", "placement"])
    ratios = {lab: [r["ratio_to_crb"] for r in prior_rows if r.get("prior") == lab and "error" not in r]
              for lab in ("with prior", "without prior")}
    prior_summary = {lab: float(np.median(v)) if v else None for lab, v in ratios.items()}
    both = [r["ratio_to_crb_and_floor"] for r in prior_rows if "ratio_to_crb_and_floor" in r]
    prior_summary["with prior, to CRB and floor"] = float(np.median(both)) if both else None
    low = [r["ratio_to_crb"] for r in prior_rows if r.get("prior") == "with prior" and "error" not in r
           and SUITE[r["case"]]["snr_db"] <= 20.0]
    prior_summary["with prior, SNR <= 20 dB"] = float(np.median(low)) if low else None
    md = (f"# Accuracy benchmark{' (quick)' if args.quick else ''}\n\n"
          "Positions in sensor pixels (50.8 um); errors over frames with contact >= 0.5, relative to "
          "frame 0 (or the first frame in contact when frame 0 has none, each trajectory in that "
          "frame's axes); CRB = Cramer-Rao bound per pair (Robinson & Milanfar 2004), doubled for noise in "
          "both frames; image metrics after the best global translation; period = measured ridge "
          "period ratio reconstruction / truth; scale = geometric scale from the block distortion map; "
          "NCC and SSIM are over the covered pixels only (covered = fraction of the true image).\n\n"
          + t1 + "\n\n## Per method\n\n" + t2 + "\n\n## Per-pair error with and without the "
          "motion prior (default mode)\n\nMedian increment RMS / CRB: "
          f"{fmt(prior_summary['with prior'])} with the prior, {fmt(prior_summary['without prior'])} "
          "without (acceleration allowance 100 px/frame^2); "
          f"{fmt(prior_summary['with prior, SNR <= 20 dB'])} with the prior on the swipes of 20 dB "
          "and less. Floor: increment RMS of the default mode on the same swipe's noise-free "
          "frames (aliased ridge detail the bound does not count); against the bound and the "
          "floor added in quadrature the median is "
          f"{fmt(prior_summary['with prior, to CRB and floor'])}.\n\n" + t3 + "\n")
    print()
    print(t1)
    print()
    print(t2)
    paths = write("accuracy_quick" if args.quick else "accuracy",
                  {"environment": environment(), "seed": args.seed, "rows": rows, "summary": summary,
                   "prior_study": prior_rows, "prior_summary": prior_summary,
                   "suite": {n: SUITE[n] for n in names}}, md)
    print("\nwrote", *paths)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
