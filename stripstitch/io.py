"""Input and output: raw frame dumps with a JSON manifest, .npy/.npz frame stacks, TIFF/PNG images
at the true pixel pitch, and JSON/CSV reports.

Frame stacks come in as raw dumps (8- or 16-bit samples, either byte order, 10/12-bit values in
16-bit words, row- or column-major frames, optional per-frame headers with a frame counter and a
timestamp, optional flip/transpose of the sensor orientation) described by a JSON manifest, or as
``.npy``/``.npz`` files; they come out as a :class:`FrameStack`. Images go out as 8- or 16-bit
TIFF (resolution tags set from the pitch) or PNG (``pHYs`` chunk), after a documented robust
scaling that is stated in the file's metadata. Every writer is atomic (temporary file in the
same folder, then :func:`os.replace`) and refuses to overwrite an existing file unless asked.

The formats are described in ``docs/formats.md``. Nothing is ever loaded with pickle.
"""

from __future__ import annotations

import contextlib
import csv
import io as _io
import json
import math
import numbers
import os
import struct
import tempfile
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any, Mapping

import numpy as np

from ._types import _plain
from ._validate import check_frames, check_positive

__all__ = [
    "FormatError",
    "ManifestError",
    "OutputExistsError",
    "HeaderField",
    "DumpManifest",
    "FrameStack",
    "MANIFEST_FORMAT",
    "MANIFEST_VERSION",
    "read_manifest",
    "read_dump",
    "write_dump",
    "read_frames",
    "write_npy",
    "write_npz",
    "scale_to_uint",
    "write_image",
    "write_json",
    "write_csv",
    "write_trajectory_csv",
    "atomic_output",
]

#: Value of the manifest's ``format`` field.
MANIFEST_FORMAT = "stripstitch-frame-dump"
#: Manifest versions this reader understands.
MANIFEST_VERSION = 1
#: ``format`` entry of the JSON header inside our own ``.npz`` frame stacks.
NPZ_FORMAT = "stripstitch-frames"

_HEADER_TYPES = ("uint8", "uint16", "uint32", "uint64", "int8", "int16", "int32", "int64",
                 "float32", "float64")
_BYTE_ORDERS = ("little", "big")
_LAYOUTS = ("row_major", "column_major")
_ALIGNMENTS = ("low", "high")
#: Largest frame we accept from a manifest (plates per frame): guards against absurd values.
_MAX_PLATES = 1 << 22


class FormatError(ValueError):
    """A file does not hold what its format or manifest says (truncated, wrong size, bad values)."""


class ManifestError(FormatError):
    """A dump manifest is malformed: unknown version, missing/unknown/contradictory fields."""


class OutputExistsError(FileExistsError):
    """An output file exists already and overwriting was not allowed."""


# ----------------------------------------------------------------------------------------------
# atomic output
# ----------------------------------------------------------------------------------------------

@contextlib.contextmanager
def atomic_output(path, *, overwrite=False):
    """Open a temporary binary file beside ``path``; on success move it onto ``path``.

    A failure inside the ``with`` block removes the temporary file and leaves ``path`` as it
    was. Without ``overwrite`` an existing ``path`` raises :class:`OutputExistsError` before
    anything is written.

    Parameters
    ----------
    path : path-like
        Final file name. Its folder must exist.
    overwrite : bool, optional
        Replace an existing file. Default is False.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> with atomic_output(folder / "a.bin") as fh:
    ...     _ = fh.write(b"abc")
    >>> (folder / "a.bin").read_bytes()
    b'abc'
    """
    path = Path(path)
    if not overwrite and path.exists():
        raise OutputExistsError(f"output {str(path)!r} exists already; pass overwrite=True "
                                "(--force on the command line) to replace it")
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise FileNotFoundError(f"output folder {str(folder)!r} of {str(path)!r} does not exist")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=folder)
    try:
        with os.fdopen(fd, "wb") as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
        if not overwrite and path.exists():
            raise OutputExistsError(f"output {str(path)!r} appeared while writing; pass "
                                    "overwrite=True to replace it")
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


# ----------------------------------------------------------------------------------------------
# manifest
# ----------------------------------------------------------------------------------------------

def _field_error(name, expected, got):
    return ManifestError(f"manifest field {name!r} must be {expected}; got {got!r}")


def _m_int(d, key, name, *, lo, hi, default=None, required=False):
    if key not in d:
        if required:
            raise ManifestError(f"manifest field {name!r} is missing (expected an integer in "
                                f"[{lo}, {hi}])")
        return default
    v = d[key]
    if isinstance(v, bool) or not isinstance(v, numbers.Integral):
        raise _field_error(name, f"an integer in [{lo}, {hi}]", v)
    if not lo <= v <= hi:
        raise _field_error(name, f"an integer in [{lo}, {hi}]", v)
    return int(v)


def _m_float(d, key, name, *, positive=True, default=None, required=False):
    if key not in d or d[key] is None:
        if required:
            raise ManifestError(f"manifest field {name!r} is missing (expected a number > 0)")
        return default
    v = d[key]
    if isinstance(v, bool) or not isinstance(v, numbers.Real) or not math.isfinite(v) or (
            positive and v <= 0):
        raise _field_error(name, "a finite number > 0" if positive else "a finite number", v)
    return float(v)


def _m_bool(d, key, name, default=False):
    v = d.get(key, default)
    if not isinstance(v, bool):
        raise _field_error(name, "true or false", v)
    return v


def _m_choice(d, key, name, choices, default):
    v = d.get(key, default)
    if v not in choices:
        raise _field_error(name, f"one of {list(choices)}", v)
    return v


def _m_group(d, key, allowed):
    v = d.get(key, {})
    if v is None:
        v = {}
    if not isinstance(v, Mapping):
        raise _field_error(key, "an object (JSON dictionary)", v)
    unknown = sorted(set(map(str, v)) - set(allowed))
    if unknown:
        raise ManifestError(f"manifest group {key!r} has unknown field(s) {unknown}; allowed "
                            f"fields are {sorted(allowed)}")
    return v


@dataclass(frozen=True)
class HeaderField:
    """One value in the fixed-size header in front of every frame of a dump.

    Attributes
    ----------
    offset_bytes : int
        Position of the value inside the frame header.
    type : str
        One of ``uint8, uint16, uint32, uint64, int8, int16, int32, int64, float32, float64``.
    byte_order : str
        ``"little"`` or ``"big"``.
    unit_s : float
        For a timestamp: seconds per count (e.g. 1e-6 for microseconds). 1.0 for a counter.
    """

    offset_bytes: int
    type: str = "uint32"
    byte_order: str = "little"
    unit_s: float = 1.0

    @property
    def dtype(self):
        dt = np.dtype(self.type)
        return dt.newbyteorder("<" if self.byte_order == "little" else ">")

    @property
    def size_bytes(self):
        return np.dtype(self.type).itemsize

    def to_dict(self, *, with_unit):
        d = {"offset_bytes": self.offset_bytes, "type": self.type, "byte_order": self.byte_order}
        if with_unit:
            d["unit_s"] = self.unit_s
        return d


