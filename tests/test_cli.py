"""Tests of the stripstitch command line, run in-process through main([...])."""

import csv
import json
import subprocess
import sys

import numpy as np
import pytest

from stripstitch import calibrate, cli, io

CONFIG = {"pattern": "right_loop", "n_rows": 8, "n_cols": 96, "finger_size_mm": [12.0, 9.0],
          "drop_frames": [100, 101, 200]}
LAYOUT_A = ["--container-bits", "16", "--value-bits", "12", "--byte-order", "big",
            "--header-bytes", "16", "--flip-along", "--flip-across"]


def run(capsys, *argv):
    code = cli.main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def read_csv(path):
    with open(path, newline="") as fh:          # stdlib csv reader
        rows = list(csv.DictReader(fh))
    return {k: np.array([float(r[k]) for r in rows]) for k in rows[0]}


@pytest.fixture(scope="module")
def sim(tmp_path_factory):
    """One simulated swipe written as (a) 12-bit big-endian samples with a 16-byte frame header
    and a flipped orientation, with its capture, and (b) plain 8-bit samples."""
    d = tmp_path_factory.mktemp("cli")
    (d / "swipe.json5").write_text(json.dumps(CONFIG))   # any suffix but .toml reads as JSON
    code = cli.main(["simulate", "-q", "-o", str(d / "a.bin"), "--truth", str(d / "truth.npz"),
                     "--config", str(d / "swipe.json5"), "--seed", "3"] + LAYOUT_A)
    assert code == 0
    code = cli.main(["simulate", "-q", "-o", str(d / "b.bin"), "--config", str(d / "swipe.json5"),
                     "--seed", "3"])
    assert code == 0
    from stripstitch.simulate import Capture
    return d, Capture.from_npz(d / "truth.npz")


def test_dump_layouts_hold_the_capture(sim):
    d, cap = sim
    a = json.loads((d / "a.json").read_text())
    b = json.loads((d / "b.json").read_text())
    assert a["samples"] == {"container_bits": 16, "value_bits": 12, "byte_order": "big",
                            "alignment": "low"}
    assert a["layout"]["frame_header_bytes"] == 16 and a["orientation"]["flip_along"]
    assert b["samples"]["container_bits"] == 8 and b["layout"]["frame_header_bytes"] == 0
    t, r, c = cap.frames.shape
    assert (d / "a.bin").stat().st_size == t * (16 + 2 * r * c)
    assert (d / "b.bin").stat().st_size == t * r * c
    for name in ("a.bin", "b.bin"):
        np.testing.assert_array_equal(io.read_frames(d / name).frames, cap.frames)


def test_inspect_reports_geometry_drops_and_finger(sim, capsys):
    d, cap = sim
    code, out, err = run(capsys, "inspect", d / "a.bin", "--json")
    assert code == 0
    info = json.loads(out)
    t, r, c = cap.frames.shape
    assert (info["n_frames"], info["rows"], info["columns"]) == (t, r, c)
    assert info["pitch_um"] == 50.8 and info["frame_rate_hz"] == 4000.0
    # Dropped frames from the truth's own timestamps: a step of k frame intervals = k-1 lost.
    steps = np.rint(np.diff(cap.times_s) * cap.frame_rate_hz).astype(int)
    truth_gaps = [{"after_frame": int(i), "missing": int(steps[i] - 1)} for i in np.flatnonzero(steps > 1)]
    assert info["dropped"]["gaps"] == truth_gaps
    assert info["dropped"]["n_dropped"] == 3
    # Finger span against the simulator's per-frame contact fraction.
    contact = np.flatnonzero(cap.contact >= 0.1)
    assert abs(info["finger"]["first_frame"] - contact[0]) <= 6
    assert abs(info["finger"]["last_frame"] - contact[-1]) <= 6
    assert info["noise_codes"] > 0 and info["contrast_to_noise_db"] > 10
    assert err.count("biometric personal data") == 1
    code, out, _ = run(capsys, "inspect", d / "b.bin")
    assert code == 0 and "3 frame(s): 2 after frame 99, 1 after frame 197" in out


