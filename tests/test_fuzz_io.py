"""Hypothesis fuzz tests of the readers: random bytes, random truncation, random manifest fields.

Each either reads correctly or raises a clean error of ours (FormatError / ManifestError, both
ValueError subclasses); never any other exception, never a hang (sizes are small).
"""

import json
import shutil
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from stripstitch import io

SETTINGS = settings(max_examples=int(__import__("os").environ.get("FUZZ_N", 60)), deadline=None,
                    suppress_health_check=[HealthCheck.function_scoped_fixture])


_BASE = []


@pytest.fixture(scope="module", autouse=True)
def _cleanup():
    yield
    for d in _BASE:
        shutil.rmtree(d, ignore_errors=True)


def _folder():
    if not _BASE:
        _BASE.append(tempfile.mkdtemp(prefix="fuzz_io_"))
    return Path(tempfile.mkdtemp(dir=_BASE[0]))


json_scalars = st.one_of(st.none(), st.booleans(), st.integers(-2**70, 2**70),
                         st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=6))
json_values = st.recursive(json_scalars, lambda inner: st.one_of(
    st.lists(inner, max_size=3), st.dictionaries(st.text(max_size=8), inner, max_size=3)),
    max_leaves=6)

FIELDS = {
    "geometry": ["rows", "columns", "pitch_um"],
    "samples": ["container_bits", "value_bits", "byte_order", "alignment"],
    "layout": ["order", "data_offset_bytes", "frame_header_bytes", "frame_trailer_bytes"],
    "orientation": ["transpose", "flip_along", "flip_across"],
    "timing": ["frame_rate_hz", "timestamps_s"],
}
good_values = {
    "rows": st.integers(-1, 6), "columns": st.integers(-1, 6), "pitch_um": st.floats(-1, 100),
    "container_bits": st.sampled_from([8, 16, 12, True]), "value_bits": st.integers(0, 17),
    "byte_order": st.sampled_from(["little", "big", "x"]),
    "alignment": st.sampled_from(["low", "high", 3]),
    "order": st.sampled_from(["row_major", "column_major", None]),
    "data_offset_bytes": st.integers(-1, 8), "frame_header_bytes": st.integers(-1, 24),
    "frame_trailer_bytes": st.integers(-1, 4),
    "transpose": st.booleans(), "flip_along": st.booleans(), "flip_across": st.booleans(),
    "frame_rate_hz": st.one_of(st.floats(-10, 1e4), st.none()),
    "timestamps_s": st.one_of(st.none(), st.lists(st.floats(0, 1), max_size=6)),
}


@st.composite
def manifests(draw):
    d = {"format": io.MANIFEST_FORMAT, "version": draw(st.sampled_from([1, 1, 1, 2, "1"]))}
    for group, keys in FIELDS.items():
        g = {}
        for k in keys:
            if draw(st.booleans()):
                g[k] = draw(st.one_of(good_values[k], json_scalars) if draw(st.integers(0, 5)) == 0
                            else good_values[k])
        d[group] = g
    if draw(st.booleans()):
        hf = {}
        for name in ("counter", "timestamp"):
            if draw(st.booleans()):
                hf[name] = {"offset_bytes": draw(st.integers(-1, 20)),
                            "type": draw(st.sampled_from(["uint16", "uint32", "uint64", "int32",
                                                          "float64", "u4"]))}
        d["header_fields"] = hf
    if draw(st.integers(0, 4)) == 0:
        d["n_frames"] = draw(st.integers(-1, 8))
    if draw(st.integers(0, 6)) == 0:
        d[draw(st.text(max_size=5))] = draw(json_values)
    return d


@SETTINGS
@given(man=manifests(), data=st.binary(max_size=400))
def test_random_manifest_and_bytes(man, data):
    folder = _folder()
    man["data_file"] = "d.bin"
    (folder / "d.bin").write_bytes(data)
    (folder / "d.json").write_text(json.dumps(man))
    try:
        stack = io.read_frames(folder / "d.json")
    except io.FormatError:          # ManifestError is a FormatError; both are ValueErrors
        return
    m = stack.manifest
    t = stack.n_frames
    assert stack.frames.shape == (t, m.rows, m.columns) and t >= 2
    assert stack.frames.dtype == (np.uint8 if m.value_bits <= 8 else np.uint16)
    assert int(stack.frames.max()) < (1 << m.value_bits)
    assert len(data) == m.data_offset_bytes + t * m.frame_bytes


@SETTINGS
@given(text=st.one_of(st.text(max_size=60), st.binary(max_size=60).map(lambda b: b.decode("latin-1")),
                      json_values.map(json.dumps)))