@dataclass(frozen=True)
class DumpManifest:
    """Description of a raw frame dump (the JSON manifest stored beside it).

    Geometry is given in the library's axes: ``rows`` plates along the swipe, ``columns``
    across. The stored frame has shape ``(rows, columns)``, or ``(columns, rows)`` when
    ``transpose`` is set; after decoding, a stored frame ``S`` becomes the library frame
    ``S.T`` (if ``transpose``), then reversed along axis 0 (``flip_along``) and axis 1
    (``flip_across``).

    Attributes
    ----------
    rows, columns : int
        Plates along / across the swipe (>= 2 each).
    pitch_um : float
        Plate pitch in micrometres. Default 50.8 (500 ppi).
    container_bits : int
        8 or 16 bits per stored sample.
    value_bits : int
        Significant bits per sample, 1..container_bits (e.g. 10 or 12 in 16-bit words).
    byte_order : str
        ``"little"`` or ``"big"`` (of 16-bit samples).
    alignment : str
        ``"low"``: value in the low bits (upper bits must be 0); ``"high"``: value in the top
        bits (shifted left by ``container_bits - value_bits``).
    order : str
        ``"row_major"``: samples of a stored row are adjacent; ``"column_major"``: samples
        of a stored column are adjacent.
    data_offset_bytes : int
        Bytes before the first frame (a file header), skipped.
    frame_header_bytes, frame_trailer_bytes : int
        Fixed bytes before / after every frame's samples.
    counter, timestamp : HeaderField or None
        Frame counter and timestamp inside the frame header.
    frame_rate_hz : float or None
        Nominal frame rate.
    timestamps_s : tuple of float or None
        Per-frame times listed in the manifest (alternative to a header timestamp).
    n_frames : int or None
        Frame count, checked against the file size when given.
    data_file : str
        Dump file name, relative to the manifest's folder.
    notes : object
        Free-form JSON value (operator, firmware build, ...), carried along unchecked.
    """

    rows: int
    columns: int
    data_file: str = ""
    pitch_um: float = 50.8
    container_bits: int = 8
    value_bits: int = 8
    byte_order: str = "little"
    alignment: str = "low"
    order: str = "row_major"
    data_offset_bytes: int = 0
    frame_header_bytes: int = 0
    frame_trailer_bytes: int = 0
    counter: HeaderField | None = None
    timestamp: HeaderField | None = None
    frame_rate_hz: float | None = None
    timestamps_s: tuple | None = None
    n_frames: int | None = None
    transpose: bool = False
    flip_along: bool = False
    flip_across: bool = False
    notes: Any = None
    version: int = MANIFEST_VERSION

    def __post_init__(self):
        # Re-validate through the dictionary form, so that a manifest built in Python obeys the
        # same rules as one read from a file.
        _parse_manifest(self.to_dict())

    @property
    def stored_shape(self):
        """Shape of one frame as stored: (rows, columns), or (columns, rows) when transposed."""
        return (self.columns, self.rows) if self.transpose else (self.rows, self.columns)

    @property
    def sample_bytes(self):
        return self.container_bits // 8

    @property
    def frame_bytes(self):
        """Bytes per frame on disk, header and trailer included."""
        return (self.frame_header_bytes + self.rows * self.columns * self.sample_bytes
                + self.frame_trailer_bytes)

    @property
    def sample_dtype(self):
        if self.container_bits == 8:
            return np.dtype(np.uint8)
        return np.dtype("<u2" if self.byte_order == "little" else ">u2")

    @property
    def output_dtype(self):
        return np.dtype(np.uint8 if self.value_bits <= 8 else np.uint16)

    def to_dict(self):
        """JSON-ready dictionary in the manifest schema (see ``docs/formats.md``)."""
        fields = {}
        if self.counter is not None:
            fields["counter"] = self.counter.to_dict(with_unit=False)
        if self.timestamp is not None:
            fields["timestamp"] = self.timestamp.to_dict(with_unit=True)
        d = {
            "format": MANIFEST_FORMAT,
            "version": self.version,
            "data_file": self.data_file,
            "geometry": {"rows": self.rows, "columns": self.columns, "pitch_um": self.pitch_um},
            "samples": {"container_bits": self.container_bits, "value_bits": self.value_bits,
                        "byte_order": self.byte_order, "alignment": self.alignment},
            "layout": {"order": self.order, "data_offset_bytes": self.data_offset_bytes,
                       "frame_header_bytes": self.frame_header_bytes,
                       "frame_trailer_bytes": self.frame_trailer_bytes},
            "orientation": {"transpose": self.transpose, "flip_along": self.flip_along,
                            "flip_across": self.flip_across},
            "header_fields": fields,
            "timing": {"frame_rate_hz": self.frame_rate_hz,
                       "timestamps_s": None if self.timestamps_s is None else list(self.timestamps_s)},
        }
        if self.n_frames is not None:
            d["n_frames"] = self.n_frames
        if self.notes is not None:
            d["notes"] = self.notes
        return d

    @classmethod
    def from_dict(cls, d):
        """Validate a manifest dictionary; raises :class:`ManifestError` naming the bad field."""
        return cls(**_parse_manifest(d))

    def save(self, path, *, overwrite=False):
        """Write the manifest as JSON (atomically)."""
        text = json.dumps(self.to_dict(), indent=2) + "\n"
        with atomic_output(path, overwrite=overwrite) as fh:
            fh.write(text.encode("utf-8"))


_TOP_KEYS = ("format", "version", "data_file", "geometry", "samples", "layout", "orientation",
             "header_fields", "timing", "n_frames", "notes")


def _parse_header_field(g, key, *, with_unit, default_order, header_bytes):
    name = f"header_fields.{key}"
    v = g[key]
    if v is None:
        return None
    allowed = ("offset_bytes", "type", "byte_order") + (("unit_s",) if with_unit else ())
    if not isinstance(v, Mapping):
        raise _field_error(name, "an object with fields " + ", ".join(allowed), v)
    unknown = sorted(set(map(str, v)) - set(allowed))
    if unknown:
        raise ManifestError(f"manifest group {name!r} has unknown field(s) {unknown}; allowed "
                            f"fields are {sorted(allowed)}")
    off = _m_int(v, "offset_bytes", f"{name}.offset_bytes", lo=0, hi=1 << 20, required=True)
    typ = _m_choice(v, "type", f"{name}.type", _HEADER_TYPES, "uint32")
    order = _m_choice(v, "byte_order", f"{name}.byte_order", _BYTE_ORDERS, default_order)
    unit = _m_float(v, "unit_s", f"{name}.unit_s", default=1.0) if with_unit else 1.0
    if not with_unit and typ.startswith("float"):
        raise _field_error(f"{name}.type", "an integer type for a frame counter", typ)
    size = np.dtype(typ).itemsize
    if off + size > header_bytes:
        raise ManifestError(
            f"manifest field {name!r} ({typ} at offset_bytes {off}) does not fit inside the "
            f"{header_bytes}-byte frame header (layout.frame_header_bytes); contradictory fields")
    return HeaderField(offset_bytes=off, type=typ, byte_order=order, unit_s=unit)


