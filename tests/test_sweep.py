"""Tests of stripstitch.sweep: grid expansion, resumable runs, local vs Dask, envelopes."""

import json
import os

import numpy as np
import pytest
from scipy import ndimage as ndi

from stripstitch import sweep

PITCH_UM = 50.8


def toy_case(case):
    """Cheap deterministic stand-in for run_case: a swipe 'stays true' while successive frames
    overlap by >= 2 rows (per-frame travel v / f <= (R - 2) p); beyond, the span error grows
    and a false gap is reported on odd seeds. Seeded noise keeps rows distinct."""
    v, f, r = case["speed_mm_s"], case["frame_rate_hz"], case["n_rows"]
    travel_rows = v * 1000.0 / f / PITCH_UM
    rng = np.random.default_rng([int(case["seed"]), int(r), int(f)])
    ok = travel_rows <= r - 2
    span = rng.uniform(-0.5, 0.5) if ok else 5.0 + travel_rows
    row = dict(case)
    row.update(span_error_pct=float(span), gap_false=0 if ok else int(case["seed"]) % 2,
               travel_rows=float(travel_rows), error="")
    return row


CALLS = []


def counting_case(case):
    CALLS.append(case["case_id"])
    return toy_case(case)


def _grid(seeds=(0, 1)):
    return {"n_rows": [4, 8], "frame_rate_hz": [1000.0, 2000.0],
            "speed_mm_s": [50.0, 100.0, 150.0, 200.0, 300.0, 400.0], "seed": list(seeds)}


def test_expand_grid_defaults_and_ids():
    cases = sweep.expand_grid(_grid(), method="truth")
    assert len(cases) == 2 * 2 * 6 * 2 == 48
    assert all(c["method"] == "truth" and c["n_cols"] == sweep.DEFAULT_CASE["n_cols"] for c in cases)
    ids = [c["case_id"] for c in cases]
    assert len(set(ids)) == len(ids)
    assert sweep.case_id(cases[5]) == cases[5]["case_id"]      # stable
    with pytest.raises(ValueError, match=r"unknown sweep parameter\(s\) \['speed'\]"):
        sweep.expand_grid({"speed": [1.0]})
    with pytest.raises(TypeError, match=r"grid\['seed'\] must be a list of values"):
        sweep.expand_grid({"seed": 3})
    with pytest.raises(TypeError, match="grid value of 'n_rows' must be a scalar"):
        sweep.expand_grid({"n_rows": [(8, 16)]})


def test_local_processes_match_serial_and_resume(tmp_path):
    serial = sweep.run_sweep(_grid(), case=toy_case, workers=0)
    pooled = sweep.run_sweep(_grid(), case=toy_case, workers=2, chunk_size=10)
    assert len(serial) == 48
    assert serial.to_dict() == pooled.to_dict()

    out = tmp_path / "sweep.csv"
    CALLS.clear()
    first = sweep.run_sweep(_grid(seeds=(0,)), out, case=counting_case, workers=0)
    assert len(CALLS) == 24 and out.exists()
    assert not os.path.exists(str(out) + ".partial.jsonl")
    CALLS.clear()
    full = sweep.run_sweep(_grid(), out, case=counting_case, workers=0)
    assert len(CALLS) == 24                                   # only the new seed ran
    assert len(full) == 48 and len(sweep.read_table(out)) == 48
    # Rows read back from the CSV equal the rows computed (types restored).
    back = {r["case_id"]: dict(r) for r in sweep.read_table(out).rows}
    for r in serial.rows:
        assert back[r["case_id"]] == dict(r)
    assert first.rows[0]["case_id"] in back
    assert all(isinstance(k, str) and k.startswith("c") for k in back)   # ids stay strings


def test_resume_from_journal_of_interrupted_run(tmp_path):
    out = tmp_path / "sweep.parquet"
    cases = sweep.expand_grid(_grid())
    journal = str(out) + ".partial.jsonl"
    with open(journal, "w") as fh:                            # as left by a killed run
        for c in cases[:10]:
            fh.write(json.dumps(toy_case(c)) + "\n")
        fh.write('{"case_id": "cut-off li')                   # a line cut mid-write
    CALLS.clear()
    table = sweep.run_sweep(_grid(), out, case=counting_case, workers=0)
    assert len(CALLS) == 38 and len(table) == 48
    back = sweep.read_table(out)                              # Parquet through pyarrow
    assert [r["case_id"] for r in back.rows] == [c["case_id"] for c in cases]
    np.testing.assert_allclose(back.column("span_error_pct"), table.column("span_error_pct"))


