"""Tests of stripstitch.io: dump manifest, dump reader/writer, npy/npz, images, reports."""

import itertools
import json
import struct

import numpy as np
import pytest

from stripstitch import io


def _frames(t=5, r=4, c=6, bits=8, seed=0):
    rng = np.random.default_rng(seed)
    dtype = np.uint8 if bits <= 8 else np.uint16
    return rng.integers(0, 1 << bits, size=(t, r, c)).astype(dtype)


# --- dumps: byte-level decoding checked against Python's struct module -------------------

def test_dump_bytes_match_struct_big_endian_12bit(tmp_path):
    # Independent decoder: the standard library's struct module (">H" = big-endian uint16,
    # ">I" = big-endian uint32, ">Q" = uint64), reading the file by hand.
    frames = _frames(t=3, r=2, c=3, bits=12)
    times = np.array([0.0, 0.5e-3, 1.5e-3])          # frame 2 missing
    io.write_dump(tmp_path / "d.bin", frames, frame_rate_hz=2000.0, timestamps_s=times,
                  container_bits=16, value_bits=12, byte_order="big", frame_header_bytes=16)
    raw = (tmp_path / "d.bin").read_bytes()
    assert len(raw) == 3 * (16 + 2 * 3 * 2)
    for t in range(3):
        base = t * 28
        counter, = struct.unpack(">I", raw[base:base + 4])
        stamp, = struct.unpack(">Q", raw[base + 4:base + 12])
        values = struct.unpack(">6H", raw[base + 16:base + 28])
        assert counter == [0, 1, 3][t]
        assert stamp == round(times[t] * 1e9)
        assert list(values) == frames[t].ravel().tolist()     # row-major
    stack = io.read_dump(tmp_path / "d.json")
    np.testing.assert_array_equal(stack.frames, frames)
    np.testing.assert_allclose(stack.timestamps_s, times, atol=1e-12)
    assert stack.counters.tolist() == [0, 1, 3]
    assert stack.dropped_table() == [{"after_frame": 1, "missing": 1}]
    assert stack.n_dropped == 1


def test_column_major_and_high_alignment_bytes(tmp_path):
    # Column-major: the samples of one column are adjacent (Fortran order, numpy docs of
    # ndarray.flatten(order="F")); high alignment: value << (16 - 10), little-endian "<H".
    frames = _frames(t=2, r=2, c=3, bits=10, seed=1)
    io.write_dump(tmp_path / "d.raw", frames, frame_rate_hz=1000.0, container_bits=16,
                  value_bits=10, alignment="high", order="column_major")
    raw = (tmp_path / "d.raw").read_bytes()
    first = struct.unpack("<6H", raw[:12])
    assert list(first) == [v << 6 for v in frames[0].flatten(order="F").tolist()]
    np.testing.assert_array_equal(io.read_frames(tmp_path / "d.raw").frames, frames)


LAYOUTS = list(itertools.product(
    [(8, 8), (16, 16), (16, 12), (16, 10)],       # (container_bits, value_bits)
    ["little", "big"], ["low", "high"], ["row_major", "column_major"],
    [(False, False, False), (True, True, False), (False, False, True), (True, True, True)],
    [0, 16]))


@pytest.mark.parametrize("bits, order_b, align, order, orient, header", LAYOUTS[::3])
def test_dump_roundtrip_all_layouts(tmp_path, bits, order_b, align, order, orient, header):
    container, value = bits
    frames = _frames(t=4, r=3, c=5, bits=value, seed=container + value)
    tr, fa, fc = orient
    io.write_dump(tmp_path / "x.bin", frames, frame_rate_hz=500.0, container_bits=container,
                  value_bits=value, byte_order=order_b, alignment=align, order=order,
                  transpose=tr, flip_along=fa, flip_across=fc, frame_header_bytes=header,
                  data_offset_bytes=7, frame_trailer_bytes=3,
                  timestamps_s=np.arange(4) / 500.0 + 1.0)
    stack = io.read_frames(tmp_path / "x.bin")
    np.testing.assert_array_equal(stack.frames, frames)
    assert stack.frames.dtype == (np.uint8 if value <= 8 else np.uint16)
    assert stack.frame_rate_hz == 500.0 and stack.pitch_um == 50.8
    np.testing.assert_allclose(stack.timestamps_s, np.arange(4) / 500.0 + 1.0, atol=1e-9)
    assert stack.n_dropped == 0