def test_shell_path_matches_in_memory_path(sim, capsys):
    d, cap = sim
    from stripstitch.pipeline import stitch
    # In memory: calibrate from the swipe's own blank frames, stitch with the true times.
    cal = calibrate.calibrate_from_frames(cap.frames)
    ref = stitch(cap.frames, pitch_um=cap.pitch_um, frame_rate_hz=cap.frame_rate_hz,
                 timestamps_s=cap.times_s, calibration=cal)
    for name in ("a", "b"):
        assert run(capsys, "calibrate", "-q", d / f"{name}.bin", "-o", d / f"{name}.cal.npz")[0] == 0
        back = calibrate.Calibration.load(d / f"{name}.cal.npz")
        np.testing.assert_array_equal(back.offset, cal.offset)
        np.testing.assert_array_equal(back.bad, cal.bad)
        code, out, err = run(capsys, "stitch", d / f"{name}.bin", "--calibration", d / f"{name}.cal.npz",
                             "-o", d / f"{name}.tiff", "--trajectory", d / f"{name}.csv",
                             "--report", d / f"{name}.report.json")
        assert code == (0 if ref.report.usable else 1), err
        traj = read_csv(d / f"{name}.csv")
        # Layout b keeps the times as JSON floats in the manifest (exact round trip), so its
        # trajectory is the in-memory one to rounding. Layout a stores them as integer
        # nanoseconds in the frame header (<= 0.5 ns off in a 250 us frame interval, 2e-6
        # relative), which moves the motion prior by micro-pixels, and the model refinement's
        # single-precision smoothing carries that to a few 1e-4 px (measured on an 8x192
        # swipe with times moved by up to 0.5 ns: 3.9e-4 px, 8e-6 with double-precision
        # smoothing; the per-frame noise floor is ~1e-2 px): 1e-3 px tolerance.
        atol = 1e-9 if name == "b" else 1e-3
        np.testing.assert_allclose(traj["along_px"], ref.positions[:, 0], atol=atol)
        np.testing.assert_allclose(traj["across_px"], ref.positions[:, 1], atol=atol)
        np.testing.assert_allclose(traj["angle_deg"], ref.angles, atol=atol)
        np.testing.assert_allclose(traj["time_s"], cap.times_s, atol=1e-9)
        report = json.loads((d / f"{name}.report.json").read_text())
        assert report["report"]["verdict"] == ref.report.verdict
        assert report["dropped_frames"][0] == {"after_frame": 99, "missing": 2}
    import tifffile
    with tifffile.TiffFile(d / "a.tiff") as tf:
        page = tf.pages[0]
        x = page.tags["XResolution"].value
        assert page.shape == ref.image.shape
    # 50.8 um pitch = 196.85 pixels per centimetre (TIFF 6.0 ResolutionUnit 3 = cm)
    assert x[0] / x[1] == pytest.approx(1e4 / 50.8, rel=1e-6)


def test_stitch_plain_npy_writes_tiff_at_true_pitch(sim, capsys, tmp_path):
    _, cap = sim
    np.save(tmp_path / "swipe.npy", cap.frames)
    code, out, err = run(capsys, "stitch", tmp_path / "swipe.npy", "-o", tmp_path / "swipe.tiff",
                         "--frame-rate-hz", "4000")
    assert code in (0, 1) and (tmp_path / "swipe.tiff").exists(), err
    from PIL import Image
    with Image.open(tmp_path / "swipe.tiff") as im:
        # 50.8 um = 500 ppi (25.4 mm / 500, REFERENCE-VALUES.md section 3)
        assert im.info["dpi"] == pytest.approx((500.0, 500.0), rel=1e-6)
    # the output exists now: refused without --force, the file left alone
    before = (tmp_path / "swipe.tiff").read_bytes()
    code, _, err = run(capsys, "stitch", tmp_path / "swipe.npy", "-o", tmp_path / "swipe.tiff")
    assert code == 2 and "exists already; pass --force" in err
    assert (tmp_path / "swipe.tiff").read_bytes() == before