def _parse_manifest(d):
    """Check a manifest dictionary and return DumpManifest keyword arguments."""
    if not isinstance(d, Mapping):
        raise ManifestError(f"a manifest must be a JSON object (dictionary); got "
                            f"{type(d).__name__}")
    unknown = sorted(set(map(str, d)) - set(_TOP_KEYS))
    if unknown:
        raise ManifestError(f"manifest has unknown field(s) {unknown}; allowed top-level fields "
                            f"are {sorted(_TOP_KEYS)} (free-form text goes in 'notes')")
    fmt = d.get("format", MANIFEST_FORMAT)
    if fmt != MANIFEST_FORMAT:
        raise _field_error("format", repr(MANIFEST_FORMAT), fmt)
    if "version" not in d:
        raise ManifestError(f"manifest field 'version' is missing (this reader understands "
                            f"version {MANIFEST_VERSION})")
    version = d["version"]
    if isinstance(version, bool) or not isinstance(version, numbers.Integral):
        raise _field_error("version", f"the integer {MANIFEST_VERSION}", version)
    if version != MANIFEST_VERSION:
        raise ManifestError(f"manifest field 'version' is {version!r}, which this reader does not "
                            f"understand (known: {MANIFEST_VERSION}); upgrade stripstitch or "
                            "convert the manifest")
    data_file = d.get("data_file", "")
    if not isinstance(data_file, str):
        raise _field_error("data_file", "a file name (string)", data_file)

    geo = _m_group(d, "geometry", ("rows", "columns", "pitch_um"))
    rows = _m_int(geo, "rows", "geometry.rows", lo=2, hi=1 << 16, required=True)
    cols = _m_int(geo, "columns", "geometry.columns", lo=2, hi=1 << 16, required=True)
    if rows * cols > _MAX_PLATES:
        raise ManifestError(f"manifest fields 'geometry.rows' x 'geometry.columns' = {rows} x "
                            f"{cols} exceed the {_MAX_PLATES} plates a frame may have")
    pitch = _m_float(geo, "pitch_um", "geometry.pitch_um", default=50.8)

    smp = _m_group(d, "samples", ("container_bits", "value_bits", "byte_order", "alignment"))
    container = smp.get("container_bits", 8)
    if isinstance(container, bool) or container not in (8, 16):
        raise _field_error("samples.container_bits", "8 or 16", container)
    container = int(container)
    value_bits = _m_int(smp, "value_bits", "samples.value_bits", lo=1, hi=16, default=container)
    if value_bits > container:
        raise ManifestError(f"manifest field 'samples.value_bits' ({value_bits}) exceeds "
                            f"'samples.container_bits' ({container}); contradictory fields")
    byte_order = _m_choice(smp, "byte_order", "samples.byte_order", _BYTE_ORDERS, "little")
    alignment = _m_choice(smp, "alignment", "samples.alignment", _ALIGNMENTS, "low")

    lay = _m_group(d, "layout", ("order", "data_offset_bytes", "frame_header_bytes",
                                 "frame_trailer_bytes"))
    order = _m_choice(lay, "order", "layout.order", _LAYOUTS, "row_major")
    data_offset = _m_int(lay, "data_offset_bytes", "layout.data_offset_bytes", lo=0, hi=1 << 40,
                         default=0)
    header_bytes = _m_int(lay, "frame_header_bytes", "layout.frame_header_bytes", lo=0,
                          hi=1 << 20, default=0)
    trailer_bytes = _m_int(lay, "frame_trailer_bytes", "layout.frame_trailer_bytes", lo=0,
                           hi=1 << 20, default=0)

    ori = _m_group(d, "orientation", ("transpose", "flip_along", "flip_across"))
    transpose = _m_bool(ori, "transpose", "orientation.transpose")
    flip_along = _m_bool(ori, "flip_along", "orientation.flip_along")
    flip_across = _m_bool(ori, "flip_across", "orientation.flip_across")

    hf = _m_group(d, "header_fields", ("counter", "timestamp"))
    counter = timestamp = None
    if "counter" in hf:
        counter = _parse_header_field(hf, "counter", with_unit=False, default_order=byte_order,
                                      header_bytes=header_bytes)
    if "timestamp" in hf:
        timestamp = _parse_header_field(hf, "timestamp", with_unit=True,
                                        default_order=byte_order, header_bytes=header_bytes)
    if counter is not None and timestamp is not None:
        a0, a1 = counter.offset_bytes, counter.offset_bytes + counter.size_bytes
        b0, b1 = timestamp.offset_bytes, timestamp.offset_bytes + timestamp.size_bytes
        if a0 < b1 and b0 < a1:
            raise ManifestError("manifest fields 'header_fields.counter' and "
                                "'header_fields.timestamp' overlap in the frame header; "
                                "contradictory fields")

    tim = _m_group(d, "timing", ("frame_rate_hz", "timestamps_s"))
    rate = _m_float(tim, "frame_rate_hz", "timing.frame_rate_hz")
    stamps = tim.get("timestamps_s")
    if stamps is not None:
        if not isinstance(stamps, (list, tuple)) or not all(
                isinstance(s, numbers.Real) and not isinstance(s, bool) and math.isfinite(s)
                for s in stamps):
            raise _field_error("timing.timestamps_s", "a list of finite numbers (seconds) or null",
                               stamps if not isinstance(stamps, (list, tuple)) else "a list with "
                               "non-numeric or non-finite entries")
        if len(stamps) >= 2 and not np.all(np.diff(np.asarray(stamps, dtype=float)) > 0):
            raise ManifestError("manifest field 'timing.timestamps_s' must increase strictly "
                                "from frame to frame")
        stamps = tuple(float(s) for s in stamps)
        if timestamp is not None:
            raise ManifestError("manifest gives both 'timing.timestamps_s' and "
                                "'header_fields.timestamp'; contradictory fields (keep one)")
    if rate is None and stamps is None and timestamp is None:
        raise ManifestError("manifest gives no timing: set 'timing.frame_rate_hz', "
                            "'timing.timestamps_s' or 'header_fields.timestamp'")
    n_frames = d.get("n_frames")
    if n_frames is not None:
        n_frames = _m_int(d, "n_frames", "n_frames", lo=1, hi=1 << 40)
        if stamps is not None and len(stamps) != n_frames:
            raise ManifestError(f"manifest field 'timing.timestamps_s' lists {len(stamps)} "
                                f"times but 'n_frames' is {n_frames}; contradictory fields")
    notes = d.get("notes")
    return dict(rows=rows, columns=cols, data_file=data_file, pitch_um=pitch,
                container_bits=container, value_bits=value_bits, byte_order=byte_order,
                alignment=alignment, order=order, data_offset_bytes=data_offset,
                frame_header_bytes=header_bytes, frame_trailer_bytes=trailer_bytes,
                counter=counter, timestamp=timestamp, frame_rate_hz=rate, timestamps_s=stamps,
                n_frames=n_frames, transpose=transpose, flip_along=flip_along,
                flip_across=flip_across, notes=notes, version=int(version))


def read_manifest(path):
    """Read and validate a dump manifest (JSON).

    Parameters
    ----------
    path : path-like
        The ``.json`` manifest.

    Returns
    -------
    DumpManifest

    Raises
    ------
    ManifestError
        Not JSON, or a field is missing, unknown, out of range or contradicts another.
    """
    path = Path(path)
    raw = path.read_bytes()
    try:
        d = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError, RecursionError) as exc:
        raise ManifestError(f"manifest {str(path)!r} is not valid UTF-8 JSON: {exc}") from None
    return DumpManifest.from_dict(d)