def test_orientation_semantics(tmp_path):
    # A stored frame S becomes S.T, then reversed along axis 0 (numpy.flip docs).
    stored = np.arange(2 * 3 * 4, dtype=np.uint8).reshape(2, 3, 4)     # stored (columns, rows)
    (tmp_path / "s.bin").write_bytes(stored.tobytes())
    man = {"format": io.MANIFEST_FORMAT, "version": 1, "data_file": "s.bin",
           "geometry": {"rows": 4, "columns": 3},
           "orientation": {"transpose": True, "flip_along": True},
           "timing": {"frame_rate_hz": 100.0}}
    (tmp_path / "s.json").write_text(json.dumps(man))
    stack = io.read_frames(tmp_path / "s.json")
    np.testing.assert_array_equal(stack.frames, np.flip(stored.transpose(0, 2, 1), axis=1))
    assert stack.frames.shape == (2, 4, 3)


def test_dropped_frames_from_timestamps_only(tmp_path):
    frames = _frames(t=6)
    times = np.array([0, 1, 2, 5, 6, 7]) / 1000.0                 # 2 frames lost after frame 2
    io.write_dump(tmp_path / "t.bin", frames, timestamps_s=times)  # no header: times in manifest
    stack = io.read_frames(tmp_path / "t.bin")
    assert stack.counters is None
    assert stack.dropped_table() == [{"after_frame": 2, "missing": 2}]
    assert stack.frame_rate_hz == pytest.approx(1000.0)          # median step


def test_counter_wraps_modulo_2_32(tmp_path):
    frames = _frames(t=4)
    cnt = np.array([2**32 - 2, 2**32 - 1, 0, 2])                # wraps, then one frame lost
    io.write_dump(tmp_path / "w.bin", frames, frame_rate_hz=1000.0, counters=cnt,
                  frame_header_bytes=4)
    stack = io.read_frames(tmp_path / "w.bin")
    assert stack.counters.tolist() == [2**32 - 2, 2**32 - 1, 2**32, 2**32 + 2]
    assert stack.dropped_table() == [{"after_frame": 2, "missing": 1}]
    np.testing.assert_allclose(stack.timestamps_s, np.array([0, 1, 2, 4]) / 1000.0)


# --- dumps: errors ------------------------------------------------------------------------

def _write(tmp_path, man, data=b"\0" * 48):
    (tmp_path / "m.bin").write_bytes(data)
    base = {"format": io.MANIFEST_FORMAT, "version": 1, "data_file": "m.bin",
            "geometry": {"rows": 2, "columns": 3}, "timing": {"frame_rate_hz": 100.0}}
    for k, v in man.items():
        if v is None:
            base.pop(k, None)
        else:
            base[k] = v
    (tmp_path / "m.json").write_text(json.dumps(base))
    return tmp_path / "m.json"


