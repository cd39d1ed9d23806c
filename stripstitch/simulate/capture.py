"""Capture simulation: a finger swiped over a strip sensor, with exact ground truth.

In: a finger surface (air gap and moisture maps), a sensor model (front end) and a motion.
Out: a :class:`Capture` holding the frames the sensor delivers (ADC codes) and the truth the
reconstruction is judged against (positions, angles, ideal frames, the true image of the swept
region, contact per frame and events).

The simulator is deliberately independent of the reconstruction: it imports nothing from
``stripstitch.register``, ``stripstitch.trajectory`` or ``stripstitch.mosaic``.
"""

from __future__ import annotations

import dataclasses
import io
import json
import math
import numbers
import os
import zipfile
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any, Mapping

import numpy as np
from scipy import ndimage

from .._types import Event, _plain
from .._validate import check_int, check_positive
from .motion import Motion, _rot

__all__ = ["Capture", "capture", "plate_integral_map", "FAR_GAP_UM", "CONTACT_THRESHOLD"]

#: Air gap (micrometres) assumed where no finger is under a plate (off the finger grid).
FAR_GAP_UM = 5000.0
#: A plate is "in contact" where the finger's pad footprint map is at least this.
CONTACT_THRESHOLD = 0.5
#: Format name and version written into the header of :meth:`Capture.to_npz`.
NPZ_FORMAT = "stripstitch-capture"
NPZ_VERSION = 1
# Chunk size (sample points) for the vectorised sampling, to bound memory.
_CHUNK_POINTS = 2_000_000


def _frozen(value, dtype=None):
    arr = np.array(value, dtype=dtype)
    arr.flags.writeable = False
    return arr