# ----------------------------------------------------------------------------------------------
# frame stacks
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class FrameStack:
    """Frames as read from a file, with what the file says about them.

    Attributes
    ----------
    frames : (T, R, C) ndarray
        Samples in the library's axes (axis 1 = rows along the swipe); the stored integer
        dtype (uint8 for <= 8 significant bits, else uint16) or the array's own dtype.
    pitch_um : float or None
        Plate pitch, if the file says.
    frame_rate_hz : float or None
        Nominal frame rate, if the file says (or the median rate from timestamps).
    timestamps_s : (T,) ndarray of float64 or None
        Per-frame times (from header timestamps, manifest timestamps, or counters and the
        frame rate); gaps show dropped frames.
    counters : (T,) ndarray of int64 or None
        Frame counters, unwrapped (they never decrease).
    dropped_after : (K,) ndarray of int
        Frame indices after which frames are missing.
    dropped_count : (K,) ndarray of int
        How many frames are missing after each of them.
    source : str
        File the frames came from.
    kind : str
        ``"dump"``, ``"npy"``, ``"npz"`` or ``"capture"`` (a simulator capture in ``.npz``).
    manifest : DumpManifest or None
        For dumps.
    notes : object
        The manifest's or header's free-form notes.
    """

    frames: np.ndarray
    pitch_um: float | None = None
    frame_rate_hz: float | None = None
    timestamps_s: np.ndarray | None = None
    counters: np.ndarray | None = None
    dropped_after: np.ndarray = field(default_factory=lambda: np.zeros(0, int))
    dropped_count: np.ndarray = field(default_factory=lambda: np.zeros(0, int))
    source: str = ""
    kind: str = "npy"
    manifest: DumpManifest | None = None
    notes: Any = None

    def __post_init__(self):
        def frozen(a, dtype=None):
            a = np.array(a, dtype=dtype)
            a.flags.writeable = False
            return a
        object.__setattr__(self, "frames", frozen(self.frames))
        for name, dt in (("timestamps_s", np.float64), ("counters", np.int64)):
            if getattr(self, name) is not None:
                object.__setattr__(self, name, frozen(getattr(self, name), dt))
        object.__setattr__(self, "dropped_after", frozen(self.dropped_after, np.int64))
        object.__setattr__(self, "dropped_count", frozen(self.dropped_count, np.int64))

    @property
    def n_frames(self):
        return int(self.frames.shape[0])

    @property
    def n_dropped(self):
        """Number of frames missing from the stack (from counter or timestamp gaps)."""
        return int(self.dropped_count.sum())

    @property
    def duration_s(self):
        """Time from the first to the last frame, or None when nothing says."""
        if self.timestamps_s is not None:
            return float(self.timestamps_s[-1] - self.timestamps_s[0])
        if self.frame_rate_hz:
            return (self.n_frames - 1) / self.frame_rate_hz
        return None

    def dropped_table(self):
        """List of ``{"after_frame", "missing"}`` dictionaries, one per gap."""
        return [{"after_frame": int(a), "missing": int(c)}
                for a, c in zip(self.dropped_after, self.dropped_count)]


def _unwrap_int(values, bits):
    """Unwrap an integer sequence that may wrap modulo 2**bits (counters, timestamps)."""
    v = values.astype(np.int64) if bits < 64 else values.astype(np.uint64)
    if v.size < 2:
        return v.astype(np.int64)
    if bits >= 64:
        d = np.diff(v)          # uint64 subtraction wraps modulo 2**64 by itself
        d = d.astype(np.uint64)
        if np.any(d > np.uint64(1 << 62)):
            raise FormatError("header values jump by more than 2**62 between frames; "
                              "they cannot be counters or timestamps")
        d = d.astype(np.int64)
    else:
        d = np.mod(np.diff(v), np.int64(1) << bits)
    out = np.concatenate([[0], np.cumsum(d)])
    return out


def _dropped_from_counters(counters, source):
    d = np.diff(counters)
    bad = np.flatnonzero(d <= 0)
    if bad.size:
        raise FormatError(f"{source}: frame counter does not increase at frame {int(bad[0]) + 1} "
                          f"(counter {int(counters[bad[0]])} then {int(counters[bad[0] + 1])}); "
                          "check 'header_fields.counter' in the manifest")
    idx = np.flatnonzero(d > 1)
    return idx, d[idx] - 1


def _dropped_from_times(times_s, rate_hz, source, name):
    d = np.diff(times_s)
    bad = np.flatnonzero(~(d > 0))
    if bad.size:
        raise FormatError(f"{source}: {name} do not increase at frame {int(bad[0]) + 1} "
                          f"({times_s[bad[0]]!r} s then {times_s[bad[0] + 1]!r} s)")
    if d.size == 0:
        return np.zeros(0, int), np.zeros(0, int)
    interval = 1.0 / rate_hz if rate_hz else float(np.median(d))
    n = np.rint(d / interval).astype(np.int64)
    idx = np.flatnonzero(n >= 2)
    return idx, n[idx] - 1


def _resolve_data_file(manifest, manifest_path, data_path):
    if data_path is not None:
        return Path(data_path)
    folder = Path(manifest_path).parent
    if manifest.data_file:
        return folder / manifest.data_file
    return Path(manifest_path).with_suffix(".bin")