@pytest.mark.parametrize("man, match", [
    ({"version": 2}, r"'version' is 2, which this reader does not understand"),
    ({"version": None}, r"'version' is missing"),
    ({"format": "other"}, r"'format' must be"),
    ({"geometry": {"rows": 1, "columns": 3}}, r"'geometry.rows' must be an integer in \[2,"),
    ({"geometry": {"columns": 3}}, r"'geometry.rows' is missing"),
    ({"geometry": {"rows": 2.5, "columns": 3}}, r"'geometry.rows' must be an integer"),
    ({"geometry": {"rows": 2, "columns": 3, "pitch_um": -1}}, r"'geometry.pitch_um' must be a finite number > 0"),
    ({"samples": {"container_bits": 12}}, r"'samples.container_bits' must be 8 or 16; got 12"),
    ({"samples": {"container_bits": 8, "value_bits": 12}}, r"exceeds 'samples.container_bits'.*contradictory"),
    ({"samples": {"byte_order": "middle"}}, r"'samples.byte_order' must be one of \['little', 'big'\]"),
    ({"layout": {"order": "zigzag"}}, r"'layout.order' must be one of"),
    ({"orientation": {"transpose": "yes"}}, r"'orientation.transpose' must be true or false"),
    ({"colour": 1}, r"unknown field\(s\) \['colour'\]"),
    ({"geometry": {"rows": 2, "columns": 3, "ppi": 500}}, r"group 'geometry' has unknown field\(s\) \['ppi'\]"),
    ({"timing": {}}, r"gives no timing"),
    ({"timing": {"frame_rate_hz": 0}}, r"'timing.frame_rate_hz' must be a finite number > 0"),
    ({"timing": {"timestamps_s": [0, 1, 1]}}, r"'timing.timestamps_s' must increase"),
    ({"timing": {"timestamps_s": [0, 1]}, "n_frames": 3}, r"lists 2 times but 'n_frames' is 3"),
    ({"layout": {"frame_header_bytes": 4}, "header_fields": {"timestamp": {"offset_bytes": 0, "type": "uint64"}}},
     r"does not fit inside the 4-byte frame header"),
    ({"layout": {"frame_header_bytes": 8}, "header_fields": {"counter": {"offset_bytes": 0},
                                                              "timestamp": {"offset_bytes": 2, "type": "uint32"}}},
     r"overlap"),
    ({"layout": {"frame_header_bytes": 8}, "header_fields": {"counter": {"offset_bytes": 0, "type": "float32"}}},
     r"integer type for a frame counter"),
    ({"layout": {"frame_header_bytes": 8}, "timing": {"timestamps_s": [0, 1]},
      "header_fields": {"timestamp": {"offset_bytes": 0}}}, r"both 'timing.timestamps_s' and 'header_fields.timestamp'"),
])
def test_manifest_errors(tmp_path, man, match):
    path = _write(tmp_path, man)
    with pytest.raises(io.ManifestError, match=match):
        io.read_frames(path)


def test_manifest_not_json(tmp_path):
    (tmp_path / "m.json").write_bytes(b"{rows: 2")
    with pytest.raises(io.ManifestError, match=r"is not valid UTF-8 JSON"):
        io.read_manifest(tmp_path / "m.json")
    (tmp_path / "m.json").write_text("[1, 2]")
    with pytest.raises(io.ManifestError, match=r"must be a JSON object"):
        io.read_manifest(tmp_path / "m.json")


def test_truncated_and_mismatched_dumps(tmp_path):
    path = _write(tmp_path, {}, b"\0" * 47)        # 2x3 uint8 frames: 6 bytes each
    with pytest.raises(io.FormatError, match=r"not a whole number of 6-byte frames \(7 full frame\(s\) \+ 5 byte"):
        io.read_frames(path)
    path = _write(tmp_path, {"n_frames": 9}, b"\0" * 48)
    with pytest.raises(io.FormatError, match=r"holds 8 frame\(s\) of 6 bytes but manifest field 'n_frames' says 9"):
        io.read_frames(path)
    path = _write(tmp_path, {}, b"\0" * 6)
    with pytest.raises(io.FormatError, match=r"holds 1 frame\(s\); at least 2 are needed"):
        io.read_frames(path)
    path = _write(tmp_path, {"timing": {"timestamps_s": [0.0, 1.0]}}, b"\0" * 18)
    with pytest.raises(io.FormatError, match=r"holds 3 frame\(s\) but manifest field 'timing.timestamps_s' lists 2"):
        io.read_frames(path)
    path = _write(tmp_path, {"layout": {"data_offset_bytes": 100}}, b"\0" * 48)
    with pytest.raises(io.FormatError, match=r"fewer than the 100-byte file header"):
        io.read_frames(path)


def test_values_beyond_value_bits(tmp_path):
    data = np.full(12, 0x0FFF, ">u2").tobytes()                   # 12-bit ones, big-endian
    path = _write(tmp_path, {"samples": {"container_bits": 16, "value_bits": 12, "byte_order": "little"}}, data)
    with pytest.raises(io.FormatError, match=r"exceed the 12-bit range of manifest field 'samples.value_bits'"):
        io.read_frames(path)