@dataclass(frozen=True, eq=False)
class Capture:
    """A simulated swipe: what the sensor delivered and the exact truth behind it.

    Attributes
    ----------
    frames : (T, R, C) ndarray of uint8 or uint16
        ADC codes as the sensor delivers them (noise, fixed pattern, quantisation, clipping).
    ideal_frames : (T, R, C) ndarray of float64 or None
        Codes without noise, mismatch, quantisation or clipping (None if not stored in a file).
    positions : (T, 2) ndarray of float64
        Truth (along, across) of each frame's centre relative to frame 0, sensor pixels in
        frame 0's axes (library convention); ``positions[0] == (0, 0)``.
    angles : (T,) ndarray of float64
        Truth rotation of each frame relative to frame 0, degrees.
    times_s : (T,) ndarray of float64
        Frame times (mid-exposure); they skip where frames were dropped.
    true_image : (H, W) ndarray of float64
        Ideal codes at the sensor pitch in frame 0's axes, sampled from the same
        plate-integrated map (instantaneous, rigid finger), covering every point any frame saw.
    true_origin_px : (2,) ndarray of float64
        Index in ``true_image`` of frame 0's plate (0, 0) (whole numbers): frame-0 pixel
        (r, c) is ``true_image[r + origin[0], c + origin[1]]``.
    contact : (T,) ndarray of float64
        Fraction of plates on the finger's contact pad (footprint >= 0.5) per frame.
    events : tuple of Event
        Truth events: the motion's (stall, backtrack, gap, skew, rotation) with gaps judged
        for this sensor, plus ``no_contact`` runs (frames with contact 0).
    snr_db : float
        Achieved 20 log10(std of the ideal signal over in-contact plates / noise rms).
    noise_v_rms : float
        Total output-referred random noise of the sensor used.
    finger : Finger or None
        The finger (None after :meth:`from_npz`: finger maps are not stored).
    sensor : Sensor
        The sensor model actually used (amplifier noise set for ``snr_db`` if requested).
    unit : SensorUnit
        The physical sensor realisation (fixed-pattern draws).
    motion : Motion
        The trajectory.
    finger_info : Mapping
        Plain summary of the finger (pattern, spacing, size, pressure, skin, cores, deltas).
    options : Mapping
        Options the capture ran with (exposure steps, requested SNR).
    """

    frames: np.ndarray
    ideal_frames: Any
    positions: np.ndarray
    angles: np.ndarray
    times_s: np.ndarray
    true_image: np.ndarray
    true_origin_px: np.ndarray
    contact: np.ndarray
    events: tuple
    snr_db: float
    noise_v_rms: float
    finger: Any
    sensor: Any
    unit: Any
    motion: Motion
    finger_info: Mapping[str, Any] = field(default_factory=dict)
    options: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self):
        object.__setattr__(self, "frames", _frozen(self.frames))
        if self.ideal_frames is not None:
            object.__setattr__(self, "ideal_frames", _frozen(self.ideal_frames, np.float64))
        for name in ("positions", "angles", "times_s", "true_image", "true_origin_px", "contact"):
            object.__setattr__(self, name, _frozen(getattr(self, name), np.float64))
        object.__setattr__(self, "events", tuple(self.events))
        object.__setattr__(self, "snr_db", float(self.snr_db))
        object.__setattr__(self, "noise_v_rms", float(self.noise_v_rms))
        object.__setattr__(self, "finger_info", MappingProxyType(dict(self.finger_info)))
        object.__setattr__(self, "options", MappingProxyType(dict(self.options)))
        t = self.frames.shape[0]
        if (self.frames.ndim != 3 or self.positions.shape != (t, 2) or self.angles.shape != (t,)
                or self.times_s.shape != (t,) or self.contact.shape != (t,)):
            raise ValueError("frames, positions, angles, times_s and contact must have shapes (T, R, C), (T, 2), "
                             f"(T,), (T,), (T,); got {self.frames.shape}, {self.positions.shape}, "
                             f"{self.angles.shape}, {self.times_s.shape}, {self.contact.shape}")

    @property
    def n_frames(self):
        """Number of frames T."""
        return int(self.frames.shape[0])

    @property
    def frame_rate_hz(self):
        """Nominal frame rate of the motion."""
        return float(self.motion.frame_rate_hz)

    @property
    def pitch_um(self):
        """Plate pitch of the sensor."""
        return float(self.sensor.pitch_um)

    def events_of(self, kind):
        """Truth events of one kind, in frame order."""
        return tuple(e for e in self.events if e.kind == kind)

    # ------------------------------------------------------------------ files
    def to_npz(self, path, *, ideal_frames=True, float_dtype="float64"):
        """Write the capture to ``path`` as an .npz archive (arrays + a JSON header, no pickle).

        The archive is byte-for-byte reproducible (fixed zip timestamps), so regenerated files
        can be compared by checksum.

        Parameters
        ----------
        path : str or os.PathLike
            Output file.
        ideal_frames : bool, optional
            Store the ideal frames (the largest array). Default is True.
        float_dtype : {"float64", "float32"}, optional
            Storage type of ideal frames and the true image (read back as float64).
            Default is "float64".
        """
        if float_dtype not in ("float64", "float32"):
            raise ValueError(f"float_dtype must be 'float64' or 'float32'; got {float_dtype!r}")
        arrays = {"frames": self.frames, "positions": self.positions, "angles": self.angles,
                  "times_s": self.times_s, "true_image": self.true_image.astype(float_dtype),
                  "true_origin_px": self.true_origin_px, "contact": self.contact}
        if ideal_frames and self.ideal_frames is not None:
            arrays["ideal_frames"] = self.ideal_frames.astype(float_dtype)
        for f in dataclasses.fields(self.unit):
            v = getattr(self.unit, f.name)
            if isinstance(v, np.ndarray):
                arrays["unit_" + f.name] = v
        motion_scalars = {}
        for f in dataclasses.fields(self.motion):
            v = getattr(self.motion, f.name)
            if isinstance(v, np.ndarray):
                arrays["motion_" + f.name] = v
            elif f.name not in ("events", "params"):
                motion_scalars[f.name] = v
        header = {
            "format": NPZ_FORMAT, "format_version": NPZ_VERSION, "axis0": "along_swipe",
            "pitch_um": self.pitch_um, "frame_rate_hz": self.frame_rate_hz,
            "n_frames": self.n_frames, "noise_v_rms": self.noise_v_rms,
            "snr_db": self.snr_db if math.isfinite(self.snr_db) else str(self.snr_db),   # "inf", "-inf"
            "events": [e.to_dict() for e in self.events],
            "motion_events": [e.to_dict() for e in self.motion.events],
            "motion": _plain(motion_scalars), "motion_params": _plain(dict(self.motion.params)),
            "sensor": _sensor_to_dict(self.sensor), "finger": _plain(dict(self.finger_info)),
            "options": _plain(dict(self.options)),
            "note": "synthetic fingerprint, for testing only",
        }
        arrays["header"] = np.array(json.dumps(header, sort_keys=True))
        _write_npz(path, arrays)

    @classmethod
    def from_npz(cls, path):
        """Read a capture written by :meth:`to_npz` (``finger`` is None: maps are not stored)."""
        from .frontend import Sensor, SensorUnit

        with np.load(os.fspath(path), allow_pickle=False) as data:
            arrays = {k: data[k] for k in data.files}
        if "header" not in arrays:
            raise ValueError(f"path {os.fspath(path)!r} is not a stripstitch capture archive: no 'header' entry")
        header = json.loads(str(arrays.pop("header")))
        if header.get("format") != NPZ_FORMAT:
            raise ValueError(f"path {os.fspath(path)!r} has format {header.get('format')!r}; expected {NPZ_FORMAT!r}")
        if header.get("format_version") != NPZ_VERSION:
            raise ValueError(f"path {os.fspath(path)!r} has format_version {header.get('format_version')!r}; "
                             f"this reader understands {NPZ_VERSION}")
        try:
            return cls._from_arrays(arrays, header, Sensor, SensorUnit)
        except (KeyError, TypeError) as exc:
            raise ValueError(f"path {os.fspath(path)!r} is a damaged stripstitch capture archive: {exc!r}") from exc

    @classmethod
    def _from_arrays(cls, arrays, header, Sensor, SensorUnit):
        sensor = _sensor_from_dict(header["sensor"], Sensor)
        unit_kw = {k[5:]: v for k, v in arrays.items() if k.startswith("unit_")}
        unit = SensorUnit(sensor=sensor, **unit_kw)
        motion_kw = {k[7:]: v for k, v in arrays.items() if k.startswith("motion_")}
        motion_kw.update(header["motion"])
        motion = Motion(events=tuple(_event(e) for e in header["motion_events"]),
                        params=header["motion_params"], **motion_kw)
        ideal = arrays.get("ideal_frames")
        return cls(frames=arrays["frames"], ideal_frames=ideal, positions=arrays["positions"],
                   angles=arrays["angles"], times_s=arrays["times_s"], true_image=arrays["true_image"],
                   true_origin_px=arrays["true_origin_px"], contact=arrays["contact"],
                   events=tuple(_event(e) for e in header["events"]),
                   snr_db=float(header["snr_db"]),
                   noise_v_rms=header["noise_v_rms"], finger=None, sensor=sensor, unit=unit, motion=motion,
                   finger_info=header["finger"], options=header["options"])