def test_evaluate_trajectory_csv_against_numpy(sim, capsys, tmp_path):
    d, cap = sim
    rng = np.random.default_rng(5)
    pos = cap.positions * 1.01 + rng.normal(0, 0.2, cap.positions.shape)   # a known 1 % stretch
    io.write_csv(tmp_path / "t.csv", {"frame": np.arange(len(pos)), "along_px": pos[:, 0],
                                      "across_px": pos[:, 1], "angle_deg": cap.angles})
    code, out, _ = run(capsys, "evaluate", d / "truth.npz", "--trajectory", tmp_path / "t.csv",
                       "--json")
    assert code == 0
    m = json.loads(out)["metrics"]
    ok = cap.contact >= 0.5
    ref = np.flatnonzero(ok)[0]
    err = (pos - pos[ref]) - (cap.positions - cap.positions[ref])
    assert m["along_rms_px"] == pytest.approx(np.sqrt(np.mean(err[ok, 0] ** 2)), rel=1e-9)
    assert m["n_scored"] == int(ok.sum())


def test_no_finger_is_said_clearly(capsys, tmp_path):
    from stripstitch.simulate import Sensor
    sensor = Sensor(n_rows=8, n_cols=64)
    blanks = sensor.realize(rng=1).readout(np.zeros((60, 8, 64)), rng=2).codes
    io.write_dump(tmp_path / "blank.bin", blanks, frame_rate_hz=4000.0)
    code, out, _ = run(capsys, "inspect", tmp_path / "blank.bin")
    assert code == 0 and "finger       NONE: no frame shows a finger" in out
    code, _, err = run(capsys, "stitch", tmp_path / "blank.bin", "-o", tmp_path / "blank.png")
    assert code == 1 and "Traceback" not in err
    assert run(capsys, "calibrate", tmp_path / "blank.bin", "-o", tmp_path / "c.npz")[0] == 0


@pytest.mark.parametrize("command", ["inspect", "calibrate", "stitch", "simulate", "evaluate", "demo"])
def test_help_has_worked_example_and_exit_codes(capsys, command):
    code, out, _ = run(capsys, command, "--help")
    assert code == 0
    assert f"example:\n  stripstitch {command}" in out
    assert "exit codes:" in out and "2  usage error or bad input" in out


def test_bad_input_is_one_clean_line(capsys, tmp_path):
    (tmp_path / "m.bin").write_bytes(b"\0" * 10)
    (tmp_path / "m.json").write_text(json.dumps({"format": io.MANIFEST_FORMAT, "version": 9}))
    cases = [
        (["inspect", tmp_path / "missing.npy"], r"input '.*missing.npy' does not exist"),
        (["inspect", tmp_path / "m.bin"], r"manifest field 'version' is 9"),
        (["stitch", tmp_path / "m.bin", "-o", tmp_path / "x.jpg"], r"must end in .tif, .tiff or .png"),
        (["inspect", "x.npy", "--pitch-um", "-1"], r"--pitch-um must be a finite number > 0; got '-1'"),
        (["simulate", "-o", tmp_path / "s.json"], r"the manifest .json is written beside a dump"),
        (["stitch"], r"the following arguments are required"),
        (["frobnicate"], r"invalid choice: 'frobnicate'"),
    ]
    for argv, pattern in cases:
        code, out, err = run(capsys, *argv)
        assert code == 2, (argv, err)
        lines = [ln for ln in err.splitlines() if "biometric" not in ln]
        assert len(lines) == 1 and "Traceback" not in err, err
        import re
        assert re.search(pattern, lines[0]), (pattern, lines[0])
    # an output named like the dump's manifest is refused even with --force
    np.save(tmp_path / "d.npy", np.zeros((3, 4, 5), np.uint8))
    io.write_dump(tmp_path / "d.bin", np.zeros((3, 4, 5), np.uint8), frame_rate_hz=100.0)
    code, _, err = run(capsys, "stitch", tmp_path / "d.bin", "-o", tmp_path / "d.png", "--report",
                       tmp_path / "d.json", "--force")
    assert code == 2 and "would replace an input file" in err
    assert json.loads((tmp_path / "d.json").read_text())["format"] == io.MANIFEST_FORMAT
    (tmp_path / "cfg.toml").write_text('pattern = "whorl"\nwarp_factor = 9\n')
    code, _, err = run(capsys, "simulate", "-o", tmp_path / "s.npz", "--config", tmp_path / "cfg.toml")
    assert code == 2 and "unknown option(s) ['warp_factor']" in err