def test_dask_local_cluster_matches_local_run():
    # Local processes equal the serial run (test above), so comparing with serial suffices.
    distributed = pytest.importorskip("dask.distributed")
    local = sweep.run_sweep(_grid(), case=toy_case, workers=0)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                  dashboard_address=None) as cluster:
        with distributed.Client(cluster) as client:
            via_client = sweep.run_sweep(_grid(), case=toy_case, scheduler=client, chunk_size=7)
            via_address = sweep.run_sweep(_grid(), case=toy_case, scheduler=cluster.scheduler_address)
    assert local.to_dict() == via_client.to_dict() == via_address.to_dict()


def test_progress_bar_only_when_asked(capsys):
    sweep.run_sweep({"seed": [0, 1, 2]}, case=dict, workers=0, progress=True)
    assert "3/3 cases" in capsys.readouterr().err
    sweep.run_sweep({"seed": [0, 1, 2]}, case=dict, workers=0)   # stderr is not a terminal here
    assert capsys.readouterr().err == ""


def test_run_sweep_rejects_bad_arguments(tmp_path):
    with pytest.raises(ValueError, match=r"output must end in .csv or .parquet"):
        sweep.run_sweep({"seed": [0]}, tmp_path / "x.txt", case=dict, workers=0)
    with pytest.raises(TypeError, match="case must be callable"):
        sweep.run_sweep({"seed": [0]}, case=3, workers=0)
    with pytest.raises(TypeError, match="scheduler must be an address string"):
        sweep.run_sweep({"seed": [0]}, case=dict, scheduler=42)


def test_no_gap_frame_rate_worked_values():
    # Source: REFERENCE-VALUES.md "extra checks": 8-row strip at 500 ppi, v = 2 / 10 / 30 cm/s
    # -> >= 49 / 246 / 738 frames/s, double for >= 50 % overlap.
    f = sweep.no_gap_frame_rate_hz(np.array([20.0, 100.0, 300.0]), 8)
    np.testing.assert_allclose(f, [49.2, 246.1, 738.2], atol=0.1)
    f50 = sweep.no_gap_frame_rate_hz(np.array([20.0, 100.0, 300.0]), 8, overlap_rows=4)
    np.testing.assert_allclose(f50, 2 * f)
    # Same source: shift per frame at 2000 frames/s is 0.20 / 0.98 / 2.95 px.
    np.testing.assert_allclose(np.array([20.0, 100.0, 300.0]) * 1000 / 2000 / PITCH_UM,
                               [0.20, 0.98, 2.95], atol=0.01)
    with pytest.raises(ValueError, match="overlap_rows must be smaller than n_rows"):
        sweep.no_gap_frame_rate_hz(100.0, 8, overlap_rows=8)


def test_envelope_matches_analytic_bound_of_toy_model():
    table = sweep.run_sweep(_grid(), case=toy_case, workers=0)
    env = sweep.envelope(table)
    assert env.by == ("n_rows", "frame_rate_hz") and len(env.groups) == 4
    speeds = np.array(_grid()["speed_mm_s"])
    for g, lim in zip(env.groups, env.limit):
        r, f = g
        # toy model passes up to the no-gap bound with 2 rows of overlap:
        # v_max = f (R - 2) p  (sweep.no_gap_frame_rate_hz solved for v)
        vmax = f * (r - 2) * PITCH_UM / 1000.0
        expected = speeds[speeds <= vmax].max() if (speeds <= vmax).any() else np.nan
        np.testing.assert_equal(lim, expected)
        assert sweep.no_gap_frame_rate_hz(lim, r, overlap_rows=2) <= f if np.isfinite(lim) else True
    assert env.pass_fraction.shape == (4, 6)
    json.dumps(env.to_dict())
    mfr = sweep.min_frame_rate(table, speed_mm_s=200.0)
    # 8 rows: 200 mm/s needs f >= 200000 / (6 * 50.8) = 656 -> 1000 Hz is the lowest grid value;
    # 4 rows: needs 1969 -> 2000 Hz.
    assert dict(zip(mfr.groups, mfr.limit)) == {(4,): 2000.0, (8,): 1000.0}