def _event(d):
    return Event(d["kind"], d["first_frame"], d["last_frame"], d.get("details", {}))


def _sensor_to_dict(sensor):
    out = {}
    for f in dataclasses.fields(sensor):
        v = getattr(sensor, f.name)
        if f.name == "layers":
            v = [dataclasses.asdict(layer) for layer in v]
        out[f.name] = _plain(v)
    return out


def _sensor_from_dict(d, sensor_cls):
    from .frontend import Layer

    kw = dict(d)
    if "layers" in kw:
        kw["layers"] = tuple(Layer(**layer) for layer in kw["layers"])
    for name, value in kw.items():
        if isinstance(value, list):
            kw[name] = tuple(value)
    return sensor_cls(**kw)


def _write_npz(path, arrays):
    """np.savez_compressed equivalent with fixed timestamps (byte-for-byte reproducible)."""
    path = os.fspath(path)
    tmp = path + ".tmp"
    with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        for name in sorted(arrays):
            buf = io.BytesIO()
            np.lib.format.write_array(buf, np.asarray(arrays[name]), allow_pickle=False)
            info = zipfile.ZipInfo(name + ".npy", date_time=(1980, 1, 1, 0, 0, 0))
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            zf.writestr(info, buf.getvalue(), compresslevel=6)
    os.replace(tmp, path)