def test_quiet_and_caution(capsys, tmp_path):
    np.save(tmp_path / "f.npy", np.random.default_rng(0).integers(0, 255, (5, 4, 16)))
    code, out, err = run(capsys, "inspect", "-q", tmp_path / "f.npy")
    assert code == 0 and out == "" and err == ""
    code, out, err = run(capsys, "inspect", tmp_path / "f.npy")
    assert err.count("biometric personal data") == 1 and "nothing is sent" in err.lower()


def test_demo_on_a_folder(sim, capsys, tmp_path):
    d, _ = sim
    data = tmp_path / "data"
    data.mkdir()
    (data / "one.npz").write_bytes((d / "truth.npz").read_bytes())
    code, out, err = run(capsys, "demo", "--data", data, "-o", tmp_path / "out")
    assert code == 0, err
    for suffix in (".png", ".tiff", ".report.json", ".trajectory.csv"):
        assert (tmp_path / "out" / f"one{suffix}").exists()
    assert "one" in out and "verdict" in out
    code, _, err = run(capsys, "demo", "--data", data, "-o", tmp_path / "out")
    assert code == 2 and "--force" in err
    assert run(capsys, "demo", "-q", "--data", data, "-o", tmp_path / "out", "--force")[0] == 0


def test_python_dash_m_entry_point():
    proc = subprocess.run([sys.executable, "-m", "stripstitch", "--version"], capture_output=True,
                          text=True, timeout=120)
    assert proc.returncode == 0 and proc.stdout.startswith("stripstitch ")


def test_stitch_trim_keeps_input_frame_numbers(sim, capsys, tmp_path):
    d, cap = sim
    code, _, err = run(capsys, "stitch", d / "b.bin", "--trim", "-o", tmp_path / "t.png",
                       "--trajectory", tmp_path / "t.csv", "--report", tmp_path / "t.json")
    assert code in (0, 1), err
    presence = calibrate.finger_presence(cap.frames)
    traj = read_csv(tmp_path / "t.csv")
    assert traj["frame"][0] == presence.first and traj["frame"][-1] == presence.last
    np.testing.assert_allclose(traj["time_s"], cap.times_s[presence.first:presence.last + 1])
    assert traj["along_px"][0] == 0.0
    assert json.loads((tmp_path / "t.json").read_text())["first_frame"] == presence.first


def test_bundled_demo_data_is_found():
    folder = cli.find_demo_data()
    assert folder is not None and folder.name == "demo_data"
    assert len(sorted(folder.glob("*.npz"))) >= 3


def test_simulate_from_toml_config(capsys, tmp_path):
    # TOML parsed by the standard library's tomllib; flags override the file.
    (tmp_path / "s.toml").write_text('[swipe]\npattern = "arch"\nn_rows = 8\nn_cols = 48\n'
                                     'finger_size_mm = [10.0, 8.0]\nspeed_mm_s = 80.0\n')
    code, out, err = run(capsys, "simulate", "-o", tmp_path / "s.npz", "--config",
                         tmp_path / "s.toml", "--cols", "40", "--seed", "2", "--json")
    assert code == 0, err
    doc = json.loads(out)
    assert (doc["rows"], doc["columns"]) == (8, 40)
    assert doc["options"]["pattern"] == "arch" and doc["options"]["speed_mm_s"] == 80.0
    assert io.read_frames(tmp_path / "s.npz").kind == "capture"