def read_dump(path, *, manifest=None, min_frames=2):
    """Read a raw frame dump described by a JSON manifest.

    Parameters
    ----------
    path : path-like
        The manifest (``.json``) or the dump itself; for a dump ``x.bin`` the manifest is
        ``x.json`` (or ``x.bin.json``) beside it unless given.
    manifest : path-like or DumpManifest, optional
        Manifest to use instead of the one beside the dump. Default is None.
    min_frames : int, optional
        Fewest frames accepted. Default is 2.

    Returns
    -------
    FrameStack
        Frames in the library's axes, timestamps (from header timestamps, the manifest, or
        counters and the frame rate), counters and dropped frames.

    Raises
    ------
    ManifestError
        Bad manifest.
    FormatError
        The dump's size does not match the manifest (truncated, extra bytes), sample values
        exceed ``value_bits``, counters or timestamps do not increase, too few frames.

    Notes
    -----
    A gap in the counters (step > 1), or a timestamp step of about k >= 2 frame intervals
    (nominal interval from ``timing.frame_rate_hz``, else the median step), is reported as
    k - 1 dropped frames.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> frames = np.arange(2 * 3 * 4, dtype=np.uint16).reshape(2, 3, 4) * 100
    >>> m = write_dump(folder / "s.bin", frames, frame_rate_hz=1000.0, container_bits=16,
    ...                value_bits=12, byte_order="big", flip_along=True)
    >>> stack = read_dump(folder / "s.json")
    >>> bool(np.array_equal(stack.frames, frames)), stack.frames.dtype.name
    (True, 'uint16')
    """
    path = Path(path)
    min_frames = int(min_frames)
    data_path = None
    if isinstance(manifest, DumpManifest):
        man, man_path = manifest, path.with_suffix(".json")
        data_path = path
    elif manifest is not None:
        man_path = Path(manifest)
        man = read_manifest(man_path)
        data_path = path
    elif path.suffix.lower() == ".json":
        man_path = path
        man = read_manifest(path)
    else:
        candidates = [path.with_suffix(".json"), Path(str(path) + ".json")]
        found = [c for c in candidates if c.is_file()]
        if not found:
            raise FileNotFoundError(f"no manifest found for dump {str(path)!r} (looked for "
                                    f"{', '.join(repr(str(c)) for c in candidates)}); pass "
                                    "manifest=")
        man_path = found[0]
        man = read_manifest(man_path)
        data_path = path
    data_path = _resolve_data_file(man, man_path, data_path)
    src = str(data_path)
    size = data_path.stat().st_size
    body = size - man.data_offset_bytes
    if body < 0:
        raise FormatError(f"dump {src!r} holds {size} bytes, fewer than the "
                          f"{man.data_offset_bytes}-byte file header 'layout.data_offset_bytes'")
    fb = man.frame_bytes
    n, rest = divmod(body, fb)
    if rest:
        raise FormatError(
            f"dump {src!r} holds {body} bytes after the file header, not a whole number of "
            f"{fb}-byte frames ({n} full frame(s) + {rest} byte(s)): the dump is truncated or "
            "the manifest's geometry/sample/layout fields do not match it")
    if man.n_frames is not None and n != man.n_frames:
        raise FormatError(f"dump {src!r} holds {n} frame(s) of {fb} bytes but manifest field "
                          f"'n_frames' says {man.n_frames}")
    if man.timestamps_s is not None and len(man.timestamps_s) != n:
        raise FormatError(f"dump {src!r} holds {n} frame(s) but manifest field "
                          f"'timing.timestamps_s' lists {len(man.timestamps_s)} times")
    if n < min_frames:
        raise FormatError(f"dump {src!r} holds {n} frame(s); at least {min_frames} are needed")
    with open(data_path, "rb") as fh:
        fh.seek(man.data_offset_bytes)
        raw = np.frombuffer(fh.read(n * fb), dtype=np.uint8)
    if raw.size != n * fb:
        raise FormatError(f"dump {src!r} changed size while being read")
    raw = raw.reshape(n, fb)
    h = man.frame_header_bytes
    n_samples = man.rows * man.columns
    samples = np.ascontiguousarray(raw[:, h:h + n_samples * man.sample_bytes])
    values = samples.view(man.sample_dtype).reshape(n, n_samples)
    shift = man.container_bits - man.value_bits
    if man.alignment == "high" and shift:
        values = values >> shift
    elif shift:
        vmax = int(values.max()) if values.size else 0
        if vmax >= (1 << man.value_bits):
            n_bad = int(np.count_nonzero(values >= (1 << man.value_bits)))
            raise FormatError(
                f"dump {src!r}: {n_bad} sample(s) exceed the {man.value_bits}-bit range of "
                f"manifest field 'samples.value_bits' (largest {vmax}); wrong byte order "
                "('samples.byte_order'), or MSB-aligned values ('samples.alignment': 'high')?")
    values = values.astype(man.output_dtype)
    sr, sc = man.stored_shape
    if man.order == "row_major":
        frames = values.reshape(n, sr, sc)
    else:
        frames = values.reshape(n, sc, sr).transpose(0, 2, 1)
    if man.transpose:
        frames = frames.transpose(0, 2, 1)
    if man.flip_along:
        frames = frames[:, ::-1, :]
    if man.flip_across:
        frames = frames[:, :, ::-1]
    frames = np.ascontiguousarray(frames)

    def header_values(hf):
        col = raw[:, hf.offset_bytes:hf.offset_bytes + hf.size_bytes]
        return np.ascontiguousarray(col).view(hf.dtype).reshape(n).astype(hf.dtype.newbyteorder("="))

    counters = None
    timestamps = None
    dropped = (np.zeros(0, int), np.zeros(0, int))
    if man.counter is not None:
        counters = header_values(man.counter)
        counters = int(counters[0]) + _unwrap_int(counters, 8 * man.counter.size_bytes)
        dropped = _dropped_from_counters(counters, src)
    if man.timestamp is not None:
        ts = header_values(man.timestamp)
        if ts.dtype.kind == "f":
            if not np.isfinite(ts).all():
                raise FormatError(f"dump {src!r}: header timestamps contain NaN or inf")
            timestamps = ts.astype(np.float64) * man.timestamp.unit_s
        else:
            timestamps = (float(ts[0]) + _unwrap_int(ts, 8 * man.timestamp.size_bytes)
                          .astype(np.float64)) * man.timestamp.unit_s
    elif man.timestamps_s is not None:
        timestamps = np.asarray(man.timestamps_s, dtype=np.float64)
    elif counters is not None and man.frame_rate_hz:
        timestamps = (counters - counters[0]).astype(np.float64) / man.frame_rate_hz
    if timestamps is not None:
        if not np.isfinite(timestamps).all():
            raise FormatError(f"dump {src!r}: timestamps are not finite")
        t_drop = _dropped_from_times(timestamps, man.frame_rate_hz, src, "timestamps")
        if counters is None:
            dropped = t_drop
    rate = man.frame_rate_hz
    if rate is None and timestamps is not None and n >= 2:
        step = float(np.median(np.diff(timestamps)))
        rate = 1.0 / step
    return FrameStack(frames=frames, pitch_um=man.pitch_um, frame_rate_hz=rate,
                      timestamps_s=timestamps, counters=counters, dropped_after=dropped[0],
                      dropped_count=dropped[1], source=src, kind="dump", manifest=man,
                      notes=man.notes)