# ---------------------------------------------------------------------- physics
def _box_kernel(width_cells):
    """Weights of the exact area integral of a cell-wise constant map over a centred box.

    Cell k covers [k - 1/2, k + 1/2]; the box covers [-w/2, w/2]; weight_k = overlap length,
    so fractional box edges are handled and the weights sum to w.
    """
    half = 0.5 * width_cells
    n = int(math.ceil(half + 0.5))
    k = np.arange(-n, n + 1, dtype=np.float64)
    return np.clip(np.minimum(k + 0.5, half) - np.maximum(k - 0.5, -half), 0.0, None)


def plate_integral_map(finger, sensor, *, region=None):
    """Capacitance of a plate centred on each fine-grid cell of the finger, in farads.

    The capacitance density ``sensor.capacitance_density_F_m2(air_gap_um, fluid_um)`` is
    blurred by ``sensor.blur_sigma_um`` (when ``sensor.lateral_blur``) and integrated over a
    ``sensor.plate_um`` square centred on each cell.

    Parameters
    ----------
    finger : Finger
        Needs ``air_gap_um``, ``fluid_um`` (H, W) maps and ``spacing_um``.
    sensor : Sensor
        Front-end model.
    region : (i0, i1, j0, j1) or None, optional
        Cells [i0, i1) x [j0, j1) to compute, may reach beyond the finger grid (filled with a
        far air gap of :data:`FAR_GAP_UM`). None means the whole grid. Default is None.

    Returns
    -------
    (H', W') ndarray of float64
        Plate capacitance in farads, for the cells of ``region``.

    Notes
    -----
    The map is treated as constant over each cell, so the integral is exact for plate
    centres on cell centres (box weights of :func:`_box_kernel`); between cells the
    capture interpolates it bilinearly, exact wherever no box edge crosses a density step
    between the two neighbouring cells. Fringing beyond the Gaussian blur is neglected
    (the 1-D layered parallel-plate model of the front end).

    Examples
    --------
    >>> from types import SimpleNamespace
    >>> from stripstitch.simulate.frontend import Sensor
    >>> s = Sensor()
    >>> flat = SimpleNamespace(air_gap_um=np.zeros((40, 40)), fluid_um=np.zeros((40, 40)), spacing_um=12.7)
    >>> c = plate_integral_map(flat, s)
    >>> bool(np.isclose(c[20, 20], s.plate_capacitance_F(0.0), rtol=1e-12))
    True
    """
    gap = np.asarray(finger.air_gap_um, dtype=np.float64)
    fluid = np.asarray(finger.fluid_um, dtype=np.float64)
    h, w = gap.shape
    if region is None:
        region = (0, h, 0, w)
    i0, i1, j0, j1 = (int(v) for v in region)
    g = np.full((i1 - i0, j1 - j0), FAR_GAP_UM)
    fl = np.zeros_like(g)
    a0, a1, b0, b1 = max(i0, 0), min(i1, h), max(j0, 0), min(j1, w)
    if a1 > a0 and b1 > b0:
        g[a0 - i0:a1 - i0, b0 - j0:b1 - j0] = gap[a0:a1, b0:b1]
        fl[a0 - i0:a1 - i0, b0 - j0:b1 - j0] = fluid[a0:a1, b0:b1]
    dens = np.asarray(sensor.capacitance_density_F_m2(g, fl), dtype=np.float64)
    spacing = float(finger.spacing_um)
    if sensor.lateral_blur and sensor.blur_sigma_um > 0:
        dens = ndimage.gaussian_filter(dens, sensor.blur_sigma_um / spacing, mode="nearest")
    kern = _box_kernel(float(sensor.plate_um) / spacing)
    dens = ndimage.correlate1d(dens, kern, axis=0, mode="nearest")
    dens = ndimage.correlate1d(dens, kern, axis=1, mode="nearest")
    return dens * (spacing * 1e-6) ** 2


