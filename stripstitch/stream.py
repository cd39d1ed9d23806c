"""Streaming stitcher: frames in one at a time, final image rows and events out as they happen.

``StreamingStitcher(**options)`` takes the options of :func:`stripstitch.stitch`; ``push(frame)``
takes one (R, C) frame and returns a :class:`StreamUpdate` (image rows that are final, events
found); ``finish()`` returns the same :class:`~stripstitch.Reconstruction` type as ``stitch``.

Working memory is a fixed window (preallocated ring buffers, sizes in :meth:`memory_layout`):

* ``window_frames`` frames (raw, prepared, twice-upsampled, gradients) and the pairs among them;
* an accumulator strip of ``accumulator_rows`` x ``accumulator_cols`` output pixels (value and
  weight) that scrolls with the finger: ``window_frames * R + R + 4 + 2 * hold_rows`` rows by
  ``C + 2 * drift_cols + 2`` columns at the sensor pitch. For the default 8 x 192 strip and
  default options: 64 frames and a strip of 652 x 322 pixels, 7.3 MB in all, whatever the
  swipe's length (with ``keep_history=False``; with True the per-frame trajectory and the
  emitted rows are also kept for ``finish()``).

Accuracy (tests/test_stream.py, frames cut at known positions from a band-limited texture):
every frame within 0.25 px of the truth (measured at most 0.18 px) on steady, varying,
stalling and backtracking swipes, and within 0.25 px of ``stitch`` wherever ``stitch`` is
within 0.15 px of the truth; the image correlates >= 0.99 with the source texture.

Per batch of ``batch_frames`` new frames, on strips of 5 rows or more: the key-frame tracker of
the batch path (:class:`stripstitch.track.FrameTracker`, its filter and two key frames carried
from batch to batch) places every frame from the finger's arrival on; its placement is final
at once (the filter is causal), so the frames are fused right away. The first frames wait
(at most half a window) until their texture shows whether a finger is there yet; the
fingertip's arrival (the next half window) waits too and is tracked backwards from its
best-seen frame, as the batch path meets the ends of the swipe, and the frame tracker carries
on forwards from there. Unlike the batch path it does not push frames out across a gap.
``python benchmarks/bench_stream.py``: 6 200 frames/s in default mode and 5 700-7 800 in fast
mode on one core of a 2.0 GHz Xeon (1.4-1.9 times real time at 4 kHz; the pairwise window
path before the tracker ran at 0.36); on its simulated 8 x 192 swipe span error +0.25 %
(batch -0.04 %), image correlation with the batch image 0.96.
On shorter strips: coarse NCC search and Gauss-Newton refinement of the successive pairs and
of whole-pixel partners looking back within the window (the registration stage of the batch
path), a robust least-squares solve of the window's positions with the frames that already
left the solve held fixed, and fusion of the frames that become frozen.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np
from scipy import ndimage

from . import register as _reg
from . import report as _report
from . import track as _track
from . import trajectory as _traj
from . import mosaic as _mosaic
from .pipeline import (_EDGE_VELOCITY_FRAMES, _TRACK_MIN_ROWS, _band_edge_rows,
                       _plate_line_sums, _steady_velocity, _with_model_error, _unit_exponent)
from .pipeline import _confidence as _frame_confidence
from ._jit import JIT
from ._types import Event, Reconstruction, ReconstructionError, _frozen_array
from ._validate import check_choice, check_frame, check_int, check_positive

__all__ = ["StreamingStitcher", "StreamUpdate"]

MODES = ("default", "fast")


# Texture power (share of the typical frame's) under which a frame shows no texture at all
# (pipeline._BLANK_FRAC: the batch path's blank frame).
_BLANK_FRAC = 0.03
# Clear frames whose mean step carries a blank run (see StreamingStitcher._carry_blank).
_CARRY_FRAMES = 8
# A frame the tracker registered at this normalised cross-correlation or above is not blank,
# whatever its texture power: two noisy views of one texture correlate at s / (1 + s), s
# their signal-to-noise power ratio (0.9 at 9.5 dB, 0.97 at 15 dB), while a frame without
# texture matches noise (0.36-0.75 measured on bench_bands.py's band frames). The texture
# test alone has no floor when every frame shows texture (a finger on the strip from the
# first frame, its fixed pattern not seen alone): the quietest frame so far then reads blank
# for being the quietest, and a carry started there took a stale speed through a backtrack's
# turn (bench_independent.py's stream: -6.7 %, -2.4 %, +1.9 % of span).
_BLANK_NCC = 0.9


@dataclass(frozen=True, eq=False)
class StreamUpdate:
    """What one ``push`` (or ``finish``) made final.

    Attributes
    ----------
    rows : (K, W) ndarray of float64
        Image rows that will not change any more (NaN where no data), in output pixels; K may
        be 0. Rows come in order of ``row_index``.
    weight : (K, W) ndarray of float64
        Fusion weight behind each pixel of ``rows``.
    row_index : (K,) ndarray of int64
        Absolute output-grid row of each row (row 0 holds frame 0's plate row 0; negative
        before it). Column j of a row is absolute output column ``j + first_col``.
    first_col : int
        Absolute output column of ``rows[:, 0]`` (column 0 holds frame 0's plate column 0).
    events : tuple of Event
        Events found since the previous update (gap, stall, backtrack, low_confidence,
        no_contact with ``details["where"] == "lifted"`` when the finger left).
    frames_frozen : int
        Number of frames whose placement is final so far.
    """

    rows: np.ndarray
    weight: np.ndarray
    row_index: np.ndarray
    first_col: int
    events: tuple
    frames_frozen: int

    def __post_init__(self):
        object.__setattr__(self, "rows", _frozen_array(self.rows))
        object.__setattr__(self, "weight", _frozen_array(self.weight))
        object.__setattr__(self, "row_index", _frozen_array(self.row_index, dtype=np.int64))
        object.__setattr__(self, "events", tuple(self.events))
        object.__setattr__(self, "first_col", int(self.first_col))
        object.__setattr__(self, "frames_frozen", int(self.frames_frozen))


# Passes over the arrival's frames when they give the fixed pattern (placed, pattern fitted
# to the placement, placed again): on 24 swipes from an independent generator, all starting
# in contact, across RMS median 0.39 / 0.22 / 0.18 px with 0 / 1 / 3 passes (and the
# refreshes after the arrival; 0.89 px with neither).
_LEAD_PASSES = 3
# Fits from the residuals gathered after the arrival (each over 24 px of travel by default):
# the pattern is static, so a few settle it and more cost time (a fit takes about 1 ms on
# an 8 x 192 strip). Independent generator: across RMS median 0.177 px with no limit, 0.183
# with 7 (the stream's frame rate 0.72 -> 0.88 of that without the fit, texture frames).
_REFITS = 7
# The stream's tracker keeps the same acceleration allowance in every direction (the batch
# tracker holds the finger to its direction of travel: see track._ACC_SIDE). Tracking forward
# from the first frames, the stream meets the fingertip's partial contact before any
# well-seen frame has set the direction, and held to it there, it kept the arrival's error:
# bench_accuracy.py's stream span error median 0.147 -> 0.209 %, along 0.178 -> 0.228 px;
# bench_random.py's (seed 7000) across median 0.145 -> 0.203 px.
_TRACK_SIDEWAYS = 1.0


class _RingAtlas:
    """Stand-in for ``register._Atlas`` whose upsampled frames live in a ring buffer."""

    def __init__(self, u, r_n, c_n):
        self.u = u
        self.r_n, self.c_n = r_n, c_n


class StreamingStitcher:
    """Stitch a swipe frame by frame in bounded memory.

    Parameters
    ----------
    pitch_um : float, optional
        Plate pitch in micrometres. Default is 50.8.
    frame_rate_hz : float, optional
        Nominal frame rate (speeds, stall detection). Default None (derived from the
        timestamps given to ``push``, else times in frames).
    timestamps_s : None
        Accepted for symmetry with ``stitch``; pass per-frame times to ``push`` instead.
        Default None.
    calibration : object with ``apply(frames)``, optional
        Applied to each frame before anything else. Default None.
    mode : {"default", "fast"}
        ``"fast"`` uses fewer partners and Gauss-Newton iterations. Default "default".
    output_pitch_um : float or (2,) float, optional
        Output pitch. Default None (the sensor pitch).
    estimate_rotation : bool, optional
        Accepted for symmetry with ``stitch``; the streaming path holds angles at 0.
        Default True.
    motion_prior_px : float, optional
        Acceleration prior (px per frame squared). Default as ``stitch``.
    max_across_px : int, optional
        Largest lateral step searched between successive frames. Default C // 8 in 3..12.
    window_frames : int, optional
        Frames held for pairing and the sliding solve. Default 64.
    batch_frames : int, optional
        Frames estimated together; latency of a placement is up to ``window_frames``
        frames. Default 16.
    hold_rows : int, optional
        Output rows held behind the frames still being solved, for backtracking (a
        backtrack farther than this loses its samples on rows already handed out).
        Default 64.
    drift_cols : int, optional
        Output columns on each side of the sensor width kept for lateral drift. Default 64.
    fixed_pattern_travel_px : float, optional
        Without finger-absent frames at the start (nor a calibration), the fixed pattern is
        fitted to placed frames (see Notes) that travelled at least this far (px); None: not
        fitted (the level only is removed). Default 24.
    keep_history : bool, optional
        Keep emitted rows and the per-frame trajectory so that ``finish()`` can return a
        Reconstruction. With False, nothing grows with the swipe and ``finish()`` raises;
        use ``flush()``. Default True.

    Notes
    -----
    Fixed pattern: the per-plate mean of the finger-absent frames seen before the finger
    arrived (at least 8); with a ``calibration`` it is taken as removed. Without either (a
    finger on the strip from the first frame), strips placed by the key-frame tracker (5 rows
    and more) fit it to their placed frames: each plate's mean residual against the image
    fused from the finger's arrival (placed, fitted and placed again), then from the
    residuals of every half window, gathered until their frames travelled
    ``fixed_pattern_travel_px`` (seven such fits at most; the pairwise path, 2-5 rows, only
    these, on its frames as placed so far); a pattern constant along the columns shows only
    as far as the frames moved across. Until then only the level is removed. Contact: the spatial texture of a frame against
    the largest texture seen so far, decided when the frame is frozen.

    Examples
    --------
    >>> import numpy as np
    >>> from scipy import ndimage
    >>> tex = ndimage.gaussian_filter(np.random.default_rng(0).standard_normal((400, 64)), 2.0)
    >>> s = StreamingStitcher()
    >>> rows = sum(len(s.push(tex[2 * t: 2 * t + 8]).rows) for t in range(100))
    >>> res = s.finish()
    >>> bool(np.allclose(np.diff(res.positions[:, 0]), 2.0, atol=0.05))
    True
    """

    def __init__(self, *, pitch_um=50.8, frame_rate_hz=None, timestamps_s=None, calibration=None,
                 mode="default", output_pitch_um=None, estimate_rotation=True,
                 motion_prior_px=None, max_across_px=None, window_frames=64, batch_frames=16,
                 hold_rows=64, drift_cols=64, fixed_pattern_travel_px=24.0, keep_history=True):
        self.pitch_um = check_positive(pitch_um, name="pitch_um")
        self.frame_rate_hz = check_positive(frame_rate_hz, name="frame_rate_hz", allow_none=True)
        if timestamps_s is not None:
            raise ValueError("timestamps_s must be None for StreamingStitcher; pass each frame's "
                             "time as push(frame, timestamp_s=...)")
        self.mode = check_choice(mode, MODES, name="mode")
        if calibration is not None and not hasattr(calibration, "apply"):
            raise TypeError("calibration must have an apply(frames) method (a "
                            f"stripstitch.calibrate.Calibration); got {type(calibration).__name__}")
        self.calibration = calibration
        if output_pitch_um is None:
            self.out_pitch_um = np.array([self.pitch_um, self.pitch_um])
        else:
            self.out_pitch_um = np.broadcast_to(np.asarray(output_pitch_um, dtype=np.float64),
                                                (2,)).copy()
            for k in range(2):
                check_positive(float(self.out_pitch_um[k]), name="output_pitch_um")
        self.estimate_rotation = bool(estimate_rotation)
        self.motion_prior_px = check_positive(motion_prior_px, name="motion_prior_px",
                                              allow_none=True)
        self.max_across_px = check_int(max_across_px, name="max_across_px", lo=1,
                                       allow_none=True)
        self.window = check_int(window_frames, name="window_frames", lo=8, hi=4096)
        self.batch = check_int(batch_frames, name="batch_frames", lo=1, hi=self.window // 2)
        self.hold_rows = check_int(hold_rows, name="hold_rows", lo=0)
        self.drift_cols = check_int(drift_cols, name="drift_cols", lo=0)
        self.fixed_pattern_travel_px = check_positive(fixed_pattern_travel_px,
                                                      name="fixed_pattern_travel_px",
                                                      allow_none=True)
        self.keep_history = bool(keep_history)
        self._shape = None
        self._mats = None
        self._empty = None
        self._finished = False

    # ------------------------------------------------------------------ set-up
    def _setup(self, shape):
        r_n, c_n = shape
        if r_n < 3 or c_n < 8:
            raise ValueError(f"frame must have at least 3 rows and 8 columns; got shape {shape}")
        self._shape = (r_n, c_n)
        w = self.window
        if self.max_across_px is None:
            self.max_across_px = int(np.clip(c_n // 8, 3, 12))
        fr = self.frame_rate_hz
        if self.motion_prior_px is None:
            mp = (20.0 / fr ** 2 / (self.pitch_um * 1e-6)) if fr else 0.05
            self.motion_prior_px = float(max(mp, 1e-3))
        # Frame rings (slot = frame index % window).
        self._raw = np.zeros((w, r_n, c_n), np.float64)
        self._z = np.zeros((w, r_n, c_n), np.float32)
        self._zn = np.zeros((w, r_n, c_n), np.float32)
        self._up = np.zeros((w, 2 * r_n - 1 + 2 * _reg._PAD, 2 * c_n - 1 + 2 * _reg._PAD),
                            np.float32)
        self._g0 = np.zeros((w, r_n, c_n), np.float32)
        self._g1 = np.zeros((w, r_n, c_n), np.float32)
        self._pos = np.zeros((w, 2))
        self._time = np.zeros(w)
        self._tex = np.zeros(w)
        self._row_ms = np.zeros((w, r_n))         # each row's share of it (see _texture)
        self._row_typ = np.zeros(r_n)             # summed over clear tracked frames ...
        self._row_typ_n = 0                       # ... of which there were this many
        self._frame_info = np.zeros((w, 2, 2))
        self._okfrac = np.zeros(w)
        self._link_ok = np.ones(w, bool)          # link (t-1, t) held
        self._fz_pos = np.zeros((w, 2))           # positions of the latest frozen frames
        # Pair store: at most (n_targets + 1) pairs per frame within the window.
        self._targets = self._pick_targets(r_n)
        pmax = w * (len(self._targets) + 1)
        self._p_ij = np.zeros((pmax, 2), np.int64)   # absolute frame indices
        self._p_shift = np.zeros((pmax, 2))
        self._p_info = np.zeros((pmax, 2, 2))
        self._p_good = np.zeros(pmax, bool)
        self._n_pairs = 0
        # Accumulator strip (ring over absolute output rows).
        pr = self.pitch_um / self.out_pitch_um                 # output px per sensor px
        self._pitch_px = 1.0 / pr
        span = int(np.ceil(self.window * r_n * pr[0])) + int(np.ceil(r_n * pr[0])) + 4
        self._acc_h = span + 2 * self.hold_rows
        self._col0 = -self.drift_cols
        self._acc_w = int(np.ceil(c_n * pr[1])) + 2 * self.drift_cols + 2
        self._acc = np.zeros((self._acc_h, self._acc_w))
        self._wacc = np.zeros((self._acc_h, self._acc_w))
        self._band = None                         # [lo, hi) absolute rows live in the strip
        self._sealed = [False, False]             # rows emitted below lo / above hi
        self._dropped = 0
        # Fixed pattern and contact.
        self._lead_fp = False                     # offset taken from placed frames
        self._fp_last = 0                         # half windows gathered (the last's index)
        self._fit_n = np.zeros((r_n, c_n))        # residual sums gathered for the next fit
        self._fit_d = np.zeros((r_n, c_n))
        self._fit_travel = 0.0
        self._n_refits = 0                        # fits from gathered residuals so far
        self._blank_sum = np.zeros((r_n, c_n))
        self._blank_n = 0
        self._seen_contact = False
        self._offset = None
        self._scale = None
        self._unit_exp = None           # power of two the frames are scaled by (first push)
        self._plate_ok = np.ones((r_n, c_n), bool)
        self._sp_sum = np.zeros((r_n, c_n))       # first contact frames: per-plate sums
        self._sp_sq = np.zeros((r_n, c_n))
        self._sp_n = 0
        self._tex_hi = 0.0
        self._noise_sigma = 0.0
        # Key-frame tracker (strips of 5 rows or more, as the batch path): made at the first
        # contact, when the usable plates are known.
        self._use_tracker = r_n >= _TRACK_MIN_ROWS
        self._tracker = None
        self._sym_edges = False           # the key frames' edge filters (see _place_lead_in)
        self._tr_pos = np.zeros(2)        # position of the last placed frame
        self._tr_fr = None                # frame rate used for the tracker's times
        self._tr_prev_strong = False
        self._tr_prev_edge = False
        self._tr_armed = False
        self._tr_tex_min = np.inf         # quietest frame so far (noise and fixed pattern)
        self._tr_next = 0                 # first frame not yet placed
        self._tr_lead_done = False        # the arrival placed (tracked backwards)
        self._held_to = 0                 # frames before it held, finger-absent (see finish)
        self._tr_off = np.zeros(2)        # the frame tracker's origin in the swipe's frame
        self._lead_in = w // 2            # frames of the arrival tracked backwards
        # Blank runs (see _carry_blank): the last _CARRY_FRAMES clear placed frames (time,
        # position), and the run being carried (anchor time, anchor position, velocity).
        self._clear_hist = []
        self._carry = None
        self._after = None                # (frames left, velocity) checked after a run
        self._last_out = None             # (time, position) of the last frame placed
        # Counters.
        self._n = 0                # frames pushed
        self._n_est = 0            # frames whose pairs are estimated
        self._n_frozen = 0
        self._last_t = None
        # Online event state.
        self._ev_contact = False
        self._ev_stall_start = None
        self._ev_stall_sent = False
        self._ev_back_start = None
        self._ev_back_sent = False
        self._ev_low_start = None
        self._ev_low_sent = False
        self._ev_dir = 0.0
        self._back_from = 0.0
        # History (grows with the swipe; only with keep_history).
        self._h_pos, self._h_conf, self._h_contact, self._h_tex = [], [], [], []
        self._h_link_ok, self._h_time = [], []
        self._h_rows = []          # (row_index, values, weight)

    def _upsample(self, z):
        """``register._Atlas(z).u`` with the interpolation matrices built once."""
        if self._mats is None:
            r_n, c_n = self._shape
            self._mats = (_reg._lagrange_upsample_matrix(r_n).astype(np.float32),
                          _reg._lagrange_upsample_matrix(c_n).astype(np.float32))
        mr, mc = self._mats
        t_n, r_n, c_n = z.shape
        zr = np.tensordot(mr, z.astype(np.float32), axes=(1, 1))           # (2R-1, T, C)
        up = (zr.reshape(-1, c_n) @ mc.T).reshape(2 * r_n - 1, t_n, -1).transpose(1, 0, 2)
        return _reg._keys_extend(up)

    @staticmethod
    def _pick_targets(r_n):
        reach = max(1, min(r_n - 2, int(np.floor(0.75 * (r_n - 1)))))
        return tuple(sorted({0, 1, max(1, reach // 2), reach}))

    def memory_layout(self):
        """Sizes of the working buffers (they do not grow with the swipe).

        Returns
        -------
        dict
            ``window_frames``, ``frame_shape``, ``accumulator_rows``, ``accumulator_cols``,
            ``max_pairs`` and ``bytes`` (total of the preallocated arrays).
        """
        if self._shape is None:
            raise RuntimeError("memory_layout() needs the geometry: push a frame first")
        arrays = (self._raw, self._z, self._zn, self._up, self._g0, self._g1, self._pos,
                  self._time, self._tex, self._row_ms, self._row_typ, self._frame_info, self._okfrac, self._link_ok,
                  self._p_ij, self._p_shift, self._p_info, self._p_good, self._acc, self._wacc)
        return {"window_frames": self.window, "frame_shape": list(self._shape),
                "accumulator_rows": self._acc_h, "accumulator_cols": self._acc_w,
                "max_pairs": len(self._p_ij), "bytes": int(sum(a.nbytes for a in arrays))}

    # ------------------------------------------------------------------ public
    def push(self, frame, *, timestamp_s=None):
        """Add one frame; return the rows and events that became final.

        Parameters
        ----------
        frame : (R, C) array_like
            One raw frame, any real dtype and any unit (see :func:`stripstitch.stitch`; the
            first frame sets the power of two float frames are scaled by); the first frame
            sets the geometry.
        timestamp_s : float, optional
            The frame's time in seconds (strictly increasing). Default None (uniform).

        Returns
        -------
        StreamUpdate
        """
        if self._finished:
            raise RuntimeError("push() after finish(): start a new StreamingStitcher")
        x = check_frame(frame, shape=self._shape)
        if self._shape is None:
            self._setup(x.shape)
        if self.calibration is not None:
            x = np.asarray(self.calibration.apply(x[None]), dtype=np.float64)[0]
        if self._unit_exp is None:
            # float frames in any unit brought into the working range, exactly (see
            # pipeline._unit_exponent), by the first frame's range; the rows handed out are
            # scaled back
            self._unit_exp = _unit_exponent(x[None])
        if self._unit_exp:
            x = np.ldexp(np.asarray(x, dtype=np.float64), self._unit_exp)
        if timestamp_s is not None:
            t = check_positive(timestamp_s, name="timestamp_s", allow_zero=True)
            if self._last_t is not None and t <= self._last_t:
                raise ValueError(f"timestamp_s must be strictly increasing; got {t!r} after "
                                 f"{self._last_t!r}")
        else:
            t = float(self._n)
        if self._n == 0:
            self._uses_times = timestamp_s is not None
        elif self._uses_times != (timestamp_s is not None):
            raise ValueError("timestamp_s must be given for every frame or for none; frame "
                             f"{self._n} differs from the first")
        self._last_t = t
        s = self._n % self.window
        self._raw[s] = x
        self._time[s] = t
        self._n += 1
        events, rows = [], []
        if self._n - self._n_est >= self.batch:
            self._process(events, rows)
        return self._update(events, rows)

    def flush(self):
        """Estimate, solve, freeze and fuse everything pushed so far; return the final update.

        After ``flush()`` the stitcher is finished (no more frames).
        """
        if self._shape is None:
            raise ReconstructionError("no frames were pushed")
        events, rows = [], []
        if not self._finished:
            # (on the tracker path frames may wait prepared but unplaced: the arrival)
            if self._n > self._n_est or (self._use_tracker and self._tr_next < self._n):
                self._process(events, rows, final=True)
            else:
                self._freeze(self._n, events, rows)
                self._emit(rows, everything=True)
            self._finished = True
        return self._update(events, rows)

    def finish(self):
        """Flush and return the whole swipe as a :class:`~stripstitch.Reconstruction`.

        Events and the report are recomputed over the whole trajectory with the batch
        path's rules (``report.find_events``, ``report.make_report``).
        """
        if not self.keep_history:
            raise RuntimeError("finish() needs keep_history=True; with keep_history=False "
                               "use flush() and keep the rows handed out by push()")
        if self._shape is None:
            raise ReconstructionError("no frames were pushed")
        if self._n < 2:
            raise ReconstructionError(f"no finger found: need at least 2 frames; got {self._n}")
        self.flush()
        pos = np.array(self._h_pos).reshape(-1, 2)
        conf = np.array(self._h_conf)
        tex = np.array(self._h_tex)
        contact = self._contact_of(tex)
        # With the whole swipe seen, contact is also judged as the batch path judges it (two
        # classes of texture, register.prepare): the live reference starts from the first
        # batch, and where the finger lands after it with no fixed pattern known yet, the
        # blank frames' noise and pattern read as texture against it (bench_random.py seed
        # 7000, an 8x192 arch arriving slowly: 175 frames before full contact, 2.9 against
        # the finger's 11.6, called a stall once the key frames' edge filters held them still).
        if len(tex) >= 4:
            contact &= tex > _reg._contact_threshold(tex, 1e-12 * (float(tex.max()) + 1.0))
        if contact.sum() < 2:
            raise ReconstructionError("no finger found: fewer than two frames show finger "
                                      f"texture (of {len(tex)} frames)")
        conf = np.where(contact, conf, 0.0)
        # Before the first frame placed with any confidence (and after the last) the frames
        # were carried by the motion or held: a slowly arriving finger's faint frames, which
        # pass the relative contact test where no finger-absent frames gave the fixed
        # pattern, would read as a stall there (6 of 64 random swipes, all arriving slowly).
        # As in the batch path, such frames are not in contact (on either placement path;
        # 0.05: the fusion's weight threshold).
        placed = np.flatnonzero(conf > 0.05)
        if placed.size >= 2:
            contact[:placed[0]] = False
            contact[placed[-1] + 1:] = False
        times = np.array(self._h_time)
        # The frames before the finger's arrival (no texture yet by the live test) were held
        # where the swipe starts: placed along the trajectory by time instead, at the
        # velocity of the first tracked frames, as the batch path places frames out of
        # contact (pipeline._spread); all but frame 0, the origin of the positions and of the
        # image grid (it stays where the frames after it were placed from); over at most
        # _EDGE_VELOCITY_FRAMES frames (the frames before held where the last of them lands:
        # the arrival's speed is no guide far back). 16x128 swipes over scikit-image
        # photographs at 2 kHz: the first 3-4 frames the truth counts in contact had been
        # held, 1-3 px behind (span error of a page, counted from the first of them, -4.2 %).
        k0 = self._held_to
        if 1 < k0 < len(pos) - 1:
            k1 = min(k0 + _EDGE_VELOCITY_FRAMES - 1, len(pos) - 1)
            dt_v = times[k1] - times[k0]
            if dt_v > 0:
                v = (pos[k1] - pos[k0]) / dt_v
                back = np.maximum(times[1:k0] - times[k0],
                                  times[max(k0 - _EDGE_VELOCITY_FRAMES, 0)] - times[k0])
                pos[1:k0] = pos[k0] + back[:, None] * v[None, :]
        fr = self.frame_rate_hz
        if self._uses_times:
            dts = np.diff(times)
            if fr is None:
                fr = float(1.0 / np.median(dts))
            dt_frames = dts * fr
            times = times - times[0]
        else:
            dt_frames = np.ones(len(times) - 1)
            times = np.arange(len(times)) / fr if fr else np.arange(len(times), dtype=float)
        link_ok = np.array(self._h_link_ok, dtype=bool)
        link_failed = ~link_ok[1:] & contact[1:] & contact[:-1]
        if self._use_tracker and link_failed.any():
            # Judged live against the texture seen so far; with the whole swipe seen, a gap
            # needs clear texture on both sides by the final statistics (frames before the
            # finger arrived looked like texture then).
            strong = self._clear_texture(tex)
            link_failed &= strong[1:] & strong[:-1]
        r_n = self._shape[0]
        image, weight, origin = self._assemble()
        angles = np.zeros(len(pos))
        events = _report.find_events(positions=pos, angles_deg=angles, confidence=conf,
                                     contact=contact, link_failed=link_failed,
                                     link_dt_frames=dt_frames, times_s=times, frame_rate_hz=fr,
                                     n_rows=r_n, pitch_um=self.pitch_um)
        rep = _report.make_report(events=events, positions=pos, angles_deg=angles,
                                  confidence=conf, contact=contact, times_s=times,
                                  frame_rate_hz=fr, n_rows=r_n, pitch_um=self.pitch_um,
                                  image=image, n_plates=int(np.sum(self._plate_ok)),
                                  n_cols=int(np.asarray(self._plate_ok).any(axis=0).sum()))
        options = {"pitch_um": self.pitch_um, "frame_rate_hz": fr, "mode": self.mode,
                   "output_pitch_um": self.out_pitch_um.tolist(), "estimate_rotation": False,
                   "motion_prior_px": self.motion_prior_px, "max_across_px": self.max_across_px,
                   "timestamps": self._uses_times, "calibration": self.calibration is not None,
                   "streaming": True, "window_frames": self.window,
                   "placement": "key-frame tracker" if self._use_tracker else "pairwise window",
                   "batch_frames": self.batch, "hold_rows": self.hold_rows,
                   "drift_cols": self.drift_cols, "dropped_samples": int(self._dropped)}
        return Reconstruction(image=image, positions=pos, angles=angles, confidence=conf,
                              events=events, report=rep, weight=weight, origin_px=origin,
                              pitch_um=self.out_pitch_um, sensor_pitch_um=self.pitch_um,
                              frame_rate_hz=fr if fr else float("nan"), options=options)

    # ------------------------------------------------------------------ internals
    def _update(self, events, rows):
        c_w = self._acc_w if self._shape is not None else 0
        if not rows and not events:
            # Most pushes only fill the ring: hand back one shared empty update.
            if self._empty is None or self._empty.frames_frozen != self._n_frozen:
                self._empty = StreamUpdate(rows=np.zeros((0, c_w)), weight=np.zeros((0, c_w)),
                                           row_index=np.zeros(0, np.int64),
                                           first_col=self._col0, events=(),
                                           frames_frozen=self._n_frozen)
            return self._empty
        if rows:
            idx = np.concatenate([r[0] for r in rows])
            val = np.concatenate([r[1] for r in rows])
            wt = np.concatenate([r[2] for r in rows])
            if self.keep_history:
                self._h_rows.append((idx, val, wt))
        else:
            idx = np.zeros(0, np.int64)
            val = np.zeros((0, c_w))
            wt = np.zeros((0, c_w))
        return StreamUpdate(rows=val, weight=wt, row_index=idx,
                            first_col=self._col0 if self._shape is not None else 0,
                            events=tuple(events), frames_frozen=self._n_frozen)

    def _contact_of(self, tex):
        return tex > 0.35 * max(self._tex_hi, 1e-12)

    def _slots(self, a, b):
        return np.arange(a, b) % self.window

    def _texture(self, x, rows=False):
        """Spatial texture of frames (rms of the across-swipe high-pass), fixed pattern removed;
        with ``rows``, also each row's mean square (T, R) that it is the root mean of."""
        fp = self._blank_sum / self._blank_n if self._blank_n >= 8 else 0.0
        d = np.diff(x - fp, axis=-1)
        d *= d
        tex = np.sqrt(np.mean(d, axis=(-2, -1)))
        return (tex, np.mean(d, axis=-1)) if rows else tex

    def _prepare_batch(self, a, b):
        """Fixed pattern, contact and prepared frames for frames a..b-1 (in their slots)."""
        sl = self._slots(a, b)
        x = self._raw[sl]
        tex, ms = self._texture(x, rows=True)
        self._row_ms[sl] = ms
        # Reference texture: the largest of the first batch, then a running mean over frames
        # in contact (a running maximum would keep rising with the swipe's length).
        if self._n_est == 0 or not self._seen_contact:
            self._tex_hi = max(self._tex_hi, float(tex.max()))
        contact = self._contact_of(tex)
        if self._seen_contact and contact.any():
            self._tex_hi += min(1.0, contact.sum() / 256.0) * (float(tex[contact].mean()) -
                                                              self._tex_hi)
        self._tex[sl] = tex
        if not self._seen_contact:
            # Frames before the first contact are finger-absent: they show the fixed pattern.
            first = int(np.argmax(contact)) if contact.any() else len(contact)
            if first:
                self._blank_sum += x[:first].sum(0)
                self._blank_n += first
            if contact.any():
                self._seen_contact = True
                if self._blank_n >= 8:   # texture again, now against the blank mean
                    tex, ms = self._texture(x, rows=True)
                    self._tex[sl] = tex
                    self._row_ms[sl] = ms
                    contact = self._contact_of(tex)
        if self.calibration is not None:
            self._offset = np.full(self._shape, float(x.mean())) if self._offset is None \
                else self._offset
        elif self._offset is None or self._blank_n < 8:
            if self._blank_n >= 8:
                off = self._blank_sum / self._blank_n
            elif self._lead_fp:
                off = self._offset          # from the placed frames (see _pattern_from_placed)
            else:
                # Until frames are placed that show it: the level only (a per-plate mean
                # over frames in contact holds a static trace of the finger's texture, which
                # pulls shifts towards zero as the fixed pattern does).
                off = np.full(self._shape, float(x.mean()))
            self._offset = off
        xc = x - self._offset
        if self._scale is None and contact.any():
            # Per-plate spread over the first contact frames (raw readings: the offset is a
            # constant per plate), decided once at least 16 have been seen: from one or two
            # frames (small batches) every spread is ~0 and every plate would look dead.
            xcon = x[contact]
            self._sp_sum += xcon.sum(0)
            self._sp_sq += (xcon * xcon).sum(0)
            self._sp_n += len(xcon)
            if self._sp_n >= min(16, self.window // 2):
                mean = self._sp_sum / self._sp_n
                spread = np.sqrt(np.maximum(self._sp_sq / self._sp_n - mean * mean, 0.0))
                med = float(np.median(spread))
                self._scale = max(med, 1e-12)
                self._plate_ok = spread > 0.25 * med
        scale = self._scale if self._scale is not None else max(float(xc.std()), 1e-12)
        z = (xc / scale).astype(np.float32)
        z[:, ~self._plate_ok] = 0.0
        self._z[sl] = z
        if not self._use_tracker:            # what the pairwise path registers with
            self._zn[sl] = _reg._row_normalise(z, self._plate_ok)
            self._up[sl] = self._upsample(z)
            g0, g1 = _reg._template_gradients(z)
            self._g0[sl] = g0
            self._g1[sl] = g1
        if len(z) > 1 and not self._use_tracker:     # (the pairwise path's noise level)
            dz = np.diff(z, axis=0)[:, self._plate_ok]
            if dz.size:
                self._noise_sigma = float(np.median(np.abs(dz)) * 1.4826 / np.sqrt(2.0))
        return contact

    def _prep_obj(self):
        return _reg.Prepared(z=self._z, plate_ok=self._plate_ok,
                             offset=np.zeros(self._shape), gain=np.ones(self._shape),
                             contact=np.ones(self.window, bool), texture=self._tex,
                             noise_sigma=self._noise_sigma)

    def _process(self, events, rows, final=False):
        if self._use_tracker:
            self._process_tracked(events, rows, final)
            return
        a, b = self._n_est, self._n
        w = self.window
        fast = self.mode == "fast"
        iters = 2 if fast else 3
        contact = self._prepare_batch(a, b)
        prep = self._prep_obj()
        atlas = _RingAtlas(self._up, *self._shape)
        grads = (self._g0, self._g1)
        r_n = self._shape[0]
        max_along = r_n - 1
        mx = self.max_across_px
        lo_frame = max(0, b - w)
        # ---- successive pairs for the new frames ----
        js = np.arange(max(a, 1), b)
        steps = np.zeros((len(js), 2))
        ok = np.zeros(len(js), bool)
        if len(js):
            cp = np.stack([(js - 1) % w, js % w], 1)
            coarse, score, _ = _reg.coarse_shifts(self._zn, cp, max_along=max_along,
                                                  max_across=mx)
            if len(coarse) >= 5:
                hist = self._pos[(np.arange(max(lo_frame, a - 8), a)) % w]
                prev = np.diff(hist, axis=0) if len(hist) > 1 else np.zeros((0, 2))
                trend_src = np.concatenate([prev, coarse])
                trend = np.stack([ndimage.median_filter(trend_src[:, k], size=9, mode="nearest")
                                  for k in range(2)], 1)[len(prev):]
                free, free_score = coarse, score
                coarse, score, _ = _reg.coarse_shifts(self._zn, cp, max_along=max_along,
                                                      max_across=mx, prior=trend)
            else:
                free, free_score = coarse, score
            est = _reg.refine_shifts(prep, cp, coarse, estimate_rotation=False,
                                     iterations=iters, atlas=atlas, grads=grads)
            # Without frames ahead, the trend lags a sudden change of speed (stall ending,
            # backtrack): where the prior moved the peak, the free peak is refined too and
            # the better match kept.
            alt = np.flatnonzero(np.abs(free - coarse).max(axis=1) > 0.5)
            if len(alt):
                est2 = _reg.refine_shifts(prep, cp[alt], free[alt], estimate_rotation=False,
                                          iterations=iters, atlas=atlas, grads=grads)
                better = est2.ok & (est2.ncc > est.ncc[alt] + 0.02)
                if better.any():
                    k = alt[better]
                    est = _replace_rows(est, k, est2, better)
                    score = score.copy()
                    score[k] = free_score[k]
            ok = est.ok & (est.ncc > 0.5) & (score > 0.3)
            ok &= contact[js - a] & self._contact_of(self._tex[(js - 1) % w])
            steps = np.where(ok[:, None], est.shift, np.nan)
            self._link_ok[js % w] = ok
            self._store_pairs(np.stack([js - 1, js], 1)[ok], est.shift[ok], est.info[ok],
                              np.ones(int(ok.sum()), bool))
        if a == 0:
            self._link_ok[0] = True
            self._pos[0] = 0.0
        # Predicted positions: chain of successive steps; failed links bridged by the
        # recent median step.
        recent = self._recent_steps(lo_frame, a)
        good_steps = steps[np.isfinite(steps).all(1)]
        pool = np.concatenate([recent, good_steps]) if len(recent) or len(good_steps) else None
        fill = np.median(pool, axis=0) if pool is not None and len(pool) else np.zeros(2)
        steps = np.where(np.isfinite(steps), steps, fill)
        if len(js):
            base = self._pos[(js[0] - 1) % w]
            self._pos[js % w] = base + np.cumsum(steps, axis=0)
        # ---- partners within the window, at nearly whole-pixel displacements ----
        lp = self._partners(lo_frame, a, b)
        if len(lp):
            sl = lp % w
            pred = self._pos[sl[:, 1]] - self._pos[sl[:, 0]]
            linit, _, _ = _reg.coarse_shifts(self._zn, sl, max_along=max_along,
                                             max_across=mx + 4, prior=pred, prior_window_px=1.5)
            est = _reg.refine_shifts(prep, sl, linit, estimate_rotation=False, iterations=iters,
                                     atlas=atlas, grads=grads)
            good = est.ok & (est.ncc > 0.5) & (np.abs(est.shift - linit).max(axis=1) < 1.5)
            self._store_pairs(lp[good], est.shift[good], est.info[good], np.ones(int(good.sum()),
                                                                                  bool))
        self._n_est = b
        # ---- sliding-window solve ----
        self._solve(lo_frame, b)
        # ---- freeze and fuse ----
        upto = b if final else max(self._n_frozen, b - (w - self.batch))
        self._freeze(upto, events, rows)
        self._emit(rows, everything=final)
        self._refresh_pattern(b)      # (as placed so far: see the tracker path)

    def _process_tracked(self, events, rows, final=False):
        """New frames placed by the key-frame tracker (final at once: the filter is causal),
        then frozen and fused. Frames wait (unfrozen, in the ring) only until it is clear
        whether the finger has arrived."""
        if self._n > self._n_est:
            self._prepare_batch(self._n_est, self._n)
            self._n_est = self._n
        a, b = self._tr_next, self._n
        sl = self._slots(a, b)
        if self._scale is None and not final:
            return                  # the usable plates are not decided yet: wait (in the ring)
        # Tracking starts when the finger has arrived. The relative contact test cannot tell
        # blank frames (fixed pattern and noise only) from a finger before it has seen one, so
        # the first frames wait until their texture separates into two classes as in the
        # batch path (Otsu's threshold on log texture, class means more than 3x apart): the
        # frames before the first textured one are finger-absent. Without such a split
        # within half a window (a finger on the strip from the first frame), every waiting
        # frame is tracked.
        tex = self._tex[sl]
        self._tr_tex_min = min(self._tr_tex_min, float(tex.min())) if len(tex) else self._tr_tex_min
        start = 0
        if not self._tr_armed:
            lt = np.log(np.maximum(tex, 1e-12))
            th = _reg._blank_finger_split(lt)
            if th is not None:
                start = int(np.argmax(lt > th))
            elif not (final or b - a >= self.window // 2):
                return                                  # wait
            self._tr_armed = True
            if start:
                # finger-absent frames: placed where the swipe will start, nothing to fuse
                # (along the trajectory in finish())
                self._place_tracked(a, a + start, tracked=False)
                self._tr_next = a = a + start
                self._held_to = a
                self._freeze(a, events, rows)
        if not self._tr_lead_done:
            # The fingertip's arrival is held back (in the ring, rows waiting too) and tracked
            # backwards from its best-seen frame, as the batch path meets the ends: from the
            # first faint frames forwards, the filter's velocity is not yet settled where the
            # partial contact gives little across the ridges, and the placement slides (the
            # suite's steady 8x192 swipe: 2 px across while contact rose from 0.3 to 0.7).
            # Half a window of frames is held (a batch is at most half a window, so the ring
            # never overflows).
            if b - a < self._lead_in and not final:
                return
            held = min(b - a, self._lead_in)
            if held:
                base, strong0 = self._tr_pos.copy(), self._tr_prev_strong
                edge0, typ0 = self._tr_prev_edge, (self._row_typ.copy(), self._row_typ_n)
                self._place_lead_in(a, a + held)
                for _ in range(_LEAD_PASSES):
                    if not self._pattern_from_placed(a, a + held):
                        break
                    # placed again, with the fixed pattern its own travel revealed
                    self._tr_pos, self._tr_prev_strong = base, strong0
                    self._tr_prev_edge, (self._row_typ, self._row_typ_n) = edge0, typ0
                    self._place_lead_in(a, a + held)
                self._tr_lead_done = True
            if a + held < b:
                self._place_and_refresh(a + held, b)
        else:
            # From the finger's arrival every frame is tracked, the faint ones too (the finger
            # leaving): where nothing matches the motion carries them, which places them
            # better than holding; their fusion weight follows the contact test as before.
            self._place_and_refresh(a, b)
        self._tr_next = b
        self._freeze(b, events, rows)
        self._emit(rows, everything=final)

    def _pattern_from_placed(self, a, b, gather=False):
        """With no finger-absent frames (nor calibration) to take the fixed pattern from, take
        it from frames a..b-1 as placed (if they travelled ``fixed_pattern_travel_px``): each
        plate's mean residual, over the frames that moved, against the image fused from them
        (each frame weighted by its travel) sampled where the plate looked, is added to the
        offset. True if it changed.
        With ``gather`` the residual sums are gathered over successive calls until their
        frames travelled that far (a slow swipe's half window travels a few pixels).

        Without it, the frames of a finger already on the strip when the capture starts are
        placed with the level removed only, and the fixed pattern, the same in every frame,
        pulls their shifts towards zero: the drift across a skewed swipe gathers there. The
        finger's texture is in the fused image, so (unlike a per-plate mean) the residual does
        not take it for a fixed pattern; a pattern constant along the strip's columns shows
        only as far as the frames moved across (without such motion it pulls nothing).
        """
        if (self.calibration is not None or self._blank_n >= 8 or self._offset is None
                or self.fixed_pattern_travel_px is None):
            return False
        sl = self._slots(a, b)
        pos = self._pos[sl]
        contact = self._contact_of(self._tex[sl])
        wt = self._travel_weights(pos[0], pos, contact)
        if not gather and wt.sum() < self.fixed_pattern_travel_px:
            return False
        if not wt.sum() > 0:
            return False
        level = float(np.mean(self._offset))
        vals = self._raw[sl] - self._offset + level
        r_n, c_n = self._shape
        t_n = len(pos)
        w = np.broadcast_to(wt[:, None, None], vals.shape)
        mos = _mosaic._fuse(vals, pos, np.zeros(t_n), w, self._plate_ok.astype(np.float64),
                            np.ones(2), 0.05)              # (mosaic.fuse, inputs known good)
        img = np.nan_to_num(mos.image, nan=level)
        seen = np.isfinite(mos.image).astype(np.float64)
        # Where each plate looked, in the fused image's pixels, sampled bilinearly as it was
        # splatted (one compiled pass; an image fused at half the pitch, less blurred,
        # measured no better: across RMS median 0.33 against 0.22 px on the independent
        # generator's swipes, before the refreshes were gathered).
        n, sr, sx, srr, srx = (np.zeros((r_n, c_n)) for _ in range(5))
        _plate_line_sums(vals, wt > 0, np.ascontiguousarray(pos, dtype=np.float64),
                         np.ones(t_n), np.zeros(t_n),
                         np.array([(r_n - 1) / 2.0, (c_n - 1) / 2.0]),
                         np.asarray(mos.origin_px, dtype=np.float64), img, seen, n, sr, sx,
                         srr, srx)
        if gather:
            self._fit_n += n
            self._fit_d += sx - sr
            self._fit_travel += float(wt.sum())
            if self._fit_travel < self.fixed_pattern_travel_px:
                return False
            n, d = self._fit_n.copy(), self._fit_d.copy()
            self._fit_n[:] = 0.0
            self._fit_d[:] = 0.0
            self._fit_travel = 0.0
            self._n_refits += 1
        else:
            d = sx - sr
        ok = self._plate_ok & (n >= 4)
        if not ok.any():
            return False
        res = np.where(ok, d / np.maximum(n, 1.0), 0.0)
        res[ok] -= res[ok].mean()
        self._offset = self._offset + res
        self._lead_fp = True
        return True

    def _clear_texture(self, tex, frac=0.25):
        """Frames of clear texture: signal power above the quietest frame's (noise and fixed
        pattern) at least a quarter (``frac``) of the typical frame's (the batch path's rule,
        with the quietest frame so far for the noise)."""
        floor2 = self._tr_tex_min ** 2
        return tex ** 2 - floor2 >= frac * max(self._tex_hi ** 2 - floor2, 0.0)

    def _tracker_input(self, sl, first):
        """Frames of ring slots ``sl`` as the tracker takes them (prepared now: those that
        waited for the plate and finger decisions were prepared with a provisional level and
        scale) and their times in frame periods."""
        tt = self._time[sl]
        if self._uses_times:
            if self._tr_fr is None and self.frame_rate_hz:
                self._tr_fr = self.frame_rate_hz
            if self._tr_fr is None:
                # from the frames still in the ring (a batch may hold a single frame)
                end = first + len(sl)
                d = np.diff(self._time[self._slots(max(0, end - self.window), end)])
                d = d[d > 0]
                if d.size:
                    self._tr_fr = float(1.0 / np.median(d))
            tt = tt * (self._tr_fr if self._tr_fr else 1.0)
        scale = self._scale if self._scale is not None else 1.0
        zt = ((self._raw[sl] - self._offset) / scale).astype(np.float32)
        zt[:, ~self._plate_ok] = 0.0
        return zt, tt

    def _new_tracker(self):
        self._tracker = _track.FrameTracker(self._plate_ok, max_across_px=self.max_across_px,
                                            sigma_acc_px=self.motion_prior_px,
                                            sideways_acc=_TRACK_SIDEWAYS,
                                            symmetric_edges=self._sym_edges)

    def _store_tracked(self, sl, pos, ok, info, okf, strong=None):
        """Placement of tracked frames into their slots, with the gap rule: a link with no
        overlap is a gap only between two frames of clear texture (faint frames at the
        fingertip and as the finger leaves fail to match without any gap). The motion
        carries the frames across it; unlike the batch path, nothing is pushed out by the
        strip's height: without the frames after it, a failed link at the finger's exit
        cannot be told from a too-fast swipe. ``strong``: the frames' clear-texture test, if
        the caller has it."""
        if strong is None:
            strong = self._clear_texture(self._tex[sl])
        prev_strong = np.concatenate([[self._tr_prev_strong], strong[:-1]])
        # nor where a frame of the link shows the edge of a ridge-free band in its rows (the
        # link's overlap held only the band; see _band_edge)
        edge = self._band_edge(sl, strong)
        prev_edge = np.concatenate([[self._tr_prev_edge], edge[:-1]])
        self._pos[sl] = pos
        self._link_ok[sl] = ok | ~(strong & prev_strong) | edge | prev_edge
        self._frame_info[sl] = info
        self._okfrac[sl] = okf
        self._tr_pos = pos[-1].copy()
        self._tr_prev_strong = bool(strong[-1])
        self._tr_prev_edge = bool(edge[-1])

    def _band_edge(self, sl, strong):
        """Frames (slots ``sl``) that show the edge of a ridge-free band passing through their
        rows, as pipeline._shows_band_edge tells a narrow band from a too-fast jump (which
        blurs whole frames): max(2, min(4, R // 4)) successive rows blank (texture power
        under _BLANK_FRAC of the typical frame's, above the quietest frame's) that are
        textured on the clear frames tracked so far (a dead or stuck row is blank on every
        frame), and a clear row elsewhere. The clear frames (``strong``) join the rows'
        typical level."""
        ms = self._row_ms[sl]
        if strong.any():
            self._row_typ += ms[strong].sum(axis=0)
            self._row_typ_n += int(strong.sum())
        if self._row_typ_n < 8:
            return np.zeros(len(ms), dtype=bool)
        floor2 = self._tr_tex_min ** 2
        span = max(self._tex_hi ** 2 - floor2, 0.0)
        # the spread of a noise-only row's mean square (C - 1 differences, each of two noisy
        # readings: half as many independent terms)
        sd = floor2 * np.sqrt(4.0 / max(self._shape[1] - 1, 1))
        p = ms - floor2
        typical = self._row_typ / self._row_typ_n - floor2 >= 0.25 * span + 3.0 * sd
        return _band_edge_rows((p < _BLANK_FRAC * span + 2.0 * sd) & typical[None, :],
                               p >= 0.25 * span + 3.0 * sd)

    def _place_lead_in(self, a, b):
        """Frames a..b-1, from the finger's arrival: backwards from the frame of strongest
        texture among them (:func:`stripstitch.track.track` started at its last frame), and
        from that frame on by the frame tracker that carries on with the swipe."""
        sl = self._slots(a, b)
        zt, tt = self._tracker_input(sl, a)
        n = b - a
        # (texture measured again: the first frames' was taken before any finger-absent
        # frames gave the fixed pattern)
        s = int(np.argmax(self._texture(self._raw[sl])))
        pos = np.zeros((n, 2))
        ok = np.ones(n, dtype=bool)              # the arrival frame has no link to judge
        info = np.zeros((n, 2, 2))
        okf = np.zeros(n)
        # The key frames' half-sample filters at the strip's edges, for the whole swipe:
        # chosen on these frames as the batch path chooses on all of them (track.track's
        # symmetric_edges="auto": the placement whose registrations leave the smaller
        # residual). The stream cannot wait for the whole swipe. Measured against the earlier
        # filters everywhere: 8-row strips under 20 scikit-image photographs, straight and
        # slanted, span median 0.445 -> 0.072 %, over 1 %: 9 -> 1; bench_random.py seeds
        # 7000 / 8000 0.138 / 0.151 -> 0.068 / 0.123 %; bench_few_rows.py's draw on 6 / 7 / 8
        # rows 0.75 / 0.41 / 0.31 -> 0.33 / 0.20 / 0.23 % (over 1 %: 9 / 5 / 7 -> 7 / 6 / 8);
        # the tests' band-limited textures unchanged. Choosing later, on the first 64 frames
        # both trackers registered, the frames before keep the earlier filters: those draws
        # 0.41 / 0.33 / 0.28 % (see DEVELOPERS.md, "Edge rows").
        # The chosen placement's backward half (frames 0..s, tracked from s) is what tracking
        # backwards from s alone gives (the two halves start from fresh state): it is used as
        # the arrival's placement.
        if n >= 2:
            chosen = _track.track(zt, self._plate_ok, times=tt, start=s,
                                  max_across_px=self.max_across_px,
                                  sigma_acc_px=self.motion_prior_px, sideways_acc=_TRACK_SIDEWAYS,
                                  symmetric_edges="auto")
            self._sym_edges = chosen.symmetric_edges
            if s > 0:
                bpos = chosen.positions[:s + 1]
                ref = chosen.reference[:s + 1]
                pos[:s + 1] = bpos
                ok[1:s + 1] = chosen.link_ok[:s]
                info[:s + 1] = _with_model_error(chosen.info[:s + 1],
                                                 bpos - bpos[np.maximum(ref, 0)])
                okf[:s + 1] = ref >= 0
        base = self._tr_pos.copy()               # the arrival where the swipe starts
        self._new_tracker()
        out = self._tracker.push(zt[s:], times=tt[s:])
        pos += base
        self._tr_off = pos[s].copy()
        pos[s:] = out["positions"] + self._tr_off
        ok[s + 1:] = out["link_ok"][1:]
        info[s + 1:] = _with_model_error(out["info"][1:], out["displacement"][1:])
        okf[s + 1:] = out["reference"][1:] >= 0
        # the frame both started from was registered by neither: its neighbour's
        nb = s - 1 if s > 0 else s + 1
        if nb < n:
            info[s] = info[nb]
            okf[s] = okf[nb]
        self._store_tracked(sl, pos, ok, info, okf)

    def _place_tracked(self, a, b, tracked=True):
        """Positions, links and confidence inputs of frames a..b-1 (their ring slots), placed
        by the frame tracker; not ``tracked`` (finger-absent), they hold the last placed
        position (weight 0 in the image)."""
        sl = self._slots(a, b)
        if not tracked:
            self._pos[sl] = self._tr_pos
            self._link_ok[sl] = True
            self._frame_info[sl] = 0.0
            self._okfrac[sl] = 0.0
            return
        if self._tracker is None:
            self._new_tracker()
        zt, tt = self._tracker_input(sl, a)
        out = self._tracker.push(zt, times=tt)
        placed = out["reference"] >= 0
        tex = self._tex[sl]
        strong = self._clear_texture(tex)
        # blank: no texture above the quietest frame's, and a registration that matched
        # nothing (see _BLANK_NCC)
        textured = self._clear_texture(tex, _BLANK_FRAC) | (out["ncc"] >= _BLANK_NCC)
        pos = self._carry_blank(out["positions"] + self._tr_off, strong, textured, tt)
        self._store_tracked(sl, pos, out["link_ok"],
                            _with_model_error(out["info"], out["displacement"]),
                            placed.astype(np.float64), strong)

    def _carry_blank(self, pos, strong, textured, tt):
        """A frame with no texture at all (``textured`` False: a band of the finger without
        ridges, a crease or a scar) starts a run carried at the velocity of the last clear
        frames before it (the mean step over the last _CARRY_FRAMES of them, without steps
        far from the median: pipeline._steady_velocity), from the last clear frame, up to and including the next clear frame
        (``strong``; its registration was against a blank frame): what such frames
        register against is noise, and the faint frames at a band's edge had bent the
        filter's velocity (exact-shift frames across a 16 px band at 0.5 px per frame:
        carried at 1.0-1.2 px per frame, 14 px off after the band). For a strip's height
        of frames after the run, a step that disagrees with that velocity by more than a
        quarter strip is taken as the velocity's (the first registrations after a band can
        land a ridge period off, as in the batch path). The frames after move with it (the
        tracker's origin is shifted). Causal and frame by frame, so the result does not
        depend on the batching."""
        pos = np.array(pos, dtype=np.float64, copy=True)
        if self._carry is None and self._after is None and np.all(textured):
            # the usual batch: nothing to carry, only the history of clear frames to keep
            for i in np.flatnonzero(strong)[-_CARRY_FRAMES:]:
                self._clear_hist.append((float(tt[i]), pos[i].copy()))
            del self._clear_hist[:-_CARRY_FRAMES]
            if len(pos):
                self._last_out = (float(tt[-1]), pos[-1].copy())
            return pos
        r_n = self._shape[0]
        tol = max(1.0, 0.25 * r_n)

        def move(i, want):
            shift = want - pos[i]
            pos[i:] += shift
            self._tr_off = self._tr_off + shift

        for i in range(len(pos)):
            if self._carry is None and self._after is not None and self._last_out is not None:
                left, v = self._after
                t1, p1 = self._last_out
                want = p1 + v * (tt[i] - t1)
                if np.hypot(*(pos[i] - want)) > tol:
                    move(i, want)
                self._after = (left - 1, v) if left > 1 else None
            if strong[i]:
                if self._carry is not None:
                    # the first clear frame after the run: its registration was against a
                    # blank frame, so it too goes where the carried speed puts it
                    t0, p0, v = self._carry
                    move(i, p0 + v * (tt[i] - t0))
                    self._after = (r_n, v)
                self._carry = None
            elif self._carry is None and not textured[i] and len(self._clear_hist) >= 4:
                # the most recent clear frames (a human swipe speeds up and slows down:
                # over 32 frames the speed lagged a slowing finger by a fifth)
                t_h = np.array([h[0] for h in self._clear_hist])
                p_h = np.array([h[1] for h in self._clear_hist])
                v = _steady_velocity(t_h, p_h, 3)
                # ... only if the last clear frame is at most a strip's height of travel back
                # (a band's faint edge crosses the strip in that): after a longer faint stretch
                # (the finger leaving) the carry would start from a stale frame and speed (a
                # large finger's exit: 65 faint frames, then one blank, the next clear frame
                # thrown 20 px ahead, span +8 %)
                if v is not None and np.hypot(*v) * (tt[i] - t_h[-1]) <= r_n:
                    self._carry = (t_h[-1], p_h[-1], v)
                    self._after = None
            if self._carry is not None:
                t0, p0, v = self._carry
                move(i, p0 + v * (tt[i] - t0))
            elif strong[i]:
                self._clear_hist.append((float(tt[i]), pos[i].copy()))
                del self._clear_hist[:-_CARRY_FRAMES]
            self._last_out = (float(tt[i]), pos[i].copy())
        return pos

    def _recent_steps(self, lo, a):
        if a - lo < 2:
            return np.zeros((0, 2))
        k = np.arange(max(lo + 1, a - 16), a)
        okk = self._link_ok[k % self.window]
        st = self._pos[k % self.window] - self._pos[(k - 1) % self.window]
        return st[okk]

    def _partners(self, lo, a, b):
        """Pairs (i, j), j new, i earlier within the window, at whole-pixel displacements
        (pipeline._pick_partners' rule, looking back only)."""
        w = self.window
        j = np.arange(max(a, 1), b)
        if len(j) == 0:
            return np.zeros((0, 2), np.int64)
        i = np.arange(lo, b)
        pj = self._pos[j % w]
        pi = self._pos[i % w]
        lag = j[:, None] - i[None, :]
        valid = lag >= 2
        # Not across a failed link.
        fails = ~self._link_ok[i % w]
        fails[0] = False
        fc = np.cumsum(fails)
        fcj = fc[j - lo]
        valid &= fc[None, :] == fcj[:, None]
        disp = pj[:, None, :] - pi[None, :, :]
        da = np.abs(disp[..., 0])
        fa = np.abs(disp[..., 1] - np.round(disp[..., 1]))
        out = []
        targets = self._targets
        if self.mode == "fast":
            targets = tuple(t for t in targets if t != 0)
        rows_idx = np.arange(len(j))
        for target in targets:
            if target == 0:
                cost = np.hypot(da, disp[..., 1])
                okm = valid & (cost < 0.1) & (lag >= 16)
                score = np.where(okm, lag, -1)
                best = np.argmax(score, axis=1)
                sel = score[rows_idx, best] > 0
            else:
                cost = np.maximum(np.abs(da - target), fa)
                cost = np.where(valid & (np.abs(disp[..., 1]) <= max(target, 3.0)), cost, np.inf)
                best = np.argmin(cost, axis=1)
                c = cost[rows_idx, best]
                sel = np.isfinite(c) & (c < 0.5)
            out.append(np.stack([i[best[sel]], j[sel]], 1))
        pairs = np.concatenate(out) if out else np.zeros((0, 2), np.int64)
        return np.unique(pairs, axis=0) if len(pairs) else pairs

    def _store_pairs(self, ij, shift, info, good):
        if len(ij) == 0:
            return
        # Drop pairs that reach outside the window first (compaction).
        n = self._n_pairs
        lo = max(0, self._n - self.window)
        keep = np.flatnonzero(self._p_ij[:n, 0] >= lo)
        m = len(keep)
        if m < n:
            self._p_ij[:m] = self._p_ij[keep]
            self._p_shift[:m] = self._p_shift[keep]
            self._p_info[:m] = self._p_info[keep]
            self._p_good[:m] = self._p_good[keep]
        k = min(len(ij), len(self._p_ij) - m)
        self._p_ij[m:m + k] = ij[:k]
        self._p_shift[m:m + k] = shift[:k]
        self._p_info[m:m + k] = _with_model_error(info[:k], shift[:k])
        self._p_good[m:m + k] = good[:k]
        self._n_pairs = m + k

    def _solve(self, lo, b):
        w = self.window
        n = b - lo
        if n < 2:
            return
        np_ = self._n_pairs
        ij = self._p_ij[:np_]
        inwin = (ij[:, 0] >= lo) & (ij[:, 1] < b) & self._p_good[:np_]
        pairs = ij[inwin] - lo
        shift = self._p_shift[:np_][inwin]
        info = self._p_info[:np_][inwin]
        # Frozen frames inside the window are held by stiff pairs to the window's first frame.
        nf = self._n_frozen - lo
        base = self._pos[lo % w].copy()
        if nf >= 2:
            k = np.arange(1, nf)
            fpairs = np.stack([np.zeros_like(k), k], 1)
            fshift = self._pos[(k + lo) % w] - base
            finfo = np.broadcast_to(np.eye(2) * 1e8, (len(k), 2, 2))
            pairs = np.concatenate([pairs, fpairs])
            shift = np.concatenate([shift, fshift])
            info = np.concatenate([info, finfo])
        if self._uses_times:
            tt = self._time[self._slots(lo, b)]
            fr = self.frame_rate_hz or float(1.0 / np.median(np.diff(tt)))
            dt = np.diff(tt) * fr
        else:
            dt = np.ones(n - 1)
        # Frames whose chain is broken and no pair reaches keep their predicted step (the
        # motion prior carries them).
        positions, pair_weight = _solve_window(n, pairs, shift, info, dt,
                                               sigma_acc_px=self.motion_prior_px,
                                               iterations=3 if self.mode == "fast" else 5)
        newpos = positions + base
        start = max(self._n_frozen, lo)
        sl = self._slots(start, b)
        self._pos[sl] = newpos[start - lo:]
        # Confidence inputs (pairs only, without the stiff anchors).
        n_real = int(inwin.sum())
        pw = pair_weight[:n_real]
        preal = pairs[:n_real]
        fi = np.zeros((n, 2, 2))
        np.add.at(fi, preal[:, 0], pw[:, None, None] * info[:n_real])
        np.add.at(fi, preal[:, 1], pw[:, None, None] * info[:n_real])
        kept = np.zeros(n)
        total = np.zeros(n)
        np.add.at(kept, preal.ravel(), np.repeat(pw, 2))
        np.add.at(total, preal.ravel(), 1.0)
        self._frame_info[sl] = fi[start - lo:]
        self._okfrac[sl] = np.where(total > 0, kept / np.maximum(total, 1), 0.0)[start - lo:]

    def _confidence(self, sl, contact):
        # the batch path's rule (pipeline._confidence)
        return _frame_confidence(self._frame_info[sl], np.asarray(contact, dtype=bool),
                                 np.clip(self._okfrac[sl], 0, 1))

    def _freeze(self, upto, events, rows):
        a = self._n_frozen
        if upto <= a:
            return
        sl = self._slots(a, upto)
        contact = self._contact_of(self._tex[sl])
        conf = self._confidence(sl, contact)
        pos = self._pos[sl]
        if self.keep_history:
            self._h_pos.extend(pos.tolist())
            self._h_conf.extend(conf.tolist())
            self._h_contact.extend(contact.tolist())
            self._h_tex.extend(self._tex[sl].tolist())
            self._h_link_ok.extend(self._link_ok[sl].tolist())
            self._h_time.extend(self._time[sl].tolist())
        self._fz_pos[sl] = pos
        self._online_events(a, upto, pos, conf, contact, events)
        # Fusion: the batch path's values (prepared frames back in input units) and weights.
        fw = (contact & (conf > 0.05)).astype(np.float64)
        if not fw.any() and contact.any() and self._n_frozen == 0:
            fw = contact.astype(np.float64)
        scale = self._scale if self._scale is not None else 1.0
        level = float(np.mean(self._offset)) if self._offset is not None else 0.0
        # (from the raw frames with the latest fixed pattern: frames prepared before it was
        # known, e.g. with the level only, fuse with it too)
        vals = self._raw[sl] - self._offset + level if self._offset is not None \
            else self._z[sl].astype(np.float64) * scale + level
        wts = fw[:, None, None] * self._plate_ok[None].astype(np.float64)
        self._splat(vals, pos, wts)
        self._n_frozen = upto

    def _place_and_refresh(self, a, b):
        """Frames a..b-1 placed by the tracker, the fixed pattern refreshed at every half
        window's end among them (:meth:`_refresh_pattern`): from the arrival on it is fitted
        again to every half window of placed frames (a slow arrival may not have travelled
        far enough for the first fit; a pattern constant along the columns shows more as the
        frames move across; on the independent generator's 24 swipes, across RMS median
        0.26 -> 0.18 px), and split there, the placement does not depend on how the pushes
        were batched."""
        half = self.window // 2
        while a < b:
            nxt = min(b, (a // half + 1) * half)
            self._place_tracked(a, nxt)
            self._refresh_pattern(nxt)
            a = nxt

    def _refresh_pattern(self, b):
        """Gather the residuals of the last whole half window of frames before ``b`` for the
        next fit (:meth:`_pattern_from_placed`), once per half window: the frames are fixed
        by their index, not by how the pushes were batched (a batch is at most half a
        window, so they are still in the ring)."""
        half = self.window // 2
        k = b // half
        if k > self._fp_last and k >= 1 and self._n_refits < _REFITS:
            self._fp_last = k
            self._pattern_from_placed((k - 1) * half, k * half, gather=True)

    def _travel_weights(self, prev, pos, contact):
        """Weights of frames at ``pos`` (the frame before them at ``prev``) in the fixed
        pattern's fit: the step from the previous frame (px, at most a strip's height) for
        frames in contact, else 0 (a stall's repeats count about once)."""
        steps = np.diff(np.vstack([prev[None], pos]), axis=0)
        wt = np.minimum(np.hypot(steps[:, 0], steps[:, 1]), float(self._shape[0]))
        return np.where(contact, wt, 0.0)

    def _splat(self, vals, pos, wts):
        r_n, c_n = self._shape
        kept_rows = np.flatnonzero((wts > 0).any(axis=2).ravel())
        if kept_rows.size == 0:
            return
        # rows of the grid the kept observations touch (as numpy.floor of their row
        # coordinate), so the band can grow to them before the compiled splat
        q0 = ((pos[:, 0, None] + np.arange(r_n)[None, :]) / self._pitch_px[0]).ravel()[kept_rows]
        lo_r = int(np.floor(q0.min()))
        hi_r = int(np.floor(q0.max())) + 2
        self._extend_band(lo_r, hi_r, rows_out=None)
        blo, bhi = self._band
        self._dropped += _ring_splat(vals, pos, wts, float(self._pitch_px[0]),
                                     float(self._pitch_px[1]), int(self._col0), int(blo),
                                     int(bhi), self._acc, self._wacc)

    def _extend_band(self, lo_r, hi_r, rows_out):
        """Grow the live band [lo, hi) towards rows not yet handed out, within the strip."""
        h = self._acc_h
        if self._band is None:
            lo_r = max(lo_r, hi_r - h)
            self._band = [lo_r, hi_r]
            return
        blo, bhi = self._band
        if lo_r < blo and not self._sealed[0]:
            blo = max(lo_r, bhi - h)
        if hi_r > bhi and not self._sealed[1]:
            bhi = min(hi_r, blo + h)
        self._band = [blo, bhi]

    def _emit(self, rows, everything=False):
        """Hand out rows of the band that no unfrozen frame (nor a backtrack within
        ``hold_rows``) can reach any more."""
        if self._band is None:
            return
        blo, bhi = self._band
        if everything:
            cut_lo, cut_hi = bhi, bhi
        else:
            w = self.window
            r_n = self._shape[0]
            if self._n_frozen < self._n_est:
                p = self._pos[self._slots(self._n_frozen, self._n_est), 0]
            else:
                p = self._pos[[(self._n_est - 1) % w], 0]
            # Rows the unsolved frames may still reach: their current span plus the
            # frames to come (at most one frame height per frame beyond the last solved).
            ahead = (self._n - self._n_est + self.batch) * r_n
            amin = float(p.min()) - ahead
            amax = float(p.max()) + r_n + ahead
            cut_lo = int(np.floor(amin / self._pitch_px[0])) - self.hold_rows
            cut_hi = int(np.ceil(amax / self._pitch_px[0])) + self.hold_rows
            # The live band must stay inside the strip: hand out the far side if needed.
        out = []
        if cut_lo > blo:
            top = min(cut_lo, bhi)
            out.append(self._take(blo, top))
            blo = top
            self._sealed[0] = True
        if not everything and cut_hi < bhi and bhi > blo:
            bot = max(cut_hi, blo)
            out.append(self._take(bot, bhi))
            bhi = bot
            self._sealed[1] = True
        self._band = [blo, bhi]
        rows.extend(o for o in out if len(o[0]))

    def _take(self, r0, r1):
        h = self._acc_h
        idx = np.arange(r0, r1)
        sl = idx % h
        acc = self._acc[sl]
        wacc = self._wacc[sl]
        with np.errstate(invalid="ignore", divide="ignore"):
            img = np.where(wacc >= 0.05, acc / np.where(wacc > 0, wacc, 1.0), np.nan)
        if self._unit_exp:
            img = np.ldexp(img, -self._unit_exp)
        self._acc[sl] = 0.0
        self._wacc[sl] = 0.0
        return idx, img, wacc

    def _assemble(self):
        parts = self._h_rows
        if not parts:
            raise ReconstructionError("no image rows: no frame in contact was placed")
        idx = np.concatenate([p[0] for p in parts])
        val = np.concatenate([p[1] for p in parts])
        wt = np.concatenate([p[2] for p in parts])
        order = np.argsort(idx, kind="stable")
        idx, val, wt = idx[order], val[order], wt[order]
        r0, r1 = int(idx[0]), int(idx[-1]) + 1
        img = np.full((r1 - r0, self._acc_w), np.nan)
        wimg = np.zeros((r1 - r0, self._acc_w))
        img[idx - r0] = val
        wimg[idx - r0] = wt
        rows = np.flatnonzero(wimg.max(axis=1) >= 0.05)
        cols = np.flatnonzero(wimg.max(axis=0) >= 0.05)
        if not rows.size:
            raise ReconstructionError("no image rows: no frame in contact was placed")
        a, b = rows[0], rows[-1] + 1
        c, d = cols[0], cols[-1] + 1
        origin = np.array([-(r0 + a), -(self._col0 + c)], dtype=np.float64)
        return img[a:b, c:d], wimg[a:b, c:d], origin

    def _online_events(self, a, b, pos, conf, contact, events):
        """Simple per-frame detectors on frozen frames (the final list comes from
        ``report.find_events`` in ``finish``)."""
        fr = self.frame_rate_hz
        r_n = self._shape[0]
        if fr:
            v_stall = 2.0 * 1e3 / self.pitch_um / fr
            min_len = max(8, int(round(0.01 * fr)))
        else:
            v_stall, min_len = 0.01, 40
        half = 8
        w = self.window
        fz = self._fz_pos          # frozen positions of the last ``window`` frames
        for k in range(b - a):
            t = a + k
            lk = self._link_ok[t % w]
            if t > 0 and not lk and contact[k]:
                events.append(Event("gap", t - 1, t, {"reason": "too_fast", "live": True}))
            if contact[k]:
                self._ev_contact = True
            elif self._ev_contact:
                self._ev_contact = False
                events.append(Event("no_contact", t, t, {"where": "lifted", "live": True}))
            if t >= half:
                v = (fz[t % w] - fz[(t - half) % w]) / half
            else:
                v = np.zeros(2)
            if abs(pos[k, 0]) > 2 * r_n and self._ev_dir == 0.0:
                self._ev_dir = float(np.sign(pos[k, 0]))
            # stall
            if contact[k] and t >= half and _report._still(v, v_stall):
                if self._ev_stall_start is None:
                    self._ev_stall_start, self._ev_stall_sent = t, False
                if not self._ev_stall_sent and t - self._ev_stall_start + 1 >= min_len:
                    events.append(Event("stall", self._ev_stall_start, t, {"live": True}))
                    self._ev_stall_sent = True
            else:
                self._ev_stall_start = None
            # backtrack
            if self._ev_dir and contact[k] and self._ev_dir * v[0] < -v_stall:
                if self._ev_back_start is None:
                    self._ev_back_start, self._ev_back_sent = t, False
                    self._back_from = float(fz[(t - half) % w, 0]) if t >= half else 0.0
                s0 = self._ev_back_start
                dist = self._ev_dir * (self._back_from - pos[k, 0])
                if not self._ev_back_sent and dist >= 1.0:
                    events.append(Event("backtrack", s0, t, {"distance_px": round(float(dist), 2),
                                                             "live": True}))
                    self._ev_back_sent = True
            else:
                self._ev_back_start = None
            # low confidence
            if contact[k] and conf[k] < 0.5:
                if self._ev_low_start is None:
                    self._ev_low_start, self._ev_low_sent = t, False
                if not self._ev_low_sent and t - self._ev_low_start + 1 >= 3:
                    events.append(Event("low_confidence", self._ev_low_start, t, {"live": True}))
                    self._ev_low_sent = True
            else:
                self._ev_low_start = None


def _solve_window(n, pairs, shift, info, dt, *, sigma_acc_px, iterations=5):
    """Dense form of ``trajectory.solve_positions`` (angles 0) for one window.

    The same cost (whitened pair residuals with information ``info``, the acceleration
    prior of ``trajectory._prior_rows``) and the same robust reweighting (Huber for two
    iterations, then Cauchy, k = 3, on the Mahalanobis residual over its robust spread),
    but with the normal equations of the few hundred unknowns built and solved densely:
    the sparse path's set-up costs more than the solve at this size. Frame 0 is held at 0.

    Returns
    -------
    positions : (n, 2) float64
    pair_weight : (P,) float64
    """
    pairs = np.asarray(pairs, dtype=np.int64)
    i, j = pairs[:, 0], pairs[:, 1]
    inf = 0.5 * (info + np.transpose(info, (0, 2, 1)))
    use = np.trace(inf, axis1=1, axis2=2) > 0
    # Prior normal matrix: second differences per axis (as trajectory._prior_rows).
    prior_n = np.zeros((n, n))
    if n >= 3:
        k = np.arange(1, n - 1)
        a = 1.0 / dt[k]
        b = 1.0 / dt[k - 1]
        sd = sigma_acc_px * 0.5 * (dt[k] + dt[k - 1])
        d = np.zeros((n - 2, n))
        rows = np.arange(n - 2)
        d[rows, k - 1] = b / sd
        d[rows, k] = -(a + b) / sd
        d[rows, k + 1] = a / sd
        prior_n = d.T @ d
    big_prior = np.kron(prior_n, np.eye(2))
    w = np.ones(len(pairs))
    pos = np.zeros((n, 2))
    eye = np.eye(2 * n - 2) * 1e-10
    for it in range(iterations):
        wi = (w * use)[:, None, None] * inf
        nrm = np.zeros((n, n, 2, 2))
        np.add.at(nrm, (i, i), wi)
        np.add.at(nrm, (j, j), wi)
        np.add.at(nrm, (i, j), -wi)
        np.add.at(nrm, (j, i), -wi)
        rhs = np.zeros((n, 2))
        g = np.einsum("pab,pb->pa", wi, shift)
        np.add.at(rhs, j, g)
        np.add.at(rhs, i, -g)
        full = nrm.transpose(0, 2, 1, 3).reshape(2 * n, 2 * n) + big_prior
        sol = np.linalg.solve(full[2:, 2:] + eye, rhs.reshape(-1)[2:])
        pos = np.concatenate([[0.0, 0.0], sol]).reshape(n, 2)
        e = pos[j] - pos[i] - shift
        m = np.sqrt(np.maximum(np.einsum("pa,pab,pb->p", e, inf, e), 0.0))
        scale = max(1.0, 1.4826 * float(np.median(m[use]))) if use.any() else 1.0
        w = _traj._robust_weights(m / scale, "huber" if it < 2 else "cauchy")
        w[~use] = 0.0
    return pos, w


def _replace_rows(est, k, est2, sel):
    """PairEstimates ``est`` with rows ``k`` taken from rows ``sel`` of ``est2``."""
    fields = {}
    for name in ("pairs", "shift", "angle_rad", "info", "angle_info", "sigma", "n_valid", "ncc",
                 "ok"):
        arr = np.array(getattr(est, name))
        arr[k] = getattr(est2, name)[sel]
        fields[name] = arr
    return _reg.PairEstimates(**fields)


@numba.njit(**JIT)
def _ring_splat(vals, pos, wts, p0, p1, col0, blo, bhi, acc, wacc):
    """Bilinear splat of every observation with weight ``wts[t, r, c]`` > 0 into the ring
    accumulators (row ``i`` of the grid at ring row ``i % H``, column ``j`` at ``j - col0``),
    in place; corners outside the live band [blo, bhi) or the columns are dropped. Returns
    how many corners with positive weight were dropped."""
    t_n, r_n, c_n = vals.shape
    h, wd = acc.shape
    dropped = 0
    for t in range(t_n):
        for r in range(r_n):
            q0 = (pos[t, 0] + r) / p0
            i0 = int(np.floor(q0))
            a0 = q0 - i0
            for c in range(c_n):
                wv = wts[t, r, c]
                if not wv > 0.0:
                    continue
                v = vals[t, r, c]
                q1 = (pos[t, 1] + c) / p1
                i1 = int(np.floor(q1))
                a1 = q1 - i1
                for di in range(2):
                    wa = a0 if di == 1 else 1.0 - a0
                    rr = i0 + di
                    for dj in range(2):
                        wb = a1 if dj == 1 else 1.0 - a1
                        cc = i1 + dj - col0
                        ww = wv * wa * wb
                        if blo <= rr < bhi and 0 <= cc < wd:
                            k = rr % h
                            acc[k, cc] += ww * v
                            wacc[k, cc] += ww
                        elif wa * wb > 0.0:
                            dropped += 1
    return dropped