def test_counter_not_increasing(tmp_path):
    frames = _frames(t=3)
    io.write_dump(tmp_path / "c.bin", frames, frame_rate_hz=100.0, counters=[5, 5, 6],
                  frame_header_bytes=4)
    with pytest.raises(io.FormatError, match=r"frame counter does not increase at frame 1"):
        io.read_frames(tmp_path / "c.bin")


def test_missing_manifest_and_input(tmp_path):
    (tmp_path / "lonely.bin").write_bytes(b"\0" * 12)
    with pytest.raises(FileNotFoundError, match=r"no manifest found for dump"):
        io.read_frames(tmp_path / "lonely.bin")
    with pytest.raises(FileNotFoundError, match=r"does not exist"):
        io.read_frames(tmp_path / "nothing.npy")


def test_write_dump_rejects_bad_input(tmp_path):
    with pytest.raises(ValueError, match=r"beyond value_bits=8"):
        io.write_dump(tmp_path / "a.bin", np.full((2, 2, 2), 300), frame_rate_hz=1.0,
                      container_bits=8)
    with pytest.raises(ValueError, match=r"codes >= 0"):
        io.write_dump(tmp_path / "a.bin", np.full((2, 2, 2), -1), frame_rate_hz=1.0)
    with pytest.raises(ValueError, match=r"timestamps_s must have shape \(2,\)"):
        io.write_dump(tmp_path / "a.bin", np.zeros((2, 2, 2), np.uint8), timestamps_s=[0.0])
    with pytest.raises(ValueError, match=r"frames must have shape \(n_frames, n_rows, n_cols\)"):
        io.write_dump(tmp_path / "a.bin", np.zeros((2, 2), np.uint8), frame_rate_hz=1.0)
    with pytest.raises(io.ManifestError, match=r"gives no timing"):
        io.write_dump(tmp_path / "a.bin", np.zeros((2, 2, 2), np.uint8))
    io.write_dump(tmp_path / "a.bin", np.zeros((2, 2, 2), np.uint8), frame_rate_hz=1.0)
    with pytest.raises(io.OutputExistsError, match=r"exists already; pass overwrite=True"):
        io.write_dump(tmp_path / "a.bin", np.zeros((2, 2, 2), np.uint8), frame_rate_hz=1.0)


def test_manifest_roundtrip_dict():
    man = io.DumpManifest(rows=8, columns=192, container_bits=16, value_bits=12,
                          byte_order="big", frame_header_bytes=16,
                          counter=io.HeaderField(0, "uint32", "big"),
                          timestamp=io.HeaderField(4, "uint64", "big", 1e-6),
                          frame_rate_hz=4000.0, flip_across=True, notes={"board": "rev B"})
    again = io.DumpManifest.from_dict(json.loads(json.dumps(man.to_dict())))
    assert again == man
    with pytest.raises(io.ManifestError, match=r"'geometry.rows' must be an integer"):
        io.DumpManifest(rows=1, columns=5, frame_rate_hz=1.0)


# --- npy / npz ----------------------------------------------------------------------------

def test_npy_npz_roundtrip_and_no_pickle(tmp_path):
    frames = _frames(t=3, bits=16)
    io.write_npy(tmp_path / "f.npy", frames)
    s = io.read_frames(tmp_path / "f.npy")
    np.testing.assert_array_equal(s.frames, frames)
    assert s.kind == "npy" and s.pitch_um is None and s.frames.dtype == np.uint16
    io.write_npz(tmp_path / "f.npz", frames, pitch_um=25.4, frame_rate_hz=8000.0,
                 timestamps_s=[0, 1e-3, 3e-3])
    s = io.read_frames(tmp_path / "f.npz")
    assert (s.pitch_um, s.frame_rate_hz, s.kind) == (25.4, 8000.0, "npz")
    # 8 kHz: steps of 1 ms and 2 ms are 8 and 16 frame intervals -> 7 and 15 frames missing.
    assert s.dropped_table() == [{"after_frame": 0, "missing": 7}, {"after_frame": 1, "missing": 15}]
    # Object arrays need pickle: numpy refuses them with allow_pickle=False (numpy.load docs).
    np.save(tmp_path / "obj.npy", np.array([{"a": 1}], dtype=object), allow_pickle=True)
    with pytest.raises(io.FormatError, match=r"pickled object arrays are refused"):
        io.read_frames(tmp_path / "obj.npy")


