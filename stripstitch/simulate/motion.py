"""Swipe motion: a time-parameterised trajectory of the finger over the strip sensor.

In: a speed profile and the swipe's incidents (stalls, backtracks, too-fast segments, dropped
frames, skew, rotation). Out: a :class:`Motion` sampled at the frame times, evaluable at any time
(for exposure sub-steps), with the truth events it contains.

Coordinates. The motion says which point of the finger surface lies under the sensor's centre
(``centre_um``, micrometres in the finger grid's coordinates: (along, across) from the centre of
grid cell (0, 0), axis 0 from the fingertip towards the base) and how the sensor's axes are turned
against the finger's axes (``angle_deg``). The sensor travels along the finger towards
increasing axis-0 coordinates, so the finger's own (along) coordinate under a fixed plate grows
with time: in the library's frame convention ``positions[:, 0]`` increases for a forward swipe.

Swipe speeds. No sourced value for human swipe speed exists (REFERENCE-VALUES.md section 7); the
defaults follow an explicit, **unsourced modelling assumption**: speeds of 2-30 cm/s with a
nominal 10 cm/s (100 mm/s) and a 15-20 mm swipe. Tremor frequency (8-12 Hz) and amplitude (about
ten micrometres) are likewise modelling assumptions (from memory: physiological hand tremor lies
in the 8-12 Hz band).
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any, Mapping

import numpy as np

from .._types import Event
from .._validate import check_choice, check_in_range, check_int, check_positive

__all__ = ["Motion", "make_motion", "PROFILES"]

#: Speed profiles understood by :func:`make_motion`.
PROFILES = ("constant", "accel_decel", "human")

# Knots per frame period on the piecewise-linear path timeline (time resolution of the motion).
_KNOTS_PER_FRAME = 8
# accel_decel: speed = mean * (1 - a cos(2 pi t / D)): from 0.2x to 1.8x the mean, never zero.
_ACCEL_DEPTH = 0.8
# human: relative rms of the smooth random speed variation and the lowest relative speed.
_HUMAN_SPEED_RMS = 0.2
_HUMAN_SPEED_FLOOR = 0.3
_HUMAN_TREMOR_UM = 10.0        # unsourced modelling assumption (see module docstring)


def _rot(angle_deg):
    """Rotation matrices Rot(th) = [[cos, -sin], [sin, cos]], shape (..., 2, 2)."""
    th = np.deg2rad(np.asarray(angle_deg, dtype=np.float64))
    c, s = np.cos(th), np.sin(th)
    return np.stack([np.stack([c, -s], -1), np.stack([s, c], -1)], -2)


def _frozen(value, dtype=np.float64):
    arr = np.array(value, dtype=dtype)
    arr.flags.writeable = False
    return arr


@dataclass(frozen=True, eq=False)
class Motion:
    """A swipe trajectory sampled at the frame times (build it with :func:`make_motion`).

    Attributes
    ----------
    times_s : (T,) ndarray of float64
        Frame times (mid-exposure), seconds; dropped frames leave their times out, so the
        spacing skips.
    centre_um : (T, 2) ndarray of float64
        Finger-surface point (along, across) under the sensor's centre, micrometres in the
        finger grid's coordinates.
    angle_deg : (T,) ndarray of float64
        Rotation of the sensor axes relative to the finger axes, degrees.
    frame_rate_hz : float
        Frame rate.
    exposure_s : float
        Integration time per frame, centred on each frame time.
    events : tuple of Event
        Truth events (``stall``, ``backtrack``, ``gap``, ``skew``, ``rotation``) in delivered
        frame numbers, gaps judged for the geometry ``n_rows`` x ``pitch_um``.
    frame_index : (T,) ndarray of int64
        Frame counter of each delivered frame (skips where frames were dropped).
    knot_times_s, knot_travel_um : (K,) ndarray of float64
        The path: signed travel along the swipe direction (micrometres) at these times,
        linear in between. Backtracks make the travel go down and up again.
    start_um : (2,) ndarray of float64
        Finger point under the sensor centre at travel 0.
    skew_deg, rotation_deg : float
        Swipe direction against the finger's axis 0, and total in-plane rotation.
    tremor_um, tremor_hz : float
        Tremor amplitude along the swipe (half of it across) and frequency.
    tremor_phase : (2,) ndarray of float64
        Tremor phases (along, across), radians.
    stretch_um : float
        Peak elastic skin displacement (0: rigid finger).
    stretch_modes : (M, 6) ndarray of float64
        Skin-stretch field modes: (time-law index, k_along, k_across [rad/um], phase,
        amplitude along, amplitude across).
    duration_s : float
        Time from the start of the motion to its end.
    n_rows : int
        Sensor rows used to judge gaps in ``events``.
    pitch_um : float
        Plate pitch used to judge gaps in ``events``.
    params : Mapping
        The options :func:`make_motion` ran with (plain values).
    """

    times_s: np.ndarray
    centre_um: np.ndarray
    angle_deg: np.ndarray
    frame_rate_hz: float
    exposure_s: float
    events: tuple
    frame_index: np.ndarray
    knot_times_s: np.ndarray
    knot_travel_um: np.ndarray
    start_um: np.ndarray
    skew_deg: float = 0.0
    rotation_deg: float = 0.0
    tremor_um: float = 0.0
    tremor_hz: float = 10.0
    tremor_phase: np.ndarray = field(default_factory=lambda: np.zeros(2))
    stretch_um: float = 0.0
    stretch_modes: np.ndarray = field(default_factory=lambda: np.zeros((0, 6)))
    duration_s: float = 0.0
    n_rows: int = 8
    pitch_um: float = 50.8
    params: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self):
        for name in ("times_s", "centre_um", "angle_deg", "knot_times_s", "knot_travel_um",
                     "start_um", "tremor_phase", "stretch_modes"):
            object.__setattr__(self, name, _frozen(getattr(self, name)))
        object.__setattr__(self, "frame_index", _frozen(self.frame_index, np.int64))
        for name in ("frame_rate_hz", "exposure_s", "skew_deg", "rotation_deg", "tremor_um",
                     "tremor_hz", "stretch_um", "duration_s", "pitch_um"):
            object.__setattr__(self, name, float(getattr(self, name)))
        object.__setattr__(self, "n_rows", int(self.n_rows))
        object.__setattr__(self, "events", tuple(self.events))
        object.__setattr__(self, "params", MappingProxyType(dict(self.params)))
        t = self.times_s.shape[0]
        if self.centre_um.shape != (t, 2) or self.angle_deg.shape != (t,) or self.frame_index.shape != (t,):
            raise ValueError("times_s, centre_um, angle_deg and frame_index must have shapes (T,), (T, 2), "
                             f"(T,), (T,); got {self.times_s.shape}, {self.centre_um.shape}, "
                             f"{self.angle_deg.shape}, {self.frame_index.shape}")

    @property
    def n_frames(self):
        """Number of delivered frames."""
        return int(self.times_s.shape[0])

    @property
    def direction(self):
        """Unit vector (along, across) of the swipe direction in finger coordinates."""
        th = math.radians(self.skew_deg)
        return np.array([math.cos(th), math.sin(th)])

    def travel_um(self, t_s):
        """Signed travel along the swipe direction at times ``t_s``.

        Linear between knots; before the first / after the last knot it continues at the
        first / last segment's speed, so exposure windows at the ends stay symmetric.
        """
        t = np.asarray(t_s, dtype=np.float64)
        kt, kp = self.knot_times_s, self.knot_travel_um
        out = np.interp(t, kt, kp)
        if kt.size >= 2:
            v0 = (kp[1] - kp[0]) / (kt[1] - kt[0])
            v1 = (kp[-1] - kp[-2]) / (kt[-1] - kt[-2])
            out = np.where(t < kt[0], kp[0] + v0 * (t - kt[0]), out)
            out = np.where(t > kt[-1], kp[-1] + v1 * (t - kt[-1]), out)
        return out

    def at(self, t_s):
        """Evaluate the motion at arbitrary times.

        Parameters
        ----------
        t_s : array_like of float
            Times in seconds; before the start / after the end the travel continues at the
            first / last speed (see :meth:`travel_um`).

        Returns
        -------
        centre_um : (N, 2) ndarray of float64
            Finger point under the sensor centre.
        angle_deg : (N,) ndarray of float64
            Sensor axes relative to the finger axes.
        """
        t = np.atleast_1d(np.asarray(t_s, dtype=np.float64)).ravel()
        centre = self.start_um + self.travel_um(t)[:, None] * self.direction
        if self.tremor_um > 0:
            w = 2 * np.pi * self.tremor_hz * t
            centre = centre + np.stack([self.tremor_um * np.sin(w + self.tremor_phase[0]),
                                        0.5 * self.tremor_um * np.sin(w + self.tremor_phase[1])], -1)
        if self.duration_s > 0:
            frac = np.clip(t / self.duration_s, 0.0, 1.0)
        else:
            frac = np.zeros_like(t)
        angle = self.rotation_deg * 0.5 * (1.0 - np.cos(np.pi * frac))     # smooth ramp 0 -> total
        return centre, angle

    def velocity_um_s(self, t_s):
        """True velocity (along, across) of the finger point under the sensor centre, um/s.

        The path's slope at each time (one-sided at knots: the segment that starts there)
        along the swipe direction, plus the tremor's derivative; shape (N, 2).
        """
        t = np.atleast_1d(np.asarray(t_s, dtype=np.float64)).ravel()
        kt, kp = self.knot_times_s, self.knot_travel_um
        slope = np.diff(kp) / np.diff(kt)
        i = np.clip(np.searchsorted(kt, t, side="right") - 1, 0, slope.size - 1)
        vel = slope[i][:, None] * self.direction
        if self.tremor_um > 0:
            w = 2 * np.pi * self.tremor_hz
            vel = vel + np.stack([self.tremor_um * w * np.cos(w * t + self.tremor_phase[0]),
                                  0.5 * self.tremor_um * w * np.cos(w * t + self.tremor_phase[1])], -1)
        return vel

    def stretch_displacement_um(self, points_um, t_s):
        """Elastic skin displacement (along, across) in micrometres at finger points and times.

        Parameters
        ----------
        points_um : (..., 2) array_like
            Finger points (along, across), micrometres.
        t_s : array_like
            Times, broadcastable against ``points_um[..., 0]``.

        Returns
        -------
        (..., 2) ndarray of float64
            Zero everywhere when ``stretch_um == 0``.
        """
        p = np.asarray(points_um, dtype=np.float64)
        out = np.zeros(p.shape, dtype=np.float64)
        if self.stretch_um == 0 or self.stretch_modes.shape[0] == 0:
            return out
        t = np.asarray(t_s, dtype=np.float64)
        frac = np.clip(t / self.duration_s, 0.0, 1.0) if self.duration_s > 0 else np.zeros_like(t)
        # Two time laws: friction builds up (ramp) and a slower stick-slip swell (bump).
        laws = (0.5 * (1.0 - np.cos(np.pi * np.minimum(frac / 0.3, 1.0))), np.sin(np.pi * frac))
        for law, ka, kc, ph, aa, ac in self.stretch_modes:
            wave = np.cos(ka * p[..., 0] + kc * p[..., 1] + ph) * laws[int(law)]
            out[..., 0] += aa * wave
            out[..., 1] += ac * wave
        return out

    def positions_px(self, pitch_um=None):
        """Truth positions (T, 2) in sensor pixels in frame 0's axes (library convention).

        ``positions[t] = Rot(-angle_0) (centre_t - centre_0) / pitch``.
        """
        pitch = self.pitch_um if pitch_um is None else check_positive(pitch_um, name="pitch_um")
        d = self.centre_um - self.centre_um[0]
        return (d @ _rot(self.angle_deg[0])) / pitch      # row-vector form of Rot(-a0) d

    def angles_deg(self):
        """Truth angles (T,) in degrees relative to frame 0 (library convention)."""
        return self.angle_deg - self.angle_deg[0]

    def gap_events(self, n_rows, pitch_um):
        """Gap events for a sensor of ``n_rows`` rows at ``pitch_um``.

        A delivered frame k >= 1 is behind a gap when its along-swipe travel from frame k-1
        (frame 0's axes) is at least ``n_rows`` rows (no overlap left) or when frames were
        dropped between them. Runs of such frames make one event over frames
        ``k_first - 1 .. k_last``; ``details`` holds ``missing_rows`` (rows never seen,
        sum of max(0, |step| - n_rows)), ``dropped_frames`` and ``max_step_rows``.
        """
        n_rows = check_int(n_rows, name="n_rows", lo=1)
        pitch = check_positive(pitch_um, name="pitch_um")
        if self.n_frames < 2:
            return ()
        step = np.abs(np.diff(self.positions_px(pitch)[:, 0]))
        dropped = np.diff(self.frame_index) - 1
        flag = (step >= n_rows) | (dropped > 0)
        events = []
        k = 0
        while k < flag.size:
            if not flag[k]:
                k += 1
                continue
            j = k
            while j + 1 < flag.size and flag[j + 1]:
                j += 1
            run = slice(k, j + 1)
            events.append(Event("gap", k, j + 1, {
                "missing_rows": float(np.maximum(step[run] - n_rows, 0.0).sum()),
                "dropped_frames": int(dropped[run].sum()),
                "max_step_rows": float(step[run].max()),
            }))
            k = j + 1
        return tuple(events)

    def events_for(self, n_rows, pitch_um):
        """All truth events with gaps judged for a sensor of ``n_rows`` rows at ``pitch_um``."""
        other = [e for e in self.events if e.kind != "gap"]
        return tuple(sorted(other + list(self.gap_events(n_rows, pitch_um)),
                            key=lambda e: (e.first_frame, e.last_frame, e.kind)))


def _check_tuples(value, *, name, sizes, what):
    """Return ``value`` as a list of float tuples, each of one of the lengths in ``sizes``."""
    if isinstance(value, (str, bytes)) or not hasattr(value, "__iter__"):
        raise TypeError(f"{name} must be a sequence of tuples {what}; got {type(value).__name__} {value!r}")
    out = []
    for i, item in enumerate(value):
        if isinstance(item, (str, bytes)) or not hasattr(item, "__len__") or len(item) not in sizes:
            raise ValueError(f"{name}[{i}] must be a tuple {what}; got {item!r}")
        vals = []
        for v in item:
            if isinstance(v, bool) or not isinstance(v, numbers.Real) or not math.isfinite(float(v)):
                raise ValueError(f"{name}[{i}] must hold finite numbers {what}; got {item!r}")
            vals.append(float(v))
        out.append(tuple(vals))
    return out


def _base_speed(profile, speed_mm_s, length_um, frame_rate_hz, rng):
    """Base progress p(tau) of the profile: returns (p knots, speed at knots, base duration)."""
    v = speed_mm_s * 1e3                                    # um/s
    dur = length_um / v
    if profile == "constant":
        return None, v, dur
    n = max(64, int(math.ceil(dur * frame_rate_hz * _KNOTS_PER_FRAME)))
    if profile == "accel_decel":
        tau = np.linspace(0.0, dur, n + 1)
        speed = v * (1.0 - _ACCEL_DEPTH * np.cos(2 * np.pi * tau / dur))
        p = v * (tau - _ACCEL_DEPTH * dur / (2 * np.pi) * np.sin(2 * np.pi * tau / dur))
        p[-1] = length_um
        return p, speed, dur
    # human: smooth random speed variation (a few slow sinusoids), floored; integrated to L.
    n_modes = 4
    freq = rng.uniform(0.5, 4.0, n_modes) / dur
    phase = rng.uniform(0.0, 2 * np.pi, n_modes)
    amp = rng.uniform(0.5, 1.0, n_modes)
    amp *= _HUMAN_SPEED_RMS * math.sqrt(2.0) / np.sqrt(np.sum(amp ** 2))
    tau = np.linspace(0.0, 4.0 * dur, 4 * n + 1)
    rel = 1.0 + np.sum(amp[:, None] * np.sin(2 * np.pi * freq[:, None] * tau + phase[:, None]), 0)
    speed = v * np.maximum(rel, _HUMAN_SPEED_FLOOR)
    p = np.concatenate([[0.0], np.cumsum(0.5 * (speed[1:] + speed[:-1]) * np.diff(tau))])
    end = int(np.searchsorted(p, length_um))
    p, speed = p[: end + 1].copy(), speed[: end + 1].copy()
    p[-1] = length_um
    return p, speed, float(tau[end])


def make_motion(profile="constant", *, frame_rate_hz=4000.0, speed_mm_s=100.0, length_mm=16.0,
                start_um=(2000.0, 7000.0), skew_deg=0.0, rotation_deg=0.0, stalls=(),
                backtracks=(), too_fast=(), drop_frames=(), tremor_um=None, stretch_um=0.0,
                exposure_s=None, n_rows=8, pitch_um=50.8, rng=None):
    """Make a swipe trajectory sampled at the frame times.

    Parameters
    ----------
    profile : {"constant", "accel_decel", "human"}, optional
        Speed profile. ``"constant"``: ``speed_mm_s`` throughout. ``"accel_decel"``: a smooth
        bell, speed = mean x (1 - 0.8 cos(2 pi t / D)), from 0.2x to 1.8x the mean.
        ``"human"``: smooth random speed variation (relative rms 0.2, floored at 0.3x) plus
        tremor. Default is "constant".
    frame_rate_hz : float, optional
        Frame rate. Default is 4000.0.
    speed_mm_s : float, optional
        Mean speed of the forward swipe before incidents (unsourced modelling assumption:
        20-300 mm/s, nominal 100 mm/s). Default is 100.0.
    length_mm : float, optional
        Forward travel of the sensor centre over the finger. Default is 16.0.
    start_um : (2,) array_like, optional
        Finger point (along, across) under the sensor centre at the start, micrometres in
        the finger grid's coordinates. Start before the contact pad and travel past it to
        get finger entry and exit (frames with partial or no contact). Default is
        (2000.0, 7000.0): 2 mm from the fingertip, across the middle of a 14 mm finger.
    skew_deg : float, optional
        Slanted swipe: direction of travel against the finger's axis 0, so that
        atan(across / along) of the travel equals it; in (-60, 60). Default is 0.0.
    rotation_deg : float, optional
        In-plane rotation accumulated smoothly over the swipe (raised-cosine ramp from 0).
        Default is 0.0.
    stalls : sequence of (position_mm, duration_s), optional
        When the forward travel reaches ``position_mm`` the finger stands still for
        ``duration_s``. Default is ().
    backtracks : sequence of (position_mm, distance_mm), optional
        At ``position_mm`` the finger reverses by ``distance_mm`` (raised-cosine excursion,
        peak reverse speed equal to the forward speed on the way in), then continues. Default is ().
    too_fast : sequence of (start_mm, length_mm[, speed_mm_s]), optional
        Stretches of the forward travel covered at ``speed_mm_s`` (default: 1.5 x ``n_rows``
        rows per frame, i.e. gaps). Default is ().
    drop_frames : sequence of int, optional
        Frame counters (1 .. N-1) removed from the output; times keep their true values, so
        they skip. Default is ().
    tremor_um : float or None, optional
        Tremor amplitude along the swipe (half of it across) at a random 8-12 Hz; None means
        10 um for "human" and 0 otherwise (unsourced modelling assumption). Default is None.
    stretch_um : float, optional
        Peak slow elastic skin displacement (a smooth field of 4-12 mm wavelengths, mostly
        along the swipe, building up as friction drags the skin); 0 switches it off.
        Default is 0.0.
    exposure_s : float or None, optional
        Integration time per frame (centred on the frame time), at most one frame period;
        None means half a frame period. Default is None.
    n_rows : int, optional
        Sensor rows, used to flag gap events (along travel >= n_rows between frames) and the
        default too-fast speed. Default is 8.
    pitch_um : float, optional
        Plate pitch for the same purpose. Default is 50.8.
    rng : None, int or numpy.random.Generator, optional
        Randomness for the human profile, tremor and stretch. Default is None.

    Returns
    -------
    Motion

    Notes
    -----
    The forward path is built as speed against travel, v(p), so that incidents can be placed
    by position; times follow from t(p) = integral dp / v(p), evaluated exactly for piecewise
    constant speed. Stalls and backtracks are then inserted in time. Speed changes at stalls,
    backtracks and too-fast segments are abrupt (the position stays continuous).

    Examples
    --------
    >>> m = make_motion(frame_rate_hz=1000.0, speed_mm_s=50.8, length_mm=1.0)
    >>> m.n_frames, bool(np.allclose(np.diff(m.positions_px()[:, 0]), 1.0))
    (20, True)
    """
    profile = check_choice(profile, PROFILES, name="profile")
    fr = check_positive(frame_rate_hz, name="frame_rate_hz")
    speed = check_positive(speed_mm_s, name="speed_mm_s")
    # Positions along the swipe are checked against the length as given (mm): converted to
    # um and back it can round below a position placed exactly at its end.
    length_mm_f = check_positive(length_mm, name="length_mm")
    length_um = length_mm_f * 1e3
    start = np.asarray(start_um, dtype=np.float64) if not isinstance(start_um, str) else None
    if start is None or start.shape != (2,) or not np.isfinite(start).all():
        raise ValueError(f"start_um must be a finite (along, across) pair in micrometres; got {start_um!r}")
    skew = check_in_range(skew_deg, -60.0, 60.0, name="skew_deg")
    if abs(skew) == 60.0:
        raise ValueError(f"skew_deg must be in (-60, 60); got {skew_deg!r}")
    rotation = check_in_range(rotation_deg, -90.0, 90.0, name="rotation_deg")
    n_rows = check_int(n_rows, name="n_rows", lo=1)
    pitch = check_positive(pitch_um, name="pitch_um")
    tremor = check_positive(tremor_um, name="tremor_um", allow_zero=True, allow_none=True)
    stretch = check_positive(stretch_um, name="stretch_um", allow_zero=True)
    exposure = check_positive(exposure_s, name="exposure_s", allow_zero=True, allow_none=True)
    if exposure is None:
        exposure = 0.5 / fr
    if exposure > 1.0 / fr * (1 + 1e-12):
        raise ValueError(f"exposure_s must be at most one frame period (1/frame_rate_hz = {1.0 / fr!r} s); "
                         f"got {exposure_s!r}")
    stall_list = _check_tuples(stalls, name="stalls", sizes=(2,), what="(position_mm, duration_s)")
    for i, (pos, dur) in enumerate(stall_list):
        if not (0.0 <= pos <= length_mm_f) or dur <= 0:
            raise ValueError(f"stalls[{i}] must have 0 <= position_mm <= length_mm ({length_mm_f}) and "
                             f"duration_s > 0; got {stalls[i]!r}")
    back_list = _check_tuples(backtracks, name="backtracks", sizes=(2,), what="(position_mm, distance_mm)")
    for i, (pos, dist) in enumerate(back_list):
        if not (0.0 <= pos <= length_mm_f) or dist <= 0:
            raise ValueError(f"backtracks[{i}] must have 0 <= position_mm <= length_mm ({length_mm_f}) and "
                             f"distance_mm > 0; got {backtracks[i]!r}")
    fast_list = _check_tuples(too_fast, name="too_fast", sizes=(2, 3), what="(start_mm, length_mm[, speed_mm_s])")
    default_fast = 1.5 * n_rows * pitch * fr / 1e3           # mm/s: 1.5 x n_rows rows per frame
    fast = []
    for i, item in enumerate(fast_list):
        s0, ln = item[0], item[1]
        vf = item[2] if len(item) == 3 else default_fast
        if not (0.0 <= s0 <= length_mm_f) or ln <= 0 or vf <= 0:
            raise ValueError(f"too_fast[{i}] must have 0 <= start_mm <= length_mm ({length_mm_f}), length_mm > 0 "
                             f"and speed_mm_s > 0; got {too_fast[i]!r}")
        fast.append((s0 * 1e3, min((s0 + ln) * 1e3, length_um), vf * 1e3))
    if isinstance(drop_frames, (str, bytes)) or not hasattr(drop_frames, "__iter__"):
        raise TypeError(f"drop_frames must be a sequence of frame counters; got {type(drop_frames).__name__}")
    drops = sorted({check_int(d, name="drop_frames[]") for d in drop_frames})
    rng = np.random.default_rng(rng)

    # 1. Forward path: speed against travel, v(p), including too-fast overrides.
    p_base, v_base, base_dur = _base_speed(profile, speed, length_um, fr, rng)
    n_knots = max(16, int(math.ceil(base_dur * fr * _KNOTS_PER_FRAME)))
    cuts = [b for seg in fast for b in seg[:2]] + [p * 1e3 for p, _ in stall_list] + [p * 1e3 for p, _ in back_list]
    grid = np.union1d(np.linspace(0.0, length_um, n_knots + 1), np.clip(cuts, 0.0, length_um))
    mids = 0.5 * (grid[1:] + grid[:-1])
    v_mid = np.full(mids.shape, v_base) if p_base is None else np.interp(mids, p_base, v_base)
    for s0, s1, vf in fast:
        v_mid[(mids >= s0) & (mids <= s1)] = vf
    t_fwd = np.concatenate([[0.0], np.cumsum(np.diff(grid) / v_mid)])

    def local_speed(p):
        """Speed of the forward path on its way into travel p (the approach speed)."""
        i = int(np.clip(np.searchsorted(grid, p, side="left") - 1, 0, v_mid.size - 1))
        return float(v_mid[i])

    # 2. Insert stalls and backtracks in time, in order of position.
    incidents = sorted([(p * 1e3, 0, d) for p, d in stall_list] + [(p * 1e3, 1, d * 1e3) for p, d in back_list],
                       key=lambda x: (x[0], x[1]))
    kt, kp = [], []
    windows = []                        # (kind, t_first, t_last, details)
    offset = 0.0
    lo = 0
    for p_e, kind, amount in incidents:
        hi = int(np.searchsorted(grid, p_e, side="left"))
        kt.append(t_fwd[lo:hi] + offset)
        kp.append(grid[lo:hi])
        t_e = float(np.interp(p_e, grid, t_fwd)) + offset
        if kind == 0:
            kt.append(np.array([t_e, t_e + amount]))
            kp.append(np.array([p_e, p_e]))
            windows.append(("stall", t_e, t_e + amount,
                            {"position_mm": p_e / 1e3, "duration_s": amount}))
            offset += amount
        else:
            period = math.pi * amount / local_speed(p_e)      # peak reverse speed = local speed
            m = max(16, int(math.ceil(period * fr * _KNOTS_PER_FRAME)))
            tau = np.linspace(0.0, period, m + 1)
            kt.append(t_e + tau)
            kp.append(p_e - amount * 0.5 * (1.0 - np.cos(2 * np.pi * tau / period)))
            windows.append(("backtrack", t_e, t_e + period / 2,
                            {"position_mm": p_e / 1e3, "distance_mm": amount / 1e3,
                             "distance_px": amount / pitch, "duration_s": period}))
            offset += period
        lo = hi
        while lo < grid.size and grid[lo] <= p_e:
            lo += 1
    kt.append(t_fwd[lo:] + offset)
    kp.append(grid[lo:])
    knot_t = np.concatenate(kt)
    knot_p = np.concatenate(kp)
    keep = np.concatenate([[True], np.diff(knot_t) > 0])       # np.interp wants increasing times
    knot_t, knot_p = knot_t[keep], knot_p[keep]
    duration = float(knot_t[-1])

    # 3. Frames, tremor, stretch.
    n_all = int(math.floor(duration * fr + 1e-9)) + 1
    if drops and (drops[0] < 1 or drops[-1] > n_all - 1):
        raise ValueError(f"drop_frames must hold frame counters in [1, {n_all - 1}] for this swipe of {n_all} "
                         f"frames; got {list(drop_frames)!r}")
    index = np.setdiff1d(np.arange(n_all), np.asarray(drops, dtype=np.int64))
    if index.size < 2:
        raise ValueError(f"the swipe must deliver at least 2 frames; got {index.size} "
                         f"(duration {duration!r} s at {fr!r} Hz, {len(drops)} dropped)")
    times = index / fr
    if tremor is None:
        tremor = _HUMAN_TREMOR_UM if profile == "human" else 0.0
    tremor_hz = float(rng.uniform(8.0, 12.0))
    tremor_phase = rng.uniform(0.0, 2 * np.pi, 2)
    modes = np.zeros((0, 6))
    if stretch > 0:
        n_modes = 3
        wavelength = rng.uniform(4000.0, 12000.0, (2, n_modes))
        heading = rng.uniform(0.0, np.pi, (2, n_modes))
        k = 2 * np.pi / wavelength
        rows = []
        for law in range(2):
            w = rng.uniform(0.5, 1.0, n_modes)
            w *= (1.0 if law == 0 else 0.5) / w.sum()          # |field| <= 1.5 (along); scaled below
            for j in range(n_modes):
                rows.append((law, k[law, j] * math.cos(heading[law, j]), k[law, j] * math.sin(heading[law, j]),
                             rng.uniform(0.0, 2 * np.pi), w[j], 0.3 * w[j]))
        modes = np.array(rows)
        modes[:, 4:] *= stretch / 1.5
        modes[:, 4:] *= np.array([math.cos(math.radians(skew)), 1.0])   # mostly along the drag

    params = {"profile": profile, "frame_rate_hz": fr, "speed_mm_s": speed, "length_mm": length_mm_f,
              "start_um": start.tolist(), "skew_deg": skew, "rotation_deg": rotation,
              "stalls": [list(s) for s in stall_list], "backtracks": [list(b) for b in back_list],
              "too_fast": [[s0 / 1e3, (s1 - s0) / 1e3, vf / 1e3] for s0, s1, vf in fast],
              "drop_frames": drops, "tremor_um": tremor, "stretch_um": stretch, "exposure_s": exposure,
              "n_rows": n_rows, "pitch_um": pitch}
    proto = Motion(times_s=times, centre_um=np.zeros((times.size, 2)), angle_deg=np.zeros(times.size),
                   frame_rate_hz=fr, exposure_s=exposure, events=(), frame_index=index,
                   knot_times_s=knot_t, knot_travel_um=knot_p, start_um=start, skew_deg=skew,
                   rotation_deg=rotation, tremor_um=tremor, tremor_hz=tremor_hz, tremor_phase=tremor_phase,
                   stretch_um=stretch, stretch_modes=modes, duration_s=duration, n_rows=n_rows,
                   pitch_um=pitch, params=params)
    centre, angle = proto.at(times)

    # 4. Truth events in delivered frame numbers.
    events = []
    for kind, t0, t1, details in windows:
        inside = np.flatnonzero((times >= t0 - 1e-12) & (times <= t1 + 1e-12))
        # A stall is observable only as a pair of frames without motion between them.
        if inside.size >= (2 if kind == "stall" else 1):
            events.append(Event(kind, inside[0], inside[-1], details))
    if skew != 0:
        events.append(Event("skew", 0, times.size - 1, {"skew_deg": skew}))
    if rotation != 0:
        events.append(Event("rotation", 0, times.size - 1, {"rotation_deg": rotation}))
    motion = Motion(times_s=times, centre_um=centre, angle_deg=angle, frame_rate_hz=fr, exposure_s=exposure,
                    events=tuple(events), frame_index=index, knot_times_s=knot_t, knot_travel_um=knot_p,
                    start_um=start, skew_deg=skew, rotation_deg=rotation, tremor_um=tremor,
                    tremor_hz=tremor_hz, tremor_phase=tremor_phase, stretch_um=stretch,
                    stretch_modes=modes, duration_s=duration, n_rows=n_rows, pitch_um=pitch, params=params)
    return Motion(**{**{f: getattr(motion, f) for f in motion.__dataclass_fields__},
                     "events": motion.events_for(n_rows, pitch)})
