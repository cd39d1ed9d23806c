"""Result types shared by the reconstruction stages: frozen dataclasses of numpy arrays."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any, Mapping

import numpy as np

__all__ = [
    "Event",
    "QualityReport",
    "Reconstruction",
    "ReconstructionError",
    "LowOverlapWarning",
    "EVENT_KINDS",
]

#: Event kinds the reconstruction reports. ``gap``: no usable overlap between neighbouring
#: frames (too fast, or dropped frames); ``stall``: the finger stood still; ``backtrack``: the
#: finger moved against the swipe direction; ``low_confidence``: placements that cannot be
#: trusted (e.g. ridges parallel to the swipe); ``skew``: a slanted swipe; ``rotation``: the
#: finger turned; ``no_contact``: frames with no finger on the sensor (arrival, lift-off).
EVENT_KINDS = ("gap", "stall", "backtrack", "low_confidence", "skew", "rotation", "no_contact")


class ReconstructionError(RuntimeError):
    """No meaningful image can be made from the frames (e.g. no finger in any frame)."""


class LowOverlapWarning(UserWarning):
    """Recoverable trouble: little usable overlap between frames."""


def _frozen_array(value, dtype=np.float64):
    arr = np.array(value, dtype=dtype)          # own copy: the caller's array stays untouched
    arr.flags.writeable = False
    return arr


def _plain(value):
    """Convert numpy scalars/arrays and nested containers to JSON-ready Python values."""
    if isinstance(value, Mapping):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return _plain(value.tolist())
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not np.isfinite(value):
        return None
    return value


@dataclass(frozen=True, eq=False)
class Event:
    """Something that happened during the swipe, over frames ``first_frame..last_frame``.

    Attributes
    ----------
    kind : str
        One of :data:`EVENT_KINDS`.
    first_frame, last_frame : int
        Inclusive frame range.
    details : Mapping
        Kind-specific figures (e.g. ``missing_rows`` for a gap, ``distance_px`` for a
        backtrack), plain Python values.
    """

    kind: str
    first_frame: int
    last_frame: int
    details: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self):
        if self.kind not in EVENT_KINDS:
            raise ValueError(f"kind must be one of {EVENT_KINDS}; got {self.kind!r}")
        object.__setattr__(self, "first_frame", int(self.first_frame))
        object.__setattr__(self, "last_frame", int(self.last_frame))
        object.__setattr__(self, "details", MappingProxyType(dict(self.details)))

    def to_dict(self):
        return {"kind": self.kind, "first_frame": self.first_frame,
                "last_frame": self.last_frame, "details": _plain(dict(self.details))}


@dataclass(frozen=True, eq=False)
class QualityReport:
    """Summary of a reconstruction that a driver could show a user.

    Attributes
    ----------
    verdict : str
        ``"usable"`` or ``"unusable"``.
    reasons : tuple of str
        Plain-language reasons behind the verdict and warnings (empty for a clean swipe).
    swipe_length_mm : float
        Along-swipe extent of finger surface covered by the image.
    travel_mm : float
        Total path length the finger travelled over the sensor (backtracks count twice).
    duration_s : float
        Time from the first to the last frame with finger contact.
    speed_mm_s : Mapping
        ``mean``, ``median``, ``p95``, ``max`` of the along-swipe speed (mm/s) over frames in contact.
    skew_deg : float
        Angle of the swipe path against the sensor's along-swipe axis (0 = straight).
    rotation_deg : float
        In-plane rotation of the last frame in contact relative to frame 0.
    coverage : float
        Fraction of the image's bounding box inside the finger's swept band that holds data.
    n_gaps, gap_rows : int, float
        Number of gaps and rows (sensor pitch) missing in them.
    frames_in_contact : tuple of int
        (first, last) frame with the finger on the sensor.
    mean_confidence : float
        Mean placement confidence over frames in contact.
    counts : Mapping
        Number of events of each kind.
    """

    verdict: str
    reasons: tuple
    swipe_length_mm: float
    travel_mm: float
    duration_s: float
    speed_mm_s: Mapping[str, float]
    skew_deg: float
    rotation_deg: float
    coverage: float
    n_gaps: int
    gap_rows: float
    frames_in_contact: tuple
    mean_confidence: float
    counts: Mapping[str, int]

    def __post_init__(self):
        object.__setattr__(self, "reasons", tuple(self.reasons))
        object.__setattr__(self, "speed_mm_s", MappingProxyType(dict(self.speed_mm_s)))
        object.__setattr__(self, "counts", MappingProxyType(dict(self.counts)))
        object.__setattr__(self, "frames_in_contact", tuple(int(v) for v in self.frames_in_contact))

    @property
    def usable(self) -> bool:
        return self.verdict == "usable"

    def to_dict(self):
        out = {}
        for f in dataclasses.fields(self):
            v = getattr(self, f.name)
            out[f.name] = _plain(dict(v) if isinstance(v, Mapping) else v)
        return out


@dataclass(frozen=True, eq=False)
class Reconstruction:
    """A stitched fingerprint image with the trajectory and an account of the swipe.

    Attributes
    ----------
    image : (H, W) ndarray of float64
        Fused image; axis 0 runs along the swipe; NaN where nothing was seen. Values are in
        the input's units after fixed-pattern correction (not rescaled).
    positions : (T, 2) ndarray of float64
        (along, across) position of each frame's centre relative to frame 0, in sensor
        pixels, in frame 0's axes; ``positions[0] == (0, 0)``. If
        ``frames[t+1][r, c] ~ frames[t][r + d, c + e]`` then
        ``positions[t+1] - positions[t] ~ (d, e)``.
    angles : (T,) ndarray of float64
        In-plane rotation of each frame relative to frame 0, degrees (counter-clockwise in
        (axis 0, axis 1) coordinates, i.e. ``R = [[cos, -sin], [sin, cos]]``).
    confidence : (T,) ndarray of float64
        In [0, 1]: how far each frame's placement can be trusted (0: not placed from data).
    events : tuple of Event
        What happened, in frame order.
    report : QualityReport
        Summary and verdict.
    weight : (H, W) ndarray of float64
        Sum of fusion weights behind each image pixel (0 where NaN).
    origin_px : (2,) ndarray of float64
        Image index (row, col) of frame 0's plate (0, 0). With output pitch equal to the
        sensor pitch, frame-0 pixel (r, c) sits at ``image[r + origin_px[0], c + origin_px[1]]``.
    pitch_um : (2,) ndarray of float64
        Output pixel pitch (along, across) in micrometres.
    sensor_pitch_um : float
        The sensor's plate pitch in micrometres.
    frame_rate_hz : float
        Frame rate used for speeds and durations (nominal, or from timestamps).
    options : Mapping
        The options the reconstruction ran with.
    """

    image: np.ndarray
    positions: np.ndarray
    angles: np.ndarray
    confidence: np.ndarray
    events: tuple
    report: QualityReport
    weight: np.ndarray
    origin_px: np.ndarray
    pitch_um: np.ndarray
    sensor_pitch_um: float
    frame_rate_hz: float
    options: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self):
        for name in ("image", "positions", "angles", "confidence", "weight", "origin_px", "pitch_um"):
            object.__setattr__(self, name, _frozen_array(getattr(self, name)))
        object.__setattr__(self, "events", tuple(self.events))
        object.__setattr__(self, "options", MappingProxyType(dict(self.options)))
        object.__setattr__(self, "sensor_pitch_um", float(self.sensor_pitch_um))
        object.__setattr__(self, "frame_rate_hz", float(self.frame_rate_hz))
        t = self.positions.shape[0]
        if self.positions.shape != (t, 2) or self.angles.shape != (t,) or self.confidence.shape != (t,):
            raise ValueError("positions, angles and confidence must have shapes (T, 2), (T,), (T,); got "
                             f"{self.positions.shape}, {self.angles.shape}, {self.confidence.shape}")

    @property
    def ppi(self):
        """Output resolution (along, across) in pixels per inch."""
        return 25400.0 / self.pitch_um

    def events_of(self, kind):
        """Events of one kind, in frame order."""
        return tuple(e for e in self.events if e.kind == kind)

    def trajectory_table(self):
        """Per-frame table as a dict of 1-D arrays: frame, along_px, across_px, angle_deg, confidence."""
        return {
            "frame": np.arange(self.positions.shape[0]),
            "along_px": self.positions[:, 0].copy(),
            "across_px": self.positions[:, 1].copy(),
            "angle_deg": self.angles.copy(),
            "confidence": self.confidence.copy(),
        }