def _check_finger(finger):
    for name in ("air_gap_um", "fluid_um", "spacing_um"):
        if not hasattr(finger, name):
            raise TypeError(f"finger must be a Finger (with air_gap_um, fluid_um, spacing_um); "
                            f"got {type(finger).__name__} without {name!r}")
    gap = np.asarray(finger.air_gap_um)
    if gap.ndim != 2 or np.asarray(finger.fluid_um).shape != gap.shape:
        raise ValueError("finger.air_gap_um and finger.fluid_um must be 2-D maps of one shape; got "
                         f"{gap.shape} and {np.asarray(finger.fluid_um).shape}")
    check_positive(finger.spacing_um, name="finger.spacing_um")


def _plate_offsets_um(sensor):
    r, c = int(sensor.n_rows), int(sensor.n_cols)
    rr, cc = np.meshgrid(np.arange(r) - (r - 1) / 2, np.arange(c) - (c - 1) / 2, indexing="ij")
    return np.stack([rr.ravel(), cc.ravel()], -1) * float(sensor.pitch_um)      # (R*C, 2)


def _plate_points(centre_um, angle_deg, offsets_um):
    """Finger points (n, P, 2) seen by plates at ``offsets_um`` (P, 2) for n sensor poses."""
    th = np.deg2rad(angle_deg)[:, None]
    c, s = np.cos(th), np.sin(th)
    u0, u1 = offsets_um[None, :, 0], offsets_um[None, :, 1]
    out = np.empty((centre_um.shape[0], offsets_um.shape[0], 2))
    out[..., 0] = centre_um[:, :1] + c * u0 - s * u1          # Rot(th) u, along
    out[..., 1] = centre_um[:, 1:] + s * u0 + c * u1          # across
    return out


def _finger_info(finger):
    info = {"spacing_um": float(finger.spacing_um), "shape": list(np.asarray(finger.air_gap_um).shape)}
    for name in ("pattern", "valley_depth_um", "pressure", "skin", "cores_um", "deltas_um"):
        if hasattr(finger, name):
            info[name] = _plain(getattr(finger, name))
    return info