def write_dump(path, frames, *, frame_rate_hz=None, timestamps_s=None, counters=None,
               pitch_um=50.8, container_bits=None, value_bits=None, byte_order="little",
               alignment="low", order="row_major", transpose=False, flip_along=False,
               flip_across=False, frame_header_bytes=0, data_offset_bytes=0,
               frame_trailer_bytes=0, timestamp_unit_s=1e-9, notes=None, overwrite=False):
    """Write frames as a raw dump plus its JSON manifest (``path`` with suffix ``.json``).

    The layout options mirror the manifest fields (see :class:`DumpManifest`), so any layout
    the reader understands can be produced, e.g. to replay a simulated swipe like a real one.

    Parameters
    ----------
    path : path-like
        Dump file (e.g. ``swipe.bin``); the manifest goes to ``swipe.json``.
    frames : (T, R, C) array_like of integers
        Codes in the library's axes, 0 <= code < 2**value_bits.
    frame_rate_hz : float, optional
        Nominal frame rate. Default is None (then ``timestamps_s`` is needed).
    timestamps_s : (T,) array_like, optional
        Per-frame times (>= 0). With a frame header of at least 12 bytes they go into the
        header (uint64 in units of ``timestamp_unit_s`` at offset 4), otherwise into the
        manifest. Default is None.
    counters : (T,) array_like of int, optional
        Frame counters for the header (uint32 at offset 0). Default is None: counted from
        ``timestamps_s`` and ``frame_rate_hz`` when both are given (so dropped frames skip),
        else 0, 1, 2, ...
    pitch_um : float, optional
        Default is 50.8.
    container_bits : {8, 16}, optional
        Default is None: 8 if the codes fit in 8 bits (and ``value_bits`` <= 8), else 16.
    value_bits : int, optional
        Significant bits. Default is None (= ``container_bits``).
    byte_order, alignment, order : str, optional
        Defaults ``"little"``, ``"low"``, ``"row_major"``.
    transpose, flip_along, flip_across : bool, optional
        Orientation of the stored frames (the reader undoes it). Default False.
    frame_header_bytes : int, optional
        0, or >= 4 for a counter, >= 12 for counter + timestamp. Default is 0.
    data_offset_bytes, frame_trailer_bytes : int, optional
        Zero-filled file header and per-frame trailer. Default 0.
    timestamp_unit_s : float, optional
        Seconds per timestamp count in the header. Default is 1e-9 (nanoseconds).
    notes : object, optional
        Free-form JSON value for the manifest. Default is None.
    overwrite : bool, optional
        Replace existing files. Default is False.

    Returns
    -------
    DumpManifest
        The manifest written beside the dump.
    """
    path = Path(path)
    frames = check_frames(frames, min_frames=1)
    if frames.dtype.kind == "f":
        if not np.array_equal(frames, np.rint(frames)):
            raise ValueError("frames must hold integer codes to be written as a dump; got "
                             "non-integer floats")
    t, r, c = frames.shape
    fmin = int(frames.min())
    fmax = int(frames.max())
    if fmin < 0:
        raise ValueError(f"frames must hold codes >= 0 for a dump; got a minimum of {fmin}")
    if container_bits is None:
        container_bits = 8 if (fmax < 256 and (value_bits is None or value_bits <= 8)) else 16
    if value_bits is None:
        value_bits = container_bits
    if fmax >= (1 << int(value_bits)):
        raise ValueError(f"frames hold codes up to {fmax}, beyond value_bits={value_bits} "
                         f"(max {(1 << int(value_bits)) - 1})")
    counter_f = ts_f = None
    stamps_in_manifest = None
    header_bytes = int(frame_header_bytes)
    if timestamps_s is not None:
        ts = np.asarray(timestamps_s, dtype=np.float64)
        if ts.shape != (t,):
            raise ValueError(f"timestamps_s must have shape ({t},) (one per frame); got {ts.shape}")
        if not np.isfinite(ts).all():
            raise ValueError("timestamps_s contains NaN or inf values")
    else:
        ts = None
    if header_bytes:
        if header_bytes < 4:
            raise ValueError(f"frame_header_bytes must be 0 or >= 4 (room for a uint32 counter); "
                             f"got {header_bytes}")
        counter_f = HeaderField(0, "uint32", byte_order)
        if ts is not None and header_bytes >= 12:
            ts_f = HeaderField(4, "uint64", byte_order, float(timestamp_unit_s))
    if ts is not None and ts_f is None:
        stamps_in_manifest = tuple(float(v) for v in ts)
    man = DumpManifest(
        rows=r, columns=c, data_file=path.name, pitch_um=float(pitch_um),
        container_bits=int(container_bits), value_bits=int(value_bits), byte_order=byte_order,
        alignment=alignment, order=order, data_offset_bytes=int(data_offset_bytes),
        frame_header_bytes=header_bytes, frame_trailer_bytes=int(frame_trailer_bytes),
        counter=counter_f, timestamp=ts_f,
        frame_rate_hz=None if frame_rate_hz is None else float(frame_rate_hz),
        timestamps_s=stamps_in_manifest, n_frames=t, transpose=bool(transpose),
        flip_along=bool(flip_along), flip_across=bool(flip_across), notes=notes)
    stored = frames.astype(np.uint64)
    if flip_along:
        stored = stored[:, ::-1, :]
    if flip_across:
        stored = stored[:, :, ::-1]
    if transpose:
        stored = stored.transpose(0, 2, 1)
    if order == "column_major":
        stored = stored.transpose(0, 2, 1)
    stored = np.ascontiguousarray(stored).reshape(t, r * c)
    if alignment == "high":
        stored = stored << np.uint64(man.container_bits - man.value_bits)
    samples = stored.astype(man.sample_dtype).view(np.uint8).reshape(t, -1)
    block = np.zeros((t, man.frame_bytes), dtype=np.uint8)
    block[:, header_bytes:header_bytes + samples.shape[1]] = samples
    if counter_f is not None:
        if counters is None:
            if ts is not None and frame_rate_hz:
                cnt = np.rint((ts - ts[0]) * float(frame_rate_hz)).astype(np.int64)
            else:
                cnt = np.arange(t, dtype=np.int64)
        else:
            cnt = np.asarray(counters, dtype=np.int64)
            if cnt.shape != (t,):
                raise ValueError(f"counters must have shape ({t},); got {cnt.shape}")
        block[:, 0:4] = np.mod(cnt, 1 << 32).astype(counter_f.dtype).view(np.uint8).reshape(t, 4)
    if ts_f is not None:
        if np.any(ts < 0):
            raise ValueError("timestamps_s must be >= 0 to be stored as header counts")
        counts = np.rint(ts / ts_f.unit_s).astype(np.uint64)
        block[:, 4:12] = counts.astype(ts_f.dtype).view(np.uint8).reshape(t, 8)
    man_path = path.with_suffix(".json")
    if man_path == path:
        raise ValueError(f"path must not end in .json (the manifest goes there); got {str(path)!r}")
    if not overwrite:
        for p in (path, man_path):
            if p.exists():
                raise OutputExistsError(f"output {str(p)!r} exists already; pass overwrite=True "
                                        "(--force on the command line) to replace it")
    with atomic_output(path, overwrite=overwrite) as fh:
        fh.write(b"\0" * int(data_offset_bytes))
        fh.write(block.tobytes())
    man.save(man_path, overwrite=overwrite)
    return man


def _npz_header(npz):
    for key in ("header", "header_json", "meta", "metadata"):
        if key in npz.files:
            try:
                text = str(npz[key][()]) if npz[key].ndim == 0 else str(npz[key].tobytes(), "utf-8")
                d = json.loads(text)
            except (ValueError, UnicodeDecodeError, RecursionError) as exc:
                raise FormatError(f"npz key {key!r} is not a JSON header: {exc}") from None
            if isinstance(d, dict):
                return d
    return {}


def _read_npz(path, min_frames):
    # Open the file ourselves so that it is closed even when numpy cannot parse it.
    bad = Exception      # zipfile and numpy's header parser raise many kinds on garbage
    with open(path, "rb") as fh:
        try:
            npz = np.load(fh, allow_pickle=False)
        except bad as exc:
            raise FormatError(f"{str(path)!r} is not a readable .npz archive: {exc}") from None
        if not hasattr(npz, "files"):
            raise FormatError(f"{str(path)!r} holds a single array, not an .npz archive")
        with npz:
            if "frames" not in npz.files:
                raise FormatError(f"{str(path)!r} has no 'frames' array (keys: {sorted(npz.files)})")
            try:
                frames = npz["frames"]
                header = _npz_header(npz)
                stamps = None
                for key in ("timestamps_s", "times_s"):
                    if key in npz.files:
                        stamps = np.asarray(npz[key])
                        break
            except bad as exc:
                raise FormatError(f"{str(path)!r}: damaged array data: {exc}") from None
            files = list(npz.files)
    kind = "capture" if ("true_image" in files or header.get("kind") == "capture"
                         or "positions" in files) else "npz"
    pitch = header.get("pitch_um")
    rate = header.get("frame_rate_hz")
    if isinstance(header.get("sensor"), Mapping):
        pitch = pitch if pitch is not None else header["sensor"].get("pitch_um")
    if isinstance(header.get("motion"), Mapping):
        rate = rate if rate is not None else header["motion"].get("frame_rate_hz")
    pitch = _header_number(pitch, "pitch_um", path)
    rate = _header_number(rate, "frame_rate_hz", path)
    return frames, stamps, pitch, rate, kind, header.get("notes")


def _header_number(v, name, path):
    if v is None:
        return None
    if isinstance(v, bool) or not isinstance(v, numbers.Real) or not (math.isfinite(v) and v > 0):
        raise FormatError(f"{str(path)!r}: header entry {name!r} must be a number > 0; got {v!r}")
    return float(v)