@pytest.mark.parametrize("arr, match", [
    (np.zeros((4, 5)), r"must have shape \(n_frames, n_rows, n_cols\)"),
    (np.zeros((1, 4, 5)), r"at least 2 frames"),
    (np.zeros((3, 1, 5)), r"at least 2 rows"),
    (np.full((3, 4, 5), np.nan), r"contains 60 NaN or inf"),
    (np.zeros((3, 4, 5), dtype=bool), r"must be real numeric"),
])
def test_bad_frame_stacks(tmp_path, arr, match):
    np.save(tmp_path / "b.npy", arr)
    with pytest.raises(io.FormatError, match=match):
        io.read_frames(tmp_path / "b.npy")


def test_npz_without_frames_and_garbage(tmp_path):
    np.savez(tmp_path / "k.npz", other=np.zeros(3))
    with pytest.raises(io.FormatError, match=r"has no 'frames' array \(keys: \['other'\]\)"):
        io.read_frames(tmp_path / "k.npz")
    (tmp_path / "g.npz").write_bytes(b"not a zip file at all")
    with pytest.raises(io.FormatError, match=r"is not a readable .npz archive"):
        io.read_frames(tmp_path / "g.npz")


# --- images -------------------------------------------------------------------------------

def test_scale_to_uint_percentiles_against_numpy():
    rng = np.random.default_rng(3)
    img = rng.normal(size=(50, 40))
    img[:5] = np.nan
    codes, s = io.scale_to_uint(img, bits=8, percentiles=(1, 99))
    # Limits are numpy.percentile of the finite values (linear interpolation, numpy docs).
    lo, hi = np.percentile(img[5:], [1, 99])
    assert s["low"] == pytest.approx(lo) and s["high"] == pytest.approx(hi)
    assert (codes[:5] == 0).all() and codes[5:].min() == 1 and codes[5:].max() == 255
    expected = np.clip(np.rint(1 + (img[5:] - lo) / (hi - lo) * 254), 1, 255)
    np.testing.assert_array_equal(codes[5:], expected)
    with pytest.raises(ValueError, match=r"percentiles must be \(low, high\)"):
        io.scale_to_uint(img, percentiles=(50, 10))
    with pytest.raises(ValueError, match=r"bits must be 8 or 16; got 12"):
        io.scale_to_uint(img, bits=12)


@pytest.mark.parametrize("suffix, bits", [(".png", 8), (".png", 16), (".tiff", 8), (".tif", 16)])
def test_images_read_back_by_other_libraries(tmp_path, suffix, bits):
    PIL_Image = pytest.importorskip("PIL.Image")
    import cv2
    rng = np.random.default_rng(4)
    img = rng.normal(size=(33, 21))
    img[0, :3] = np.nan
    path = tmp_path / f"im{suffix}"
    meta = io.write_image(path, img, pitch_um=50.8, bits=bits)
    expected, _ = io.scale_to_uint(img, bits=bits)
    # OpenCV decodes PNG/TIFF independently of our writer.
    back = cv2.imread(str(path), cv2.IMREAD_UNCHANGED)
    assert back.dtype == (np.uint8 if bits == 8 else np.uint16)
    np.testing.assert_array_equal(back, expected)
    # Pillow reports the physical pixel size as dots per inch: 50.8 um -> 500 ppi
    # (25.4 mm / 500 = 50.8 um, REFERENCE-VALUES.md section 3). PNG stores whole pixels per
    # metre (19685 px/m = 499.999 ppi), hence the tolerance.
    with PIL_Image.open(path) as im:
        dpi = im.info["dpi"]
    assert dpi == pytest.approx((500.0, 500.0), abs=0.03)
    assert meta["scaling"]["bits"] == bits