def test_random_manifest_text(text):
    folder = _folder()
    (folder / "m.json").write_text(text, encoding="utf-8", errors="surrogatepass")
    try:
        m = io.read_manifest(folder / "m.json")
    except io.ManifestError as exc:
        assert str(exc)                       # a clean, non-empty message
    else:
        # Random text that happens to be a valid manifest must describe a real geometry.
        assert m.rows >= 1 and m.columns >= 1


@SETTINGS
@given(seed=st.integers(0, 2**32 - 1), cut=st.integers(1, 200), header=st.sampled_from([0, 4, 16]),
       bits=st.sampled_from([(8, 8), (16, 12), (16, 16)]))
def test_random_truncation_of_a_valid_dump(seed, cut, header, bits):
    rng = np.random.default_rng(seed)
    frames = rng.integers(0, 1 << bits[1], size=(4, 3, 5))
    folder = _folder()
    io.write_dump(folder / "v.bin", frames, frame_rate_hz=1000.0, container_bits=bits[0],
                  value_bits=bits[1], byte_order="big", frame_header_bytes=header,
                  timestamps_s=np.arange(4) * 1e-3)
    raw = (folder / "v.bin").read_bytes()
    (folder / "v.bin").write_bytes(raw[:max(0, len(raw) - cut)])
    try:
        io.read_frames(folder / "v.bin")
    except io.FormatError as exc:
        assert "v.bin" in str(exc)
    else:
        raise AssertionError("a truncated dump with n_frames in its manifest must not read")


@SETTINGS
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(0, 300), suffix=st.sampled_from([".npy", ".npz"]))
def test_random_bytes_as_numpy_files(seed, n, suffix):
    folder = _folder()
    raw = np.random.default_rng(seed).integers(0, 256, n, dtype=np.uint8).tobytes()
    if suffix == ".npy" and n > 20 and seed % 2:
        raw = b"\x93NUMPY\x01\x00" + raw[8:]              # valid magic, random header
    (folder / f"r{suffix}").write_bytes(raw)
    try:
        stack = io.read_frames(folder / f"r{suffix}")
    except io.FormatError as exc:
        assert str(exc)
    else:
        assert stack.frames.ndim == 3 and stack.frames.shape[0] >= 2


@SETTINGS
@given(seed=st.integers(0, 2**32 - 1), cut=st.integers(1, 400))
def test_truncated_npz(seed, cut):
    folder = _folder()
    frames = np.random.default_rng(seed).integers(0, 255, (3, 4, 6)).astype(np.uint8)
    io.write_npz(folder / "a.npz", frames, frame_rate_hz=100.0)
    raw = (folder / "a.npz").read_bytes()
    (folder / "a.npz").write_bytes(raw[:max(0, len(raw) - cut)])
    try:
        s = io.read_frames(folder / "a.npz")
    except io.FormatError:
        return
    np.testing.assert_array_equal(s.frames, frames)


@SETTINGS
@given(seed=st.integers(0, 2**32 - 1), t=st.integers(2, 5), r=st.integers(2, 5), c=st.integers(2, 6),
       bits=st.sampled_from([(8, 8), (8, 5), (16, 16), (16, 12), (16, 10)]),
       order_b=st.sampled_from(["little", "big"]), align=st.sampled_from(["low", "high"]),
       order=st.sampled_from(["row_major", "column_major"]), tr=st.booleans(), fa=st.booleans(),
       fc=st.booleans(), header=st.sampled_from([0, 4, 12, 20]), offset=st.integers(0, 9),
       trailer=st.integers(0, 3))
def test_write_read_roundtrip_property(seed, t, r, c, bits, order_b, align, order, tr, fa, fc,
                                       header, offset, trailer):
    rng = np.random.default_rng(seed)
    frames = rng.integers(0, 1 << bits[1], size=(t, r, c))
    stamps = np.cumsum(rng.integers(1, 4, t)) / 1000.0        # some frames dropped
    folder = _folder()
    io.write_dump(folder / "p.bin", frames, frame_rate_hz=1000.0, timestamps_s=stamps,
                  container_bits=bits[0], value_bits=bits[1], byte_order=order_b, alignment=align,
                  order=order, transpose=tr, flip_along=fa, flip_across=fc,
                  frame_header_bytes=header, data_offset_bytes=offset, frame_trailer_bytes=trailer)
    s = io.read_frames(folder / "p.bin")
    np.testing.assert_array_equal(s.frames, frames)
    np.testing.assert_allclose(s.timestamps_s, stamps, atol=1e-9)
    steps = np.rint(np.diff(stamps) * 1000).astype(int)
    assert s.n_dropped == int((steps - 1).sum())