def read_frames(path, *, manifest=None, min_frames=2):
    """Read a frame stack from ``.npy``, ``.npz`` (``frames`` key, or a simulator capture) or a
    raw dump with its manifest.

    Parameters
    ----------
    path : path-like
        ``.npy``, ``.npz``, a manifest ``.json``, or a dump (any other suffix; its manifest
        is found beside it).
    manifest : path-like or DumpManifest, optional
        For a dump: the manifest to use. Default is None.
    min_frames : int, optional
        Fewest frames accepted. Default is 2.

    Returns
    -------
    FrameStack

    Raises
    ------
    FormatError
        Unreadable or inconsistent file, wrong shape or dtype, NaN/inf, too few frames or rows.
    FileNotFoundError
        The file (or a dump's manifest) does not exist.
    """
    path = Path(path)
    if not path.exists():
        raise FileNotFoundError(f"input {str(path)!r} does not exist")
    suffix = path.suffix.lower()
    if suffix not in (".npy", ".npz"):
        return read_dump(path, manifest=manifest, min_frames=min_frames)
    if suffix == ".npy":
        try:
            with open(path, "rb") as fh:
                frames = np.load(fh, allow_pickle=False)
        except Exception as exc:   # numpy's header parser raises many kinds on garbage
            raise FormatError(f"{str(path)!r} is not a readable .npy array (pickled object "
                              f"arrays are refused): {exc}") from None
        stamps, pitch, rate, kind, notes = None, None, None, "npy", None
    else:
        frames, stamps, pitch, rate, kind, notes = _read_npz(path, min_frames)
    try:
        frames = check_frames(frames, name=f"frames in {path.name}", min_frames=min_frames)
    except (ValueError, TypeError) as exc:
        raise FormatError(str(exc)) from None
    dropped = (np.zeros(0, int), np.zeros(0, int))
    if stamps is not None:
        stamps = np.asarray(stamps)
        if stamps.dtype.kind not in "uif" or stamps.shape != (frames.shape[0],):
            raise FormatError(f"{str(path)!r}: timestamps must be ({frames.shape[0]},) numbers; "
                              f"got dtype {stamps.dtype}, shape {stamps.shape}")
        stamps = stamps.astype(np.float64)
        if not np.isfinite(stamps).all():
            raise FormatError(f"{str(path)!r}: timestamps contain NaN or inf")
        dropped = _dropped_from_times(stamps, rate, str(path), "timestamps")
    if rate is None and stamps is not None:
        rate = 1.0 / float(np.median(np.diff(stamps)))
    return FrameStack(frames=frames, pitch_um=pitch, frame_rate_hz=rate, timestamps_s=stamps,
                      dropped_after=dropped[0], dropped_count=dropped[1], source=str(path),
                      kind=kind, notes=notes)


def write_npy(path, frames, *, overwrite=False):
    """Write a (T, R, C) frame stack as ``.npy`` (atomically, no pickle)."""
    frames = check_frames(frames, min_frames=1)
    with atomic_output(path, overwrite=overwrite) as fh:
        np.save(fh, np.ascontiguousarray(frames), allow_pickle=False)


def write_npz(path, frames, *, pitch_um=50.8, frame_rate_hz=None, timestamps_s=None,
              notes=None, overwrite=False):
    """Write a frame stack as ``.npz``: ``frames``, optional ``timestamps_s`` and a JSON
    ``header`` (format, version, pitch_um, frame_rate_hz, axis0 = "along_swipe", notes).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "f.npz"
    >>> write_npz(p, np.zeros((3, 4, 5), np.uint8), pitch_um=50.8, frame_rate_hz=2000.0)
    >>> s = read_frames(p)
    >>> s.frames.shape, s.pitch_um, s.frame_rate_hz
    ((3, 4, 5), 50.8, 2000.0)
    """
    frames = check_frames(frames, min_frames=1)
    header = {"format": NPZ_FORMAT, "version": 1, "axis0": "along_swipe",
              "pitch_um": check_positive(pitch_um, name="pitch_um"),
              "frame_rate_hz": check_positive(frame_rate_hz, name="frame_rate_hz", allow_none=True),
              "notes": notes}
    arrays = {"frames": np.ascontiguousarray(frames), "header": np.array(json.dumps(_plain(header)))}
    if timestamps_s is not None:
        ts = np.asarray(timestamps_s, dtype=np.float64)
        if ts.shape != (frames.shape[0],):
            raise ValueError(f"timestamps_s must have shape ({frames.shape[0]},); got {ts.shape}")
        arrays["timestamps_s"] = ts
    with atomic_output(path, overwrite=overwrite) as fh:
        np.savez_compressed(fh, **arrays)


# ----------------------------------------------------------------------------------------------
# images
# ----------------------------------------------------------------------------------------------

def scale_to_uint(image, *, bits=16, percentiles=(0.5, 99.5), background=0, limits=None):
    """Scale a float image with NaN holes to unsigned integers, robustly.

    Parameters
    ----------
    image : (H, W) array_like
        Values in any unit; NaN where there is no data.
    bits : {8, 16}, optional
        Output depth. Default is 16.
    percentiles : (2,) tuple of float, optional
        Percentiles of the finite values mapped to code 1 and to the top code
        (2**bits - 1); values beyond are clipped. Default is (0.5, 99.5).
    background : int, optional
        Code written where ``image`` is NaN. Default is 0 (so data occupies codes 1..top).
    limits : (2,) tuple of float, optional
        Use these values instead of the percentiles. Default is None.

    Returns
    -------
    codes : (H, W) ndarray of uint8 or uint16
    scaling : dict
        ``method``, ``percentiles``, ``low``, ``high`` (image values at code 1 and the top
        code), ``bits``, ``background``: what to state in the output metadata.

    Notes
    -----
    ``code = 1 + round((v - low) / (high - low) * (2**bits - 2))`` clipped to
    ``[1, 2**bits - 1]``, NaN -> ``background``. Percentile limits keep a few hot or dead
    plates from compressing the ridge contrast (common practice in image display).

    Examples
    --------
    >>> codes, s = scale_to_uint([[0.0, 1.0], [2.0, np.nan]], bits=8, percentiles=(0, 100))
    >>> codes.tolist(), s["low"], s["high"]
    ([[1, 128], [255, 0]], 0.0, 2.0)
    """
    img = np.asarray(image, dtype=np.float64)
    if img.ndim != 2:
        raise ValueError(f"image must have shape (H, W); got shape {img.shape}")
    if bits not in (8, 16):
        raise ValueError(f"bits must be 8 or 16; got {bits!r}")
    top = (1 << bits) - 1
    bg = int(background)
    if not 0 <= bg <= top:
        raise ValueError(f"background must be a code in [0, {top}]; got {background!r}")
    finite = np.isfinite(img)
    if limits is None:
        p = tuple(float(v) for v in percentiles)
        if len(p) != 2 or not 0 <= p[0] < p[1] <= 100:
            raise ValueError(f"percentiles must be (low, high) with 0 <= low < high <= 100; "
                             f"got {percentiles!r}")
        if finite.any():
            lo, hi = (float(v) for v in np.percentile(img[finite], p))
        else:
            lo, hi = 0.0, 1.0
        method = "percentile"
    else:
        lo, hi = (float(v) for v in limits)
        p = None
        method = "limits"
    if not hi > lo:
        hi = lo + 1.0
    out = np.full(img.shape, bg, dtype=np.uint8 if bits == 8 else np.uint16)
    v = (img[finite] - lo) / (hi - lo)
    out[finite] = np.clip(np.rint(1 + v * (top - 1)), 1, top).astype(out.dtype)
    scaling = {"method": method, "percentiles": p, "low": lo, "high": hi, "bits": bits,
               "background": bg, "nan_fraction": float(1 - finite.mean()) if img.size else 0.0}
    return out, scaling