def test_envelope_rejects_bad_input():
    table = sweep.run_sweep({"seed": [0]}, case=dict, workers=0)
    with pytest.raises(TypeError, match="table must be a SweepTable"):
        sweep.envelope([{}])
    with pytest.raises(ValueError, match="column 'span' not in the table"):
        sweep.envelope(table, x="span")
    with pytest.raises(ValueError, match="direction must be one of"):
        sweep.envelope(table, direction="up")


@pytest.mark.parametrize("library", ["skimage", "opencv"])
def test_reference_chains_recover_known_shifts(library):
    # Frames cut from a smooth random master at a known sub-pixel step with scipy.ndimage.shift
    # (skimage's own test recipe for known shifts). Tolerance: the chains' per-pair error on a
    # 24-row strip of this texture, cumulative over 9 pairs.
    rng = np.random.default_rng(3)
    master = ndi.gaussian_filter(rng.normal(size=(160, 96)), 1.5)
    step = np.array([2.5, -0.5])
    frames = np.stack([ndi.shift(master, -step * t, order=3)[40:64, 16:80] for t in range(10)])
    res = sweep.reference_chain(frames, library=library)
    np.testing.assert_allclose(np.median(res.shifts, axis=0), step, atol=0.3)
    assert res.positions.shape == (10, 2) and np.all(res.positions[0] == 0)
    assert res.image is not None and res.image.shape[0] >= 24 + 20


def test_reference_chain_rejects_bad_input():
    with pytest.raises(ValueError, match="library must be one of"):
        sweep.reference_chain(np.zeros((3, 8, 8)), library="numpy")
    with pytest.raises(ValueError, match="normalization must be None or 'phase'"):
        sweep.reference_chain(np.zeros((3, 8, 8)), normalization="amplitude")


def test_run_case_with_simulator_and_truth_stand_in():
    # The truth stand-in scores perfectly; the finger is reused between cases of one finger seed.
    pytest.importorskip("stripstitch.simulate.capture")
    case = dict(method="truth", finger_length_mm=6.0, finger_width_mm=5.0, length_mm=1.0,
                n_cols=48, seed=4, metrics="image")
    row = sweep.run_case(case)
    assert row["error"] == "", row["error"]
    assert row["span_error_pct"] == 0 and row["along_max_px"] == 0
    assert row["ncc"] == pytest.approx(1.0, abs=1e-12)
    assert row["gap_false"] == 0 and row["n_frames"] > 10
    # 1 mm at 100 mm/s and 4 kHz: 40 frame intervals of 100 um/s / 4 kHz = 0.49 px
    assert row["span_true_px"] == pytest.approx(1000.0 / 50.8, rel=0.02)
    again = sweep.run_case(case)
    assert again == row                                         # deterministic by seed
    cap = sweep.simulate_case(dict(case, dielectric_um=4.0))
    assert sum(layer.thickness_um for layer in cap.sensor.layers) == pytest.approx(4.0)
    failed = sweep.run_case(dict(case, method="nonsense"))
    assert failed["error"].startswith("ValueError: method must be one of")


def test_opencv_chain_on_two_row_frames_and_runaway_guard():
    # Two-row strips: the 2-D Hann window would be all zero (cv2.createHanningWindow), so the
    # chain windows across only and still finds the known step (scipy.ndimage.shift frames).
    rng = np.random.default_rng(5)
    master = ndi.gaussian_filter(rng.normal(size=(120, 96)), 1.5)
    frames = np.stack([ndi.shift(master, (-0.4 * t, 0.0), order=3)[40:42, 8:88] for t in range(12)])
    res = sweep.reference_chain(frames, library="opencv")
    assert np.all(np.abs(res.shifts[:, 1]) < 1.0) and np.all(np.abs(res.shifts[:, 0]) < 1.5)
    assert res.image is not None
