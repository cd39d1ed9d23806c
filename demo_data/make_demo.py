"""Regenerate the demo swipes in demo_data/ bit for bit (fixed seeds, reproducible archives).

    python demo_data/make_demo.py            # write the .npz files and SHA256SUMS
    python demo_data/make_demo.py --check    # regenerate into a temporary folder, compare sha256
    python demo_data/make_demo.py --with-ideal --out /tmp/demo   # also store the ideal frames

The scenario is invented (see demo_data/README.md); every print is synthetic, for testing only.
The archives hold the delivered frames and the truth (positions, angles, times, true image,
contact, events, sensor fixed pattern, motion); the ideal frames are left out to keep the files
small (``--with-ideal`` stores them as float32). Files change only when the simulator changes.
"""

from __future__ import annotations

import argparse
import hashlib
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from stripstitch import simulate  # noqa: E402

#: name -> keyword arguments of stripstitch.simulate.swipe (each with its own fixed seed).
SWIPES = {
    "steady_8x192_4khz": dict(
        pattern="right_loop", profile="constant", n_rows=8, n_cols=192, frame_rate_hz=4000.0,
        speed_mm_s=100.0, snr_db=30.0, rng=20260101),
    "human_slanted_stall_backtrack_8x192_4khz": dict(
        pattern="whorl", profile="human", n_rows=8, n_cols=192, frame_rate_hz=4000.0,
        speed_mm_s=120.0, snr_db=25.0, skew_deg=6.0, rotation_deg=2.0,
        stalls=[(5.0, 0.03)], backtracks=[(9.0, 0.6)], skin="dry", rng=20260102),
    "fast_gap_16x128_2khz": dict(
        pattern="left_loop", profile="accel_decel", n_rows=16, n_cols=128, frame_rate_hz=2000.0,
        speed_mm_s=200.0, snr_db=35.0, too_fast=[(8.0, 3.0)], drop_frames=[40, 41], rng=20260103),
    "wet_arch_8x192_4khz": dict(
        pattern="arch", profile="accel_decel", n_rows=8, n_cols=192, frame_rate_hz=4000.0,
        speed_mm_s=150.0, snr_db=20.0, skin="wet", pressure=0.7, rng=20260104),
}


def sha256(path):
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def write_all(out, *, with_ideal=False, verbose=True):
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    sums = []
    for name, kwargs in SWIPES.items():
        cap = simulate.swipe(**kwargs)
        path = out / f"{name}.npz"
        cap.to_npz(path, ideal_frames=with_ideal, float_dtype="float32")
        sums.append(f"{sha256(path)}  {path.name}")
        if verbose:
            kinds = sorted({e.kind for e in cap.events})
            print(f"{path.name}: {cap.n_frames} frames of {cap.frames.shape[1]} x {cap.frames.shape[2]}, "
                  f"SNR {cap.snr_db:.1f} dB, events {kinds}, {path.stat().st_size / 1e6:.2f} MB")
    if not with_ideal:
        (out / "SHA256SUMS").write_text("\n".join(sums) + "\n")
    return sums


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--check", action="store_true",
                    help="regenerate into a temporary folder and compare with demo_data/SHA256SUMS")
    ap.add_argument("--with-ideal", action="store_true", help="also store the ideal frames (larger files)")
    ap.add_argument("--out", default=str(HERE), help="output folder; default demo_data/")
    args = ap.parse_args(argv)
    if args.check:
        with tempfile.TemporaryDirectory() as tmp:
            fresh = write_all(tmp, verbose=False)
        kept = (HERE / "SHA256SUMS").read_text().split("\n")
        kept = [line for line in kept if line.strip()]
        if fresh == kept:
            print(f"OK: {len(fresh)} demo files regenerate bit for bit")
            return 0
        print("MISMATCH: regenerated files differ from demo_data/SHA256SUMS", file=sys.stderr)
        for a, b in zip(fresh, kept):
            if a != b:
                print(f"  now {a}\n  was {b}", file=sys.stderr)
        return 1
    write_all(args.out, with_ideal=args.with_ideal)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
