"""Tests for stripstitch.compare: known distortions injected into a known image are
recovered (the injected numbers are the outside reference), and the CLI ``compare``."""

import json
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import ndimage

sys.path.insert(0, str(Path(__file__).parent))
from conftest import band_texture  # noqa: E402

from stripstitch.compare import Comparison, compare, plot_distortion  # noqa: E402


@pytest.fixture(scope="module")
def ref():
    # Ridge-like texture, period 9 px (about 460 um at 500 ppi: a typical ridge period,
    # REFERENCE-VALUES.md section 3).
    return band_texture((320, 128), seed=7)


def _warp(img, rows, cols=None):
    """Sample img at (rows[i], cols[i, j]) by cubic spline (scipy.ndimage.map_coordinates);
    rows: (H',) reference row of each output row; cols: (H', W) or None (same columns)."""
    h, w = len(rows), img.shape[1]
    rr = np.repeat(np.asarray(rows, float)[:, None], w, axis=1)
    cc = np.tile(np.arange(w, dtype=float), (h, 1)) if cols is None else cols
    return ndimage.map_coordinates(img, [rr, cc], order=3, mode="grid-wrap")


def test_identity(ref):
    c = compare(ref, ref)
    assert isinstance(c, Comparison)
    assert c.missing_rows == 0 and c.duplicated_rows == 0
    assert abs(c.scale_along_pct) < 0.05 and abs(c.shear) < 1e-3
    assert c.ncc > 0.998 and c.ssim > 0.99
    assert c.distortion_rms_px < 0.05
    np.testing.assert_allclose(c.row_map, np.arange(ref.shape[0]), atol=0.05)


def test_dropped_rows(ref):
    img = np.delete(ref, [100, 101, 102, 200], axis=0)
    c = compare(img, ref)
    assert c.missing_rows == 4 and c.duplicated_rows == 0
    assert c.missing_at == (99, 196)
    # Length: 316 image rows for 320 reference rows: -1.25 %.
    assert c.scale_along_pct == pytest.approx((316 / 320 - 1) * 100, abs=0.1)


def test_duplicated_rows(ref):
    img = np.insert(ref, [80, 150, 150], ref[[79, 149, 149]], axis=0)
    c = compare(img, ref)
    assert c.duplicated_rows == 3 and c.missing_rows == 0
    assert set(c.duplicated_at) == {80, 151, 152}


def test_band_stretched_by_5_percent(ref):
    # Rows 100..200 of the reference shown over 105 image rows (stretched by 5 %).
    i = np.arange(325, dtype=float)
    rows = np.where(i < 100, i, np.where(i < 205, 100 + (i - 100) / 1.05, i - 5))
    c = compare(_warp(ref, rows[rows < 319]), ref)
    band = c.local_scale_pct[125:180]
    outside = np.concatenate([c.local_scale_pct[20:80], c.local_scale_pct[230:290]])
    assert np.nanmedian(band) == pytest.approx(5.0, abs=0.2)       # measured 5.000
    assert np.nanmax(np.abs(outside)) < 0.2                          # measured 0.001
    assert c.missing_rows == 0 and c.duplicated_rows == 0
    assert c.scale_along_pct == pytest.approx(5 / 314 * 100, abs=0.05)   # 5 extra rows
    assert c.ncc > 0.99


@pytest.mark.parametrize("s", [0.02, -0.035])
def test_shear(ref, s):
    h = 300
    cols = np.arange(128)[None, :] + s * np.arange(h)[:, None]
    img = _warp(ref, np.arange(h), cols)
    c = compare(img, ref)
    assert c.shear == pytest.approx(s, abs=0.002)     # measured within 0.0007 (edge wrap)
    assert c.shear_deg == pytest.approx(np.degrees(np.arctan(s)), abs=0.12)
    assert abs(c.scale_along_pct) < 0.2


def test_global_scale(ref):
    rows = np.arange(0, 318, 1 / 1.02)          # 2 % stretched along the swipe
    c = compare(_warp(ref, rows), ref)
    assert c.scale_along_pct == pytest.approx(2.0, abs=0.05)       # measured 1.998


def test_local_distortion_field(ref):
    # A bump: rows near (160, 64) pushed 2 px along the swipe (Gaussian, sigma 20 px).
    h, w = ref.shape
    rr, cc = np.indices((h, w), dtype=float)
    bump = 2.0 * np.exp(-((rr - 160) ** 2 + (cc - 64) ** 2) / (2 * 20.0 ** 2))
    img = ndimage.map_coordinates(ref, [rr + bump, cc], order=3, mode="grid-wrap")
    c = compare(img, ref, block_px=16)
    d = c.displacement_px
    near = np.hypot(c.block_centres_px[:, 0] - 160, c.block_centres_px[:, 1] - 64) < 14
    far = np.hypot(c.block_centres_px[:, 0] - 160, c.block_centres_px[:, 1] - 64) > 70
    # Near the centre the block moved by about the bump (minus the part the row map took).
    assert np.nanmedian(np.abs(d[near, 0])) > 0.5
    assert np.nanmax(np.abs(d[far])) < 0.5
    fig = plot_distortion(c)
    assert fig.axes


def test_to_dict_json_ready(ref):
    c = compare(ref[:200], ref)
    d = c.to_dict()
    json.dumps(d, allow_nan=False)
    assert d["missing_rows"] == 0 and "row_map" not in d
    assert "row_map" in c.to_dict(arrays=True)