def _png_chunk(tag, data):
    return (struct.pack(">I", len(data)) + tag + data
            + struct.pack(">I", zlib.crc32(tag + data) & 0xFFFFFFFF))


def _png_bytes(codes, ppm_across, ppm_along, text):
    """Encode a greyscale PNG with a pHYs chunk (PNG spec, ISO/IEC 15948:2004, 11.3.5.3)."""
    h, w = codes.shape
    depth = 8 if codes.dtype == np.uint8 else 16
    raw = codes.astype(">u2") if depth == 16 else codes
    rows = np.concatenate([np.zeros((h, 1), np.uint8),
                           np.ascontiguousarray(raw).view(np.uint8).reshape(h, -1)], axis=1)
    out = [b"\x89PNG\r\n\x1a\n",
           _png_chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, depth, 0, 0, 0, 0)),
           _png_chunk(b"pHYs", struct.pack(">IIB", int(round(ppm_across)), int(round(ppm_along)), 1))]
    for key, value in text.items():
        out.append(_png_chunk(b"tEXt", key.encode("latin-1") + b"\0" + value.encode("latin-1", "replace")))
    out.append(_png_chunk(b"IDAT", zlib.compress(rows.tobytes(), 6)))
    out.append(_png_chunk(b"IEND", b""))
    return b"".join(out)


def write_image(path, image, *, pitch_um=50.8, bits=16, percentiles=(0.5, 99.5), background=0,
                limits=None, resolution_unit="centimeter", metadata=None, overwrite=False):
    """Write a reconstructed image as TIFF or PNG with its true pixel size.

    Parameters
    ----------
    path : path-like
        ``.tif``/``.tiff`` or ``.png``.
    image : (H, W) array_like
        Float image, NaN where there is no data (scaled by :func:`scale_to_uint`), or an
        integer image written as it is (uint8/uint16).
    pitch_um : float or (2,) array_like, optional
        Pixel pitch (along = axis 0, across = axis 1) in micrometres. Default is 50.8.
    bits : {8, 16}, optional
        Default is 16.
    percentiles, background, limits : optional
        Passed to :func:`scale_to_uint`. Defaults (0.5, 99.5), 0, None.
    resolution_unit : {"centimeter", "inch"}, optional
        TIFF resolution unit. Default is "centimeter". PNG always uses pixels per metre.
    metadata : dict, optional
        Extra JSON-ready entries for the embedded description. Default is None.
    overwrite : bool, optional
        Default is False.

    Returns
    -------
    dict
        The metadata written (pitch, resolution, scaling).

    Notes
    -----
    TIFF: XResolution/YResolution (tags 282/283) = pixels per unit across/along
    (10_000 / pitch_um per cm, or 25_400 / pitch_um per inch), ResolutionUnit (296); the
    scaling goes as JSON in ImageDescription (TIFF 6.0 specification, section 8). PNG: the
    ``pHYs`` chunk holds pixels per metre (1e6 / pitch_um) with unit specifier 1 (metre), the
    scaling a ``tEXt`` chunk keyed ``stripstitch`` (PNG specification, ISO/IEC 15948).
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in (".tif", ".tiff", ".png"):
        raise ValueError(f"path must end in .tif, .tiff or .png; got {str(path)!r}")
    pitch = np.broadcast_to(np.asarray(pitch_um, dtype=np.float64), (2,)).copy()
    if not (np.isfinite(pitch).all() and (pitch > 0).all()):
        raise ValueError(f"pitch_um must be finite and > 0; got {pitch_um!r}")
    if resolution_unit not in ("centimeter", "inch"):
        raise ValueError(f"resolution_unit must be 'centimeter' or 'inch'; got {resolution_unit!r}")
    arr = np.asarray(image)
    if arr.ndim != 2 or 0 in arr.shape:
        raise ValueError(f"image must have shape (H, W) with H, W >= 1; got shape {arr.shape}")
    if arr.dtype in (np.uint8, np.uint16):
        codes, scaling = arr, {"method": "none", "bits": arr.dtype.itemsize * 8}
    elif arr.dtype.kind in "uif":
        codes, scaling = scale_to_uint(arr, bits=bits, percentiles=percentiles,
                                       background=background, limits=limits)
    else:
        raise TypeError(f"image must be real numeric; got dtype {arr.dtype}")
    per_unit = (1e4 if resolution_unit == "centimeter" else 25400.0) / pitch
    meta = {"software": "stripstitch", "pitch_um": pitch.tolist(), "axis0": "along_swipe",
            "ppi": (25400.0 / pitch).tolist(), "scaling": scaling}
    if metadata:
        meta["extra"] = _plain(dict(metadata))
    text = json.dumps(_plain(meta))
    if suffix == ".png":
        data = _png_bytes(codes, 1e6 / pitch[1], 1e6 / pitch[0], {"stripstitch": text})
        with atomic_output(path, overwrite=overwrite) as fh:
            fh.write(data)
    else:
        import tifffile
        buf = _io.BytesIO()
        tifffile.imwrite(buf, codes, photometric="minisblack",
                         resolution=(float(per_unit[1]), float(per_unit[0])),
                         resolutionunit=resolution_unit.upper(), description=text,
                         metadata=None, software="stripstitch")
        with atomic_output(path, overwrite=overwrite) as fh:
            fh.write(buf.getvalue())
    return meta


# ----------------------------------------------------------------------------------------------
# reports
# ----------------------------------------------------------------------------------------------

def write_json(path, obj, *, overwrite=False):
    """Write a JSON-ready object (numpy values converted; NaN/inf -> null), atomically."""
    text = json.dumps(_plain(obj), indent=2, allow_nan=False) + "\n"
    with atomic_output(path, overwrite=overwrite) as fh:
        fh.write(text.encode("utf-8"))


def write_csv(path, table, *, overwrite=False):
    """Write a dict of equal-length 1-D columns as CSV with a header row, atomically."""
    if not isinstance(table, Mapping) or not table:
        raise TypeError(f"table must be a non-empty dict of columns; got {type(table).__name__}")
    cols = {str(k): np.asarray(v) for k, v in table.items()}
    lengths = {k: v.shape for k, v in cols.items()}
    n = next(iter(cols.values())).shape
    if any(v.ndim != 1 or v.shape != n for v in cols.values()):
        raise ValueError(f"table columns must be 1-D of one length; got shapes {lengths}")
    buf = _io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(list(cols))
    for row in zip(*(c.tolist() for c in cols.values())):
        w.writerow([repr(v) if isinstance(v, float) else v for v in row])
    with atomic_output(path, overwrite=overwrite) as fh:
        fh.write(buf.getvalue().encode("utf-8"))


def write_trajectory_csv(path, result, *, timestamps_s=None, first_frame=0, overwrite=False):
    """Write a reconstruction's trajectory (frame, along_px, across_px, angle_deg, confidence,
    and time_s when known) as CSV.

    ``first_frame`` (default 0) is added to the frame numbers, for a reconstruction of a
    trimmed stack whose frame 0 is frame ``first_frame`` of the input."""
    table = dict(result.trajectory_table())
    table["frame"] = np.asarray(table["frame"]) + int(first_frame)
    if timestamps_s is not None:
        table["time_s"] = np.asarray(timestamps_s, dtype=np.float64)
    write_csv(path, table, overwrite=overwrite)


# read-only view of manifest defaults for documentation tools
MANIFEST_DEFAULTS = MappingProxyType({"pitch_um": 50.8, "container_bits": 8, "byte_order": "little",
                                      "alignment": "low", "order": "row_major"})
