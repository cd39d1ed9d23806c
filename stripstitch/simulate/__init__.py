"""Ground-truth simulator: synthetic fingers, capacitive front end, swipe motion, capture.

:func:`swipe` makes one simulated swipe in one call; the pieces (:func:`make_finger`,
:class:`Sensor`, :func:`make_motion`, :func:`capture`) can be combined by hand, e.g. to reuse
one finger over many swipes. Synthetic prints are for testing only.
"""

from __future__ import annotations

import numpy as np

from .capture import CONTACT_THRESHOLD, Capture, capture
from .finger import (PATTERNS, SKINS, Finger, make_finger, orientation_field, texture_finger,
                     with_crease)
from .frontend import EPS0_F_M, K_B_J_K, Layer, Readout, Sensor, SensorUnit
from .motion import Motion, make_motion

__all__ = ["PATTERNS", "SKINS", "orientation_field", "Readout", "EPS0_F_M", "K_B_J_K",
           "make_finger", "Finger", "Sensor", "Layer", "SensorUnit", "make_motion", "Motion",
           "capture", "Capture", "swipe", "swipe_extent_um", "texture_finger", "with_crease"]


def swipe_extent_um(finger, sensor, *, margin_um=250.0):
    """Start point and length of a swipe that enters before the contact pad and exits past it.

    Parameters
    ----------
    finger : Finger
        Its ``contact`` map (>= 0.5 on the pad) locates the pad.
    sensor : Sensor
        The strip (its along-swipe half-length is added at both ends).
    margin_um : float, optional
        Extra travel beyond the pad at each end. Default is 250.0.

    Returns
    -------
    start_um : (2,) ndarray
        Finger point under the sensor centre at the start: half a sensor plus the margin
        before the pad's fingertip edge, across the pad's centre.
    length_mm : float
        Travel to half a sensor plus the margin past the pad's far edge.
    """
    pad = np.asarray(finger.contact) >= CONTACT_THRESHOLD
    spacing = float(finger.spacing_um)
    if not pad.any():
        raise ValueError("finger has no contact pad (contact >= 0.5 nowhere); give length_mm explicitly")
    rows = np.flatnonzero(pad.any(1))
    cols = np.nonzero(pad)[1]
    half = 0.5 * sensor.n_rows * sensor.pitch_um + float(margin_um)
    start = np.array([rows[0] * spacing - half, cols.mean() * spacing])
    length_mm = ((rows[-1] - rows[0]) * spacing + 2 * half) / 1e3
    return start, length_mm


def swipe(pattern="right_loop", *, profile="constant", n_rows=8, n_cols=192, frame_rate_hz=4000.0,
          speed_mm_s=100.0, snr_db=30.0, skew_deg=0.0, rotation_deg=0.0, stalls=(), backtracks=(),
          too_fast=(), finger_size_mm=(20.0, 14.0), length_mm=None, drop_frames=(), tremor_um=None,
          stretch_um=0.0, exposure_s=None, exposure_steps=4, pressure=0.5, skin="normal", finger=None,
          sensor=None, rng=None):
    """Simulate one swipe in one call: finger, sensor, motion and capture.

    Parameters
    ----------
    pattern : str, optional
        Pattern class of the synthetic finger (see ``finger.PATTERNS``). Default is "right_loop".
    profile : {"constant", "accel_decel", "human"}, optional
        Speed profile (see :func:`make_motion`). Default is "constant".
    n_rows, n_cols : int, optional
        Strip geometry (rows along the swipe). Defaults are 8 and 192.
    frame_rate_hz : float, optional
        Default is 4000.0.
    speed_mm_s : float, optional
        Mean swipe speed (unsourced modelling assumption: 20-300 mm/s, nominal 100).
        Default is 100.0.
    snr_db : float or None, optional
        Target SNR (see :func:`capture`); None keeps the sensor's noise. Default is 30.0.
    skew_deg, rotation_deg : float, optional
        Slanted swipe and in-plane rotation. Defaults are 0.0.
    stalls, backtracks, too_fast, drop_frames : sequences, optional
        Incidents (see :func:`make_motion`; positions in mm of travel from the start).
        Defaults are ().
    finger_size_mm : (float, float), optional
        Finger grid size (along, across). Default is (20.0, 14.0).
    length_mm : float or None, optional
        Travel of the sensor centre. None: from half a sensor plus 0.25 mm before the
        contact pad to as far past it (finger entry and exit; :func:`swipe_extent_um`);
        a number: that travel, starting at the same point. Default is None.
    tremor_um, stretch_um, exposure_s : optional
        Passed to :func:`make_motion`. Defaults are None, 0.0, None.
    exposure_steps : int, optional
        Sub-steps averaged within each exposure (see :func:`capture`; 1 is fastest).
        Default is 4.
    pressure : float, optional
        Finger pressure in [0, 1]. Default is 0.5.
    skin : {"normal", "dry", "wet"}, optional
        Default is "normal".
    finger : Finger or None, optional
        Use this finger instead of making one (``pattern``, ``finger_size_mm``, ``pressure``
        and ``skin`` are then ignored). Default is None.
    sensor : Sensor or None, optional
        Use this sensor design instead of ``Sensor(n_rows=n_rows, n_cols=n_cols)``.
        Default is None.
    rng : None, int or numpy.random.Generator, optional
        One seed for everything (finger, motion, fixed pattern, noise). Default is None.

    Returns
    -------
    Capture

    Examples
    --------
    >>> cap = swipe(n_rows=8, n_cols=64, finger_size_mm=(8.0, 6.0), rng=0)
    >>> cap.frames.shape[1:], cap.frames.dtype.name, round(cap.snr_db, 6)
    ((8, 64), 'uint8', 30.0)
    >>> bool(cap.contact[0] == 0 and cap.contact.max() == 1.0)   # finger entry, full contact
    True
    """
    rng = np.random.default_rng(rng)
    seeds = rng.integers(0, 2 ** 63 - 1, size=4)
    if sensor is None:
        sensor = Sensor(n_rows=n_rows, n_cols=n_cols)
    elif not isinstance(sensor, Sensor):
        raise TypeError(f"sensor must be a Sensor or None; got {type(sensor).__name__}")
    if finger is None:
        finger = make_finger(pattern, size_mm=finger_size_mm, pressure=pressure, skin=skin, rng=seeds[0])
    start, pad_length_mm = swipe_extent_um(finger, sensor)
    motion = make_motion(profile, frame_rate_hz=frame_rate_hz, speed_mm_s=speed_mm_s,
                         length_mm=pad_length_mm if length_mm is None else length_mm, start_um=start,
                         skew_deg=skew_deg, rotation_deg=rotation_deg, stalls=stalls, backtracks=backtracks,
                         too_fast=too_fast, drop_frames=drop_frames, tremor_um=tremor_um, stretch_um=stretch_um,
                         exposure_s=exposure_s, n_rows=sensor.n_rows, pitch_um=sensor.pitch_um, rng=seeds[1])
    return capture(finger, sensor, motion, snr_db=snr_db, exposure_steps=exposure_steps, rng=seeds[2])