def capture(finger, sensor, motion, *, snr_db=None, exposure_steps=4, rng=None):
    """Simulate the frames a strip sensor delivers while a finger is swiped over it.

    Parameters
    ----------
    finger : Finger
        Finger surface (``air_gap_um``, ``fluid_um``, ``contact`` maps at ``spacing_um``).
    sensor : Sensor
        Front-end model (rows, columns, pitch, plate size, dielectric stack, electronics).
    motion : Motion
        Trajectory, from :func:`~stripstitch.simulate.motion.make_motion`.
    snr_db : float or None, optional
        Target 20 log10(std of the ideal output over in-contact plates / total noise rms):
        the amplifier noise is set to reach it (the kT/C part stays). None keeps the
        sensor's noise. Default is None.
    exposure_steps : int, optional
        Sub-steps over which the capacitance is averaged within the exposure window (1 when
        the exposure is 0). Default is 4.
    rng : None, int or numpy.random.Generator, optional
        Randomness for the sensor realisation (fixed pattern) and the readout noise.
        Default is None.

    Returns
    -------
    Capture

    Notes
    -----
    Plate (r, c) of frame t at sub-step time tau sees the finger point
    ``centre_um(tau) + Rot(angle_deg(tau)) ((r, c) - c_f) pitch_um`` (plus the elastic skin
    displacement if the motion has one). Its capacitance is the area integral of the
    (blurred) capacitance density over the plate's square footprint, computed once per
    fine-grid cell (:func:`plate_integral_map`) and interpolated bilinearly
    (``scipy.ndimage.map_coordinates``, order 1) at the plate centre. The footprint's own
    rotation is neglected (for a 46 um plate turned by 5 degrees its corners move by
    under 3 um). The averaged capacitances go through ``sensor.realize(rng)`` and
    ``unit.readout``.

    Examples
    --------
    >>> from types import SimpleNamespace
    >>> from stripstitch.simulate.frontend import Sensor
    >>> from stripstitch.simulate.motion import make_motion
    >>> yy = np.arange(400)[:, None] * 12.7 * np.ones((1, 300))
    >>> gap = 25.0 + 25.0 * np.cos(2 * np.pi * yy / 500.0)
    >>> f = SimpleNamespace(air_gap_um=gap, fluid_um=0 * gap, contact=1 + 0 * gap, spacing_um=12.7)
    >>> m = make_motion(frame_rate_hz=1000.0, speed_mm_s=101.6, length_mm=1.0, start_um=(1500.0, 1900.0))
    >>> cap = capture(f, Sensor(n_rows=8, n_cols=32), m, exposure_steps=1, rng=0)
    >>> cap.frames.shape, cap.frames.dtype.name
    ((10, 8, 32), 'uint8')
    >>> bool(np.allclose(cap.ideal_frames[1, :-2], cap.ideal_frames[0, 2:]))
    True
    """
    _check_finger(finger)
    if not isinstance(motion, Motion):
        raise TypeError(f"motion must be a Motion (from make_motion); got {type(motion).__name__}")
    steps = check_int(exposure_steps, name="exposure_steps", lo=1, hi=64)
    if snr_db is not None:
        if isinstance(snr_db, bool) or not isinstance(snr_db, numbers.Real):
            raise TypeError(f"snr_db must be a real number of decibels or None; got {type(snr_db).__name__} "
                            f"{snr_db!r}")
        if not math.isfinite(float(snr_db)):
            raise ValueError(f"snr_db must be a finite number of decibels or None; got {snr_db!r}")
        snr_db = float(snr_db)
    rng = np.random.default_rng(rng)
    if motion.exposure_s == 0:
        steps = 1
    spacing = float(finger.spacing_um)
    pitch = float(sensor.pitch_um)
    n_r, n_c = int(sensor.n_rows), int(sensor.n_cols)
    t_count = motion.n_frames

    # Sample times: sub-steps centred in the exposure window around each frame time.
    frac = (np.arange(steps) + 0.5) / steps - 0.5
    t_sub = (motion.times_s[:, None] + motion.exposure_s * frac[None, :]).ravel()    # (T*K,)
    centre_sub, angle_sub = motion.at(t_sub)
    offsets = _plate_offsets_um(sensor)                                              # (P, 2)

    # Region of the finger grid that any plate can see (bounding box with a margin).
    sigma = float(sensor.blur_sigma_um) if sensor.lateral_blur else 0.0
    reach = (float(np.hypot(*np.abs(offsets).max(0))) + 1.5 * motion.stretch_um + 4 * sigma
             + float(sensor.plate_um) + 2 * pitch)
    lo = np.floor((centre_sub.min(0) - reach) / spacing).astype(int) - 3
    hi = np.ceil((centre_sub.max(0) + reach) / spacing).astype(int) + 4
    region = (lo[0], hi[0], lo[1], hi[1])
    cmap = plate_integral_map(finger, sensor, region=region)
    contact_map = np.asarray(getattr(finger, "contact", np.ones(np.shape(finger.air_gap_um))), dtype=np.float64)

    def sample(points_um, image, offset_cells, cval):
        idx = np.moveaxis(points_um, -1, 0).reshape(2, -1) / spacing - np.asarray(offset_cells)[:, None]
        return ndimage.map_coordinates(image, idx, order=1, mode="constant", cval=cval)

    far_c = float(sensor.capacitance_density_F_m2(np.array(FAR_GAP_UM), np.array(0.0))) * (
        float(sensor.plate_um) * 1e-6) ** 2
    sense = np.empty((t_count, n_r * n_c))
    plate_contact = np.empty((t_count, n_r * n_c))
    rot0_t = _rot(motion.angle_deg[0])                           # for frame-0 pixel coordinates
    centre0 = motion.centre_um[0]
    cf = np.array([(n_r - 1) / 2, (n_c - 1) / 2])
    # What each plate saw in frame-0 pixel coordinates (rigid part) lies inside the hull of the
    # four corner plates of every sub-step (a rotated rectangle's extremes are its corners).
    corners = offsets[[0, n_c - 1, -n_c, -1]]
    q = (_plate_points(centre_sub, angle_sub, corners) - centre0) @ rot0_t / pitch + cf
    box_lo, box_hi = q.reshape(-1, 2).min(0), q.reshape(-1, 2).max(0)
    chunk = max(1, _CHUNK_POINTS // (steps * offsets.shape[0]))
    for f0 in range(0, t_count, chunk):
        f1 = min(t_count, f0 + chunk)
        sl = slice(f0 * steps, f1 * steps)
        pts = _plate_points(centre_sub[sl], angle_sub[sl], offsets)
        if motion.stretch_um > 0:
            pts = pts + motion.stretch_displacement_um(pts, t_sub[sl, None])
        vals = sample(pts, cmap, lo, far_c).reshape(f1 - f0, steps, -1)
        sense[f0:f1] = vals.mean(1)
        pts_mid = _plate_points(motion.centre_um[f0:f1], motion.angle_deg[f0:f1], offsets)
        plate_contact[f0:f1] = sample(pts_mid, contact_map, np.zeros(2), 0.0).reshape(f1 - f0, -1)
    sense = sense.reshape(t_count, n_r, n_c)
    in_contact = (plate_contact >= CONTACT_THRESHOLD).reshape(t_count, n_r, n_c)
    contact = in_contact.reshape(t_count, -1).mean(1)

    # Noise for the requested SNR (signal: ideal amplifier output over in-contact plates).
    ideal_v = np.asarray(sensor.output_v(sense), dtype=np.float64)
    signal = ideal_v[in_contact] if in_contact.any() else ideal_v
    signal_std = float(np.std(signal))
    if signal_std <= 1e-12 * float(np.abs(signal).max(initial=0.0)):
        signal_std = 0.0                          # uniform up to rounding
    if snr_db is not None:
        ktc = float(dataclasses.replace(sensor, amp_noise_v_rms=0.0).noise_v_rms())
        if signal_std == 0:
            raise ValueError(f"snr_db cannot be met (got {snr_db!r}): the ideal signal does not vary over the "
                             "in-contact plates (a uniform finger?); pass snr_db=None")
        target = signal_std / 10.0 ** (snr_db / 20.0)
        if target < ktc:
            best = 20 * math.log10(signal_std / ktc)
            raise ValueError(f"snr_db must be at most {best:.2f} dB for this sensor and swipe (kT/C noise "
                             f"{ktc:.3e} V rms alone limits it); got {snr_db!r}")
        sensor = dataclasses.replace(sensor, amp_noise_v_rms=math.sqrt(target ** 2 - ktc ** 2))
    noise = float(sensor.noise_v_rms())
    if noise == 0:
        achieved = float("inf")
    elif signal_std == 0:
        achieved = float("-inf")
    else:
        achieved = 20 * math.log10(signal_std / noise)
    unit = sensor.realize(rng)
    readout = unit.readout(sense, rng=rng)

    # True image at the sensor pitch in frame 0's axes, from the same plate-integrated map.
    ilo = np.floor(box_lo - 1e-9).astype(int)
    ihi = np.ceil(box_hi + 1e-9).astype(int)
    gi, gj = np.meshgrid(np.arange(ilo[0], ihi[0] + 1), np.arange(ilo[1], ihi[1] + 1), indexing="ij")
    grid = (np.stack([gi, gj], -1).reshape(-1, 2) - cf) * pitch
    pts_true = centre0 + grid @ rot0_t.T
    true_c = sample(pts_true, cmap, lo, far_c).reshape(gi.shape)
    true_image = np.asarray(sensor.to_codes(sensor.output_v(true_c)), dtype=np.float64)
    origin = -ilo.astype(np.float64)

    events = list(motion.events_for(n_r, pitch))
    none = contact == 0
    k = 0
    while k < t_count:
        if none[k]:
            j = k
            while j + 1 < t_count and none[j + 1]:
                j += 1
            events.append(Event("no_contact", k, j, {"frames": j - k + 1}))
            k = j + 1
        else:
            k += 1
    events.sort(key=lambda e: (e.first_frame, e.last_frame, e.kind))
    return Capture(frames=readout.codes, ideal_frames=readout.ideal_codes, positions=motion.positions_px(pitch),
                   angles=motion.angles_deg(), times_s=motion.times_s, true_image=true_image,
                   true_origin_px=origin, contact=contact, events=tuple(events), snr_db=achieved,
                   noise_v_rms=noise, finger=finger, sensor=sensor, unit=unit, motion=motion,
                   finger_info=_finger_info(finger),
                   options={"exposure_steps": steps, "snr_db_requested": snr_db})