def test_tiff_tags_anisotropic_and_inch(tmp_path):
    import tifffile
    img = np.linspace(0, 1, 60).reshape(6, 10)
    io.write_image(tmp_path / "a.tif", img, pitch_um=(25.4, 50.8), resolution_unit="inch")
    with tifffile.TiffFile(tmp_path / "a.tif") as tf:
        page = tf.pages[0]
        x = page.tags["XResolution"].value
        y = page.tags["YResolution"].value
        unit = page.tags["ResolutionUnit"].value
        desc = json.loads(page.description)
    # TIFF 6.0: XResolution = pixels per unit in the ImageWidth direction (axis 1 = across).
    assert x[0] / x[1] == pytest.approx(500.0) and y[0] / y[1] == pytest.approx(1000.0)
    assert int(unit) == 2                                      # 2 = inch (TIFF 6.0 tag 296)
    assert desc["pitch_um"] == [25.4, 50.8] and desc["scaling"]["method"] == "percentile"
    io.write_image(tmp_path / "c.tif", img, pitch_um=50.8)
    with tifffile.TiffFile(tmp_path / "c.tif") as tf:
        x = tf.pages[0].tags["XResolution"].value
        assert int(tf.pages[0].tags["ResolutionUnit"].value) == 3   # 3 = centimetre
    assert x[0] / x[1] == pytest.approx(1e4 / 50.8)                 # 196.85 px/cm


def test_png_phys_chunk_bytes(tmp_path):
    # PNG specification (ISO/IEC 15948), pHYs: 4-byte px per unit X, 4-byte Y, 1-byte unit
    # (1 = metre); 50.8 um -> 19685 px/m, 25.4 um -> 39370 px/m.
    io.write_image(tmp_path / "p.png", np.ones((3, 4)), pitch_um=(25.4, 50.8))
    data = (tmp_path / "p.png").read_bytes()
    i = data.index(b"pHYs")
    assert struct.unpack(">IIB", data[i + 4:i + 13]) == (19685, 39370, 1)
    assert data.index(b"pHYs") < data.index(b"IDAT")
    assert b"stripstitch\0" in data


def test_image_errors_and_atomicity(tmp_path):
    with pytest.raises(ValueError, match=r"path must end in .tif, .tiff or .png"):
        io.write_image(tmp_path / "a.jpg", np.ones((2, 2)))
    with pytest.raises(ValueError, match=r"image must have shape \(H, W\)"):
        io.write_image(tmp_path / "a.png", np.ones((2, 2, 2)))
    with pytest.raises(ValueError, match=r"pitch_um must be finite and > 0"):
        io.write_image(tmp_path / "a.png", np.ones((2, 2)), pitch_um=0)
    (tmp_path / "keep.png").write_bytes(b"old")
    with pytest.raises(io.OutputExistsError, match=r"exists already"):
        io.write_image(tmp_path / "keep.png", np.ones((2, 2)))
    assert (tmp_path / "keep.png").read_bytes() == b"old"
    # A failure while writing leaves neither a partial file nor a temporary one.
    with pytest.raises(RuntimeError, match=r"boom"):
        with io.atomic_output(tmp_path / "new.bin") as fh:
            fh.write(b"half")
            raise RuntimeError("boom")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["keep.png"]
    io.write_image(tmp_path / "keep.png", np.ones((2, 2)), overwrite=True)
    assert (tmp_path / "keep.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


# --- reports ------------------------------------------------------------------------------

def test_json_and_csv(tmp_path):
    import csv
    io.write_json(tmp_path / "r.json", {"a": np.float64(np.nan), "b": np.arange(3), "c": np.int64(2)})
    assert json.loads((tmp_path / "r.json").read_text()) == {"a": None, "b": [0, 1, 2], "c": 2}
    io.write_csv(tmp_path / "t.csv", {"frame": np.arange(3), "x": np.array([0.1, 0.25, -1.0])})
    with open(tmp_path / "t.csv", newline="") as fh:            # stdlib csv reader
        rows = list(csv.DictReader(fh))
    assert [float(r["x"]) for r in rows] == [0.1, 0.25, -1.0]
    assert [int(r["frame"]) for r in rows] == [0, 1, 2]
    with pytest.raises(ValueError, match=r"1-D of one length"):
        io.write_csv(tmp_path / "u.csv", {"a": [1, 2], "b": [1]})
