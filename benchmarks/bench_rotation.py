"""Rotation benchmark: turning swipes the accuracy suite does not hold (other fingers, seeds,
geometries, turns, speeds and noise), and swipes that do not turn (no turn may be invented).

Run from a clean checkout:  python benchmarks/bench_rotation.py  [--quick]

Then 16 turning swipes with random settings on the two target geometries. Each swipe is simulated (stripstitch.simulate.swipe) and stitched in default mode with its
timestamps; errors against the simulator's truth as in the accuracy benchmark (frames with
contact >= 0.5, relative to the first of them). 'turn found' is the spread of the estimated
angles. Writes benchmarks/results/rotation.json/.md.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from _common import environment, fmt, table, write

from stripstitch import evaluate as ev
from stripstitch import simulate, stitch

# (pattern, rows, columns, frame rate Hz, turn deg, other swipe settings); speed 100 mm/s and
# 30 dB unless given.
CASES = [
    ("right_loop", 8, 192, 4000.0, 3.0, {"profile": "human"}),
    ("whorl", 16, 128, 2000.0, -3.0, {}),
    ("tented_arch", 16, 128, 2000.0, 3.0, {"profile": "human", "snr_db": 20.0}),
    ("left_loop", 8, 192, 4000.0, 3.0, {"snr_db": 12.0}),
    ("arch", 8, 192, 4000.0, -3.0, {"skew_deg": -4.0}),
    ("twin_loop", 16, 128, 2000.0, 3.0, {"speed_mm_s": 70.0}),
    ("whorl", 10, 256, 5000.0, 5.0, {"snr_db": 40.0}),
    ("left_loop", 16, 128, 2000.0, -2.0, {"profile": "human"}),
    ("whorl", 16, 128, 2000.0, 0.0, {"profile": "human"}),
    ("right_loop", 8, 192, 4000.0, 0.0, {"skew_deg": 5.0}),
    ("arch", 16, 128, 2000.0, 0.0, {"snr_db": 12.0}),
    ("tented_arch", 12, 160, 3000.0, 0.0, {"profile": "human"}),
]
QUICK = (0, 1, 8)
PATTERNS = ("arch", "tented_arch", "left_loop", "right_loop", "whorl", "twin_loop")


def random_case(i, seed0=8000):
    """A turning swipe with random settings on one of the two target geometries (seeded):
    profile, speed 50-200 mm/s, SNR 12-40 dB, skew within 6 degrees, a turn of 2 to 4
    degrees either way, a stall in one swipe of four."""
    r = np.random.default_rng(seed0 + i)
    rows, cols, rate = [(8, 192, 4000.0), (16, 128, 2000.0)][i % 2]
    p = dict(n_rows=rows, n_cols=cols, frame_rate_hz=rate,
             profile=str(r.choice(["constant", "human", "accel_decel"])),
             speed_mm_s=float(r.uniform(50, 200)), snr_db=float(r.uniform(12, 40)),
             skew_deg=float(r.uniform(-6, 6)),
             rotation_deg=float(r.choice([-1, 1]) * r.uniform(2.0, 4.0)))
    if r.random() < 0.25:
        p["stalls"] = ((float(r.uniform(3, 8)), float(r.uniform(0.02, 0.06))),)
    return str(r.choice(PATTERNS)), p, seed0 + 500 + i, seed0 + 900 + i


def run(i, random=False):
    if random:
        pattern, kw, finger_seed, seed = random_case(i)
        rows, cols, rate, turn = kw["n_rows"], kw["n_cols"], kw["frame_rate_hz"], kw["rotation_deg"]
        extra = {k: (round(v, 1) if isinstance(v, float) else v) for k, v in kw.items()
                 if k in ("profile", "speed_mm_s", "snr_db", "skew_deg", "stalls")}
        extra = {k: (v if k != "stalls" else "yes") for k, v in extra.items()}
    else:
        pattern, rows, cols, rate, turn, extra = CASES[i]
        kw = dict(n_rows=rows, n_cols=cols, frame_rate_hz=rate, speed_mm_s=100.0, snr_db=30.0,
                  rotation_deg=turn)
        kw.update(extra)
        finger_seed, seed = 9100 + i, 4242 + i
    finger = simulate.make_finger(pattern, size_mm=(12.0, 10.0), rng=finger_seed)
    cap = simulate.swipe(pattern, finger=finger, rng=seed, **kw)
    t0 = time.perf_counter()
    res = stitch(cap.frames, pitch_um=float(cap.pitch_um), frame_rate_hz=rate,
                 timestamps_s=np.asarray(cap.times_s, dtype=np.float64))
    secs = time.perf_counter() - t0
    d = ev.evaluate(res, cap, image=False, distortion=False).to_dict()
    other = ", ".join(f"{k} {v}" for k, v in extra.items())
    return {"case": f"{pattern} {rows}x{cols} @ {rate / 1000:g} kHz" + (f" ({other})" if other else ""),
            "turn_deg": round(turn, 2), "turn_found_deg": float(np.ptp(res.angles)),
            "rotation_rms_deg": d["rotation_rms_deg"], "span_error_pct": d["span_error_pct"],
            "along_rms_px": d["along_rms_px"], "across_rms_px": d["across_rms_px"],
            "n_frames": int(cap.n_frames), "seconds": secs}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="three chosen swipes, four random")
    args = ap.parse_args(argv)
    rows, rand = [], []
    for i in (QUICK if args.quick else range(len(CASES))):
        rows.append(run(i))
    for i in range(4 if args.quick else 16):
        rand.append(run(i, random=True))
    for r in rows + rand:
        print(f"{r['case']:58s} turn {r['turn_deg']:5.1f} found {r['turn_found_deg']:5.2f} "
              f"rot rms {r['rotation_rms_deg']:.3f} deg  across {r['across_rms_px']:.3f} px", flush=True)
    turning = [r["rotation_rms_deg"] for r in rows if r["turn_deg"] != 0.0]
    still = [r["turn_found_deg"] for r in rows if r["turn_deg"] == 0.0]
    rr = np.array([r["rotation_rms_deg"] for r in rand])
    summary = {"turning_swipes": len(turning),
               "median_rotation_rms_deg": float(np.median(turning)) if turning else None,
               "worst_rotation_rms_deg": float(np.max(turning)) if turning else None,
               "unturned_swipes": len(still),
               "largest_turn_invented_deg": float(np.max(still)) if still else None,
               "random_swipes": int(rr.size), "random_median_rotation_rms_deg": float(np.median(rr)),
               "random_worst_rotation_rms_deg": float(np.max(rr)),
               "random_within_0_1_deg": int((rr <= 0.1).sum())}
    cols = ["case", "turn_deg", "turn_found_deg", "rotation_rms_deg", "span_error_pct",
            "along_rms_px", "across_rms_px", "n_frames", "seconds"]
    heads = ["case", "turn deg", "turn found deg", "rot rms deg", "span err %", "along rms px",
             "across rms px", "T", "s"]
    md = (f"# Rotation{' (quick)' if args.quick else ''}\n\n"
          "Swipes outside the accuracy suite, default mode; errors against the simulator's truth "
          "over the frames with contact >= 0.5, relative to the first of them.\n\n"
          f"Turning swipes: median rotation RMS {fmt(summary['median_rotation_rms_deg'])} deg, "
          f"worst {fmt(summary['worst_rotation_rms_deg'])} deg (target 0.1 deg on a 3-degree "
          f"turn). Unturned swipes: largest turn found {fmt(summary['largest_turn_invented_deg'])} "
          "deg.\n\n" + table(rows, cols, heads) + "\n\n## Random turning swipes\n\n"
          "Settings drawn at random (seeded; see random_case): median rotation RMS "
          f"{fmt(summary['random_median_rotation_rms_deg'])} deg, worst "
          f"{fmt(summary['random_worst_rotation_rms_deg'])} deg, "
          f"{summary['random_within_0_1_deg']} of {summary['random_swipes']} within 0.1 deg. "
          "The turn is read from the twist (an along shift growing across the strip and with the "
          "travel) and, where the finger stalls, between the stall's first and last frames; some "
          "textures and speeds still keep part of their turn or gain some.\n\n"
          + table(rand, cols, heads) + "\n")
    print()
    print(md)
    paths = write("rotation_quick" if args.quick else "rotation",
                  {"environment": environment(), "rows": rows, "summary": summary}, md)
    print("wrote", *paths)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