@pytest.mark.parametrize("image, reference, exc, match", [
    (np.zeros(10), np.zeros((40, 40)), ValueError, "image must be a 2-D"),
    (np.zeros((40, 40)), np.zeros((8, 40)), ValueError, "reference must be at least 16"),
    (np.full((40, 40), np.nan), np.zeros((40, 40)), ValueError, "no data"),
    ("abc", np.zeros((40, 40)), TypeError, "image must be a 2-D array of numbers"),
])
def test_bad_input(image, reference, exc, match):
    with pytest.raises(exc, match=match):
        compare(image, reference)


def test_unrelated_images_fail_clearly(ref):
    other = band_texture((320, 128), seed=99)
    with pytest.raises(ValueError, match="does not match the reference"):
        compare(other, ref, min_score=0.9)


# ---- command line: stripstitch compare ----

def _cli(argv, capsys):
    from stripstitch.cli import main
    code = main(argv)
    cap = capsys.readouterr()
    return code, cap.out, cap.err


def test_cli_compare_images(ref, tmp_path, capsys):
    img = np.delete(ref, [150, 151], axis=0)
    np.save(tmp_path / "dev.npy", img)
    np.save(tmp_path / "ref.npy", ref)
    rep, plot = tmp_path / "cmp.json", tmp_path / "d.png"
    code, out, err = _cli(["compare", str(tmp_path / "dev.npy"), "--reference",
                           str(tmp_path / "ref.npy"), "--report", str(rep), "--plot", str(plot),
                           "--json"], capsys)
    assert code == 0, err
    doc = json.loads(out)
    assert doc["comparison"]["missing_rows"] == 2
    assert json.loads(rep.read_text())["comparison"]["missing_rows"] == 2
    assert plot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"            # PNG signature
    # Outputs are never replaced without --force (exit 2, one line).
    code, _, err = _cli(["compare", str(tmp_path / "dev.npy"), "--reference",
                         str(tmp_path / "ref.npy"), "--report", str(rep), "-q"], capsys)
    assert code == 2 and "exists already" in err and len(err.strip().splitlines()) == 1


def test_cli_compare_with_frames(tmp_path, capsys):
    # Reference stitched from the frames; the device image drops 3 rows of that reference.
    tex = band_texture((400, 96), seed=3)
    frames = np.stack([tex[2 * t + 8:2 * t + 16, 8:72] for t in range(120)])
    np.save(tmp_path / "swipe.npy", frames)
    from stripstitch import stitch
    img = np.delete(stitch(frames).image, [100, 101, 102], axis=0)
    np.save(tmp_path / "dev.npy", img)
    code, out, err = _cli(["compare", str(tmp_path / "dev.npy"), "--frames",
                           str(tmp_path / "swipe.npy"), "--json", "-q"], capsys)
    assert code == 0, err
    c = json.loads(out)["comparison"]
    assert c["missing_rows"] == 3 and c["duplicated_rows"] == 0
    assert c["ncc"] > 0.99


def test_cli_compare_errors(ref, tmp_path, capsys):
    np.save(tmp_path / "ref.npy", ref)
    np.save(tmp_path / "other.npy", band_texture((320, 128), seed=99))
    code, _, err = _cli(["compare", str(tmp_path / "nope.npy"), "--reference",
                         str(tmp_path / "ref.npy"), "-q"], capsys)
    assert code == 2 and "not found" in err
    code, _, err = _cli(["compare", str(tmp_path / "ref.npy"), "-q"], capsys)
    assert code == 2 and "--reference" in err
    (tmp_path / "x.txt").write_text("x")
    code, _, err = _cli(["compare", str(tmp_path / "x.txt"), "--reference",
                         str(tmp_path / "ref.npy"), "-q"], capsys)
    assert code == 2 and "expected .npy" in err
    code, _, err = _cli(["compare", str(tmp_path / "other.npy"), "--reference",
                         str(tmp_path / "ref.npy"), "-q"], capsys)
    assert code == 1 and "does not match" in err
    code, out, _ = _cli(["compare", "--help"], capsys)
    assert code == 0 and "example:" in out


def test_similarity_ignores_gain_and_offset(ref):
    # NCC (numpy Pearson) and SSIM (scikit-image, on standardised images) do not depend on
    # a linear change of the image's values.
    from skimage.metrics import structural_similarity
    a = compare(ref, ref)
    b = compare(3.0 * ref + 40.0, ref)
    assert b.ncc == pytest.approx(a.ncc, abs=1e-9) and b.ssim == pytest.approx(a.ssim, abs=1e-6)
    # The same figure as scikit-image's SSIM of the standardised pair (identity alignment).
    img = 3.0 * ref + 40.0
    z = (ref - ref.mean()) / ref.std()
    zb = (img - img.mean()) / img.std()
    assert structural_similarity(z, zb, data_range=float(np.ptp(z))) == pytest.approx(b.ssim,
                                                                                         abs=0.01)


def test_compare_frames_stitches_the_reference():
    from stripstitch import stitch
    from stripstitch.compare import compare_frames
    tex = band_texture((400, 96), seed=3)
    frames = np.stack([tex[2 * t + 8:2 * t + 16, 8:72] for t in range(120)])
    img = stitch(frames).image
    img = np.repeat(img, [2 if i == 90 else 1 for i in range(img.shape[0])], axis=0)  # row 90 twice
    c = compare_frames(img, frames)
    assert c.duplicated_rows == 1 and c.duplicated_at == (91,) and c.missing_rows == 0
