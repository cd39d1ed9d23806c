"""Report stage: events (gap, stall, backtrack, ...) and the quality report with a verdict.

In: the solved trajectory, per-frame confidence and contact, failed links, frame times.
Out: a tuple of :class:`~stripstitch.Event` and a :class:`~stripstitch.QualityReport`.
"""

from __future__ import annotations

import numpy as np

from ._types import Event, QualityReport

__all__ = ["find_events", "make_report"]


# Strips with fewer usable plates than these are unusable / less reliable. 24 simulated
# swipes (2-8 rows x 16-128 columns, right loop and whorl, 30 dB, half a row per frame at
# most): under 128 plates (2x16, 2x32, 3x32, 4x16, 6x16) every swipe erred by 0.9-92 % of its
# span or 1-27 px across, most of them by several; 128-255 plates (2x64, 4x32, 8x16, 6x32,
# 8x24) 0.2-9 % and 0.3-9 px across; 256 (2x128, 4x64) 0.04-0.6 %, 0.1-2.2 px across.
MIN_PLATES = 128
FEW_PLATES = 256
# ... and strips narrower than this many columns of usable plates get a reason too, whatever
# their plate count: 16 simulated swipes of 16 columns (8 to 32 rows, four finger classes,
# 25 dB) erred by 0.06-11.7 px RMS along (median 2.5; ridge-period slips across so few
# columns), and bench_geometry.py's 20x16 strip came out 7.9 % short, called usable. Up to
# 48 columns the same: 80 simulated swipes of 24-48 columns (6-32 rows, 2-8 kHz, 0.05-0.5
# (R - 1) px per frame, 15-40 dB, three skins, six pattern classes) erred by over 1 % of
# span in 33 (median 0.17-0.78 % per width, worst 63 %), 23 of those called usable without
# a word; drawn alike with 64-192 columns, 3 of 80 (64 columns: 0 of 24, worst 0.5 %).
NARROW_COLS = 64
# ... and strips of this many rows or fewer get a reason too: they are placed by pairs that
# overlap by a few rows, over which ridges running across the strip leave the motion along
# them undetermined (the estimates slide along the ridges, and through the slant of the
# ridges the length follows). Simulated swipes drawn at random (2-8 kHz, 96-256 columns,
# 0.1-0.65 (R - 1) px per frame, 15-40 dB, six pattern classes, a quarter with a stall; 30
# per row count): more than 1 % of span off in 12 / 13 / 11 / 12 of 30 with 2 / 3 / 4 / 5
# rows (worst 14.5 / 31 / 12.5 / 24 %), all called usable; with 6 and 8 rows 5 of 30, at
# the limits of speed and deceleration. Strips of 5 rows are placed by the key-frame tracker
# since it chooses its edge filters per swipe: 4 of 30 over 1 % (worst 1.7 %), as 6 rows
# (3 of 30), so the reason stops at 4 rows.
FEW_ROWS = 4


def _runs(mask):
    """(start, stop_inclusive) of runs of True in a 1-D boolean array."""
    m = np.asarray(mask, dtype=bool)
    if not m.any():
        return []
    d = np.diff(np.concatenate([[0], m.astype(np.int8), [0]]))
    starts = np.flatnonzero(d == 1)
    stops = np.flatnonzero(d == -1) - 1
    return list(zip(starts.tolist(), stops.tolist()))


def _merged_stalls(runs, positions, min_len):
    """Stall runs (first, last) with the short breaks between them closed: a break of at most
    a quarter of the shortest stall (and 4 frames or more) over which the finger moved under
    half a pixel along the swipe is noise crossing the speed limit, not a restart (a 12 dB
    swipe's 273-frame stall came out as three in fast mode)."""
    out = []
    gap_max = max(4, min_len // 4)
    for a, b in runs:
        if out and a - out[-1][1] - 1 <= gap_max \
                and abs(float(positions[a, 0] - positions[out[-1][1], 0])) < 0.5:
            out[-1] = (out[-1][0], b)
        else:
            out.append((a, b))
    return out


def _smoothed_velocity(pos, times, half):
    """Central-difference velocity over +-half frames (px per second, or per frame if times are frames)."""
    t_n = len(pos)
    k = np.arange(t_n)
    lo = np.clip(k - half, 0, t_n - 1)
    hi = np.clip(k + half, 0, t_n - 1)
    dt = times[hi] - times[lo]
    with np.errstate(invalid="ignore", divide="ignore"):
        v = (pos[hi] - pos[lo]) / np.where(dt > 0, dt, np.nan)[:, None]
    return np.nan_to_num(v)


# A stall is the finger no longer progressing along the swipe: its speed along under the
# limit and across under this many times the limit. A finger that turns while it stalls
# reads as a drift across where the placement holds no turn for those frames (the
# refinement cannot move frames that all sample one phase): a whorl turning 1.3 degrees
# during a 24 ms stall on an 8x192 strip at 4 kHz drifted 0.015 px per frame (3 mm/s),
# which the plain speed rule took for motion and missed the stall (bench_random.py --seed
# 9100 --finger-mm 16 12: 23 of 24 stalls -> 24 of 24). No event changed on the suite, the
# random, geometry, gap and band sets (their false events included).
_STALL_ACROSS = 3.0


def _still(vel, v_stall):
    """Whether velocities (..., 2) (along, across; px per frame) count as stalled."""
    vel = np.asarray(vel, dtype=np.float64)
    return (np.abs(vel[..., 0]) < v_stall) & (np.abs(vel[..., 1]) < _STALL_ACROSS * v_stall)


def _stall_rule(positions, times_s, frame_rate_hz, pitch_um, *, stall_speed_mm_s=2.0,
               min_stall_s=0.01):
    """Velocity over a short window (px per frame period; +-2 ms, or +-8 frames without a
    frame rate) and the stall rule in those units: (velocity (T, 2), speed limit, fewest
    frames). Without a frame rate: 0.01 px per frame for 40 frames."""
    fr = frame_rate_hz if frame_rate_hz else 1.0
    half = max(2, int(round(0.002 * fr))) if frame_rate_hz else 8
    vel = _smoothed_velocity(positions, np.asarray(times_s, dtype=np.float64) * fr, half)
    if frame_rate_hz:
        return (vel, stall_speed_mm_s * 1e3 / pitch_um / frame_rate_hz,
                max(8, int(round(min_stall_s * frame_rate_hz))))
    return vel, 0.01, 40


# A swerve: the placement moving sideways, off the swipe's straight line, by at least
# _SWERVE_PX within _SWERVE_TRAVEL_PX of travel along the swipe (14 degrees on average over
# 1.6 mm). A finger guided over a strip does not do that; a placement does where ridges run
# straight over the whole strip (the aperture problem) and the registrations slide along
# them: a 16x32 strip under the straight ridges of a tented arch's flank ran off 1.4
# px per frame sideways for 40 frames at each end (46 px, called usable; bench_geometry.py
# --seed 301). Measured on 218 simulated swipes (the accuracy suite, random swipes of seeds
# 7000 and 9100, the geometry sets of seeds 300 and 301): the truth never moves more than
# 0.3 px off the line within that travel; the placements of the swipes that were right moved
# up to 4 px (2-row strips 5); the four over 8 px were that 16x32 strip (46 px) and three
# swipes already called unusable. Over twice the limit the image is too distorted to use.
_SWERVE_TRAVEL_PX = 32.0
_SWERVE_PX = 8.0
_SWERVE_UNUSABLE_PX = 16.0


def _window_extremes(e, end):
    """Maximum and minimum of ``e[t:end[t]]`` for every t (end[t] > t), by a sparse table
    of doubling windows (O(T log T))."""
    n = len(e)
    mx = [e.copy()]
    mn = [e.copy()]
    k = 1
    while 2 * k <= n:
        a, b = mx[-1], mn[-1]
        mx.append(np.maximum(a[:n - 2 * k + 1], a[k:n - k + 1]))
        mn.append(np.minimum(b[:n - 2 * k + 1], b[k:n - k + 1]))
        k *= 2
    t = np.arange(n)
    length = np.maximum(end - t, 1)
    lev = np.floor(np.log2(length)).astype(np.int64)
    hi = np.empty(n)
    lo = np.empty(n)
    for j in np.unique(lev):
        sel = lev == j
        w = 1 << int(j)
        ts = t[sel]
        te = end[sel] - w
        hi[sel] = np.maximum(mx[j][ts], mx[j][te])
        lo[sel] = np.minimum(mn[j][ts], mn[j][te])
    return hi, lo


def find_swerves(positions, first, last, *, travel_px=_SWERVE_TRAVEL_PX, limit_px=_SWERVE_PX):
    """Stretches where the placement leaves the swipe's straight line sideways.

    Over the frames ``first..last``, the sideways offset from the line through the first and
    last positions is compared over every window of ``travel_px`` of travel along the swipe
    (absolute travel, so a backtrack or a stall does not end a window early); where it
    changes by ``limit_px`` or more the stretch is returned.

    Returns
    -------
    list of (first_frame, last_frame, excursion_px)
    """
    p = np.asarray(positions, dtype=np.float64)[first:last + 1]
    n = len(p)
    if n < 3:
        return []
    d = p[-1] - p[0]
    slope = d[1] / d[0] if abs(d[0]) > 1e-9 else 0.0
    off = p[:, 1] - slope * p[:, 0]
    travel = np.concatenate([[0.0], np.cumsum(np.abs(np.diff(p[:, 0])))])
    end = np.searchsorted(travel, travel + travel_px, side="right")
    end = np.clip(np.maximum(end, np.arange(n) + 1), 1, n)
    hi, lo = _window_extremes(off, end)
    exc = np.maximum(hi - off, off - lo)
    out = []
    for a, b in _runs(exc >= limit_px):
        out.append((int(a + first), int(min(end[b] - 1, n - 1) + first), float(exc[a:b + 1].max())))
    # windows of neighbouring frames overlap: merge runs that touch
    merged = []
    for a, b, x in out:
        if merged and a <= merged[-1][1] + 1:
            merged[-1] = (merged[-1][0], max(b, merged[-1][1]), max(x, merged[-1][2]))
        else:
            merged.append((a, b, x))
    return merged


def find_events(*, positions, angles_deg, confidence, contact, link_failed, link_dt_frames,
                times_s, frame_rate_hz, n_rows, pitch_um, stall_speed_mm_s=2.0,
                min_stall_s=0.01, min_backtrack_px=1.0, skew_limit_deg=3.0,
                rotation_limit_deg=1.0, low_confidence=0.5, blank_runs=(), limit_runs=()):
    """Find the swipe's events from the solved trajectory.

    Parameters
    ----------
    positions : (T, 2) float
    angles_deg : (T,) float
    confidence : (T,) float
    contact : (T,) bool
    link_failed : (T-1,) bool
        True where frames t and t+1 (or the next frame in contact) have no usable overlap.
    link_dt_frames : (T-1,) float
        Time step between frames in nominal frame periods (> 1.5 means dropped frames).
    times_s : (T,) float
        Frame times (or frame indices divided by the frame rate; frame indices if unknown).
    frame_rate_hz : float or None
    n_rows : int
    pitch_um : float
    blank_runs : sequence of (first, last, travel_px, uncertainty_px), optional
        Frames with no texture that were carried across at the measured speed (reported as
        low_confidence with cause "no_texture"). Default none.
    limit_runs : sequence of (first, last, speed_px_per_frame, uncertainty_px), optional
        Frames whose links failed because the finger moved about a strip height per frame or
        more (successive frames overlap by a row or less), carried at the speed around them
        (reported as low_confidence with cause "overlap_limit"). Default none.

    Returns
    -------
    tuple of Event
    """
    t_n = len(positions)
    events = []
    for a, b in _runs(~contact):
        where = "start" if a == 0 else ("end" if b == t_n - 1 else "middle")
        events.append(Event("no_contact", a, b, {"frames": b - a + 1, "where": where}))
    idx = np.flatnonzero(contact)
    if idx.size < 2:
        return tuple(sorted(events, key=lambda e: (e.first_frame, e.kind)))
    first, last = int(idx[0]), int(idx[-1])
    # Gaps: failed links, and dropped frames.
    for a, b in _runs(link_failed):
        step = positions[b + 1] - positions[a]
        missing = max(0.0, abs(float(step[0])) - n_rows)
        dropped = float(np.sum(np.maximum(link_dt_frames[a:b + 1] - 1.0, 0.0)))
        events.append(Event("gap", a, b + 1, {
            "reason": "dropped_frames" if dropped >= 0.5 else "too_fast",
            # Without overlap the true step is not measured: placed at least n_rows apart.
            "missing_rows": round(missing, 2), "missing_rows_known": False,
            "dropped_frames": int(round(dropped)),
            "step_px": [round(float(step[0]), 3), round(float(step[1]), 3)]}))
    for a, b in _runs((link_dt_frames > 1.5) & ~link_failed):
        dropped = float(np.sum(link_dt_frames[a:b + 1] - 1.0))
        events.append(Event("gap", a, b + 1, {
            "reason": "dropped_frames", "missing_rows": 0.0, "dropped_frames": int(round(dropped)),
            "bridged": True}))
    vel, v_stall, min_len = _stall_rule(positions, times_s, frame_rate_hz, pitch_um,
                                       stall_speed_mm_s=stall_speed_mm_s, min_stall_s=min_stall_s)
    v_along = vel[:, 0]
    # Stall: along the swipe slower than stall_speed_mm_s (and across slower than
    # _STALL_ACROSS times it) for at least min_stall_s.
    in_c = np.zeros(t_n, dtype=bool)
    in_c[first:last + 1] = True
    for a, b in _merged_stalls(_runs(_still(vel, v_stall) & in_c), positions, min_len):
        if b - a + 1 >= min_len:
            dur = (times_s[b] - times_s[a]) if frame_rate_hz else None
            events.append(Event("stall", a, b, {
                "frames": b - a + 1, "duration_s": None if dur is None else round(float(dur), 4),
                "position_px": [round(float(positions[a, 0]), 2), round(float(positions[a, 1]), 2)]}))
    # Low confidence over contact frames (the runs are reported last, less those of a cause).
    low = (confidence < low_confidence) & contact
    # Backtrack: along-swipe motion against the swipe's overall direction.
    direction = np.sign(positions[last, 0] - positions[first, 0]) or 1.0
    back = (direction * v_along < -v_stall) & in_c
    # ... also frame by frame: a quick jerk back (a few frames at the full speed of the
    # swipe) vanishes in the smoothed velocity (measured: 0.4 mm back in 2 ms at 2 kHz, three
    # of 20 such backtracks in 64 random simulated swipes went unreported).
    step = np.zeros(t_n)
    step[1:] = direction * np.diff(positions[:, 0])
    back |= (step < -v_stall) & in_c
    runs_c = _runs(contact)
    seg_first = {int(a) for a, _ in runs_c}
    seg_last = {int(b) for _, b in runs_c}
    for a, b in _runs(back):
        seg = direction * positions[max(a - 1, 0):min(b + 2, t_n), 0]
        dist = float(seg[0] - seg.min())
        # A lone step back into the first or the last frame in contact, the step beyond it
        # not undoing it (else the frame next to it is the odd one): that end frame has
        # neighbours on one side only, and a single misregistration of it cannot be told
        # from a reversal; its placement is doubtful, not the motion. (The 12 dB brick
        # texture of bench_accuracy.py: the first frame, 1/7 of the swipe's texture power,
        # matched its neighbour 1.4 px back with NCC 0.52-0.54 against 0.50-0.51 at the true
        # shift, and the frames 2-10 on agreed with either; it was read as a 1.04 px
        # backtrack.)
        # The same at the ends of a run of contact inside the swipe (a band with no ridges
        # between): the first frame after such a run has neighbours on one side only too
        # (bench_bands.py, the streaming stitcher: a whorl's first frame after a 1 mm band
        # read as a one-frame backtrack).
        lone_end = False
        if dist >= min_backtrack_px and a == b:
            if a - 1 in seg_first and a + 1 <= last:
                lone_end = step[a + 1] < dist
                f = a - 1
            elif a in seg_last and a - 1 > first:
                lone_end = step[a - 1] < dist
                f = a
        if lone_end:
            events.append(Event("low_confidence", f, f, {
                "frames": 1, "cause": "end_step",
                "min_confidence": round(float(confidence[f]), 3),
                "step_px": round(float(direction * (positions[a, 0] - positions[a - 1, 0])), 2)}))
            low[f] = False
        elif dist >= min_backtrack_px:
            events.append(Event("backtrack", a, b, {
                "distance_px": round(dist, 2), "distance_mm": round(dist * pitch_um / 1000, 3),
                "from_px": round(float(positions[a, 0]), 2)}))
    # Stretches with no texture at all (a crease or scar), crossed at the measured speed:
    # low confidence with their cause, the travel and its uncertainty.
    for a, b, travel_px, sigma_px in blank_runs:
        events.append(Event("low_confidence", int(a), int(b), {
            "frames": int(b - a + 1), "cause": "no_texture",
            "min_confidence": round(float(confidence[a:b + 1].min()), 3),
            "travel_px": round(float(travel_px), 2),
            "travel_mm": round(float(travel_px) * pitch_um / 1000, 3),
            "uncertainty_px": round(float(sigma_px), 2)}))
        low[a:b + 1] = False
    for a, b, speed_px, sigma_px in limit_runs:
        events.append(Event("low_confidence", int(a), int(b), {
            "frames": int(b - a + 1), "cause": "overlap_limit",
            "min_confidence": round(float(confidence[a:b + 1].min()), 3),
            "speed_px_per_frame": round(float(speed_px), 3),
            "uncertainty_px": round(float(sigma_px), 2)}))
        low[a:b + 1] = False
    # The placement swerving sideways (see find_swerves): the sideways placement there is
    # a guess, whatever the registrations' stated confidence.
    for a, b, exc in find_swerves(positions, first, last):
        events.append(Event("low_confidence", a, b, {
            "frames": int(b - a + 1), "cause": "swerve",
            "min_confidence": round(float(confidence[a:b + 1].min()), 3),
            "excursion_px": round(exc, 2), "excursion_mm": round(exc * pitch_um / 1000, 3),
            "within_travel_px": _SWERVE_TRAVEL_PX}))
        low[a:b + 1] = False
    # Low confidence over contact frames.
    for a, b in _runs(low):
        if b - a + 1 >= 3:
            events.append(Event("low_confidence", a, b, {
                "frames": b - a + 1, "min_confidence": round(float(confidence[a:b + 1].min()), 3)}))
    # Skew and rotation over the contact span.
    d = positions[last] - positions[first]
    skew = float(np.degrees(np.arctan2(d[1], abs(d[0])))) if abs(d[0]) > 0 else 0.0
    if abs(skew) > skew_limit_deg:
        events.append(Event("skew", first, last, {"skew_deg": round(skew, 2)}))
    turn = float(angles_deg[last] - angles_deg[first])
    if abs(turn) > rotation_limit_deg:
        events.append(Event("rotation", first, last, {"rotation_deg": round(turn, 2)}))
    return tuple(sorted(events, key=lambda e: (e.first_frame, e.kind)))


def _caused(events, cause):
    """The low_confidence events of one cause."""
    return [e for e in events if e.kind == "low_confidence" and e.details.get("cause") == cause]


def make_report(*, events, positions, angles_deg, confidence, contact, times_s, frame_rate_hz,
                n_rows, pitch_um, image, min_length_mm=5.0, n_plates=None, n_cols=None):
    """Summarise a reconstruction: figures, a verdict and reasons a driver could show a user.

    ``n_plates``: usable plates of the strip, if known. Under ``MIN_PLATES`` the verdict is
    unusable, under ``FEW_PLATES`` a reason says the placement is less reliable; so does one
    for fewer than ``NARROW_COLS`` columns holding usable plates (``n_cols``, if known).
    """
    idx = np.flatnonzero(contact)
    counts = {}
    for e in events:
        counts[e.kind] = counts.get(e.kind, 0) + 1
    if idx.size < 2:
        return QualityReport(verdict="unusable", reasons=("no finger on the sensor",),
                             swipe_length_mm=0.0, travel_mm=0.0, duration_s=0.0,
                             speed_mm_s={}, skew_deg=0.0, rotation_deg=0.0, coverage=0.0,
                             n_gaps=0, gap_rows=0.0, frames_in_contact=(0, 0),
                             mean_confidence=0.0, counts=counts)
    first, last = int(idx[0]), int(idx[-1])
    p = positions[first:last + 1]
    mm = pitch_um / 1000.0
    length_mm = float(np.ptp(p[:, 0]) + n_rows) * mm
    steps = np.diff(p, axis=0)
    travel_mm = float(np.sum(np.hypot(steps[:, 0], steps[:, 1]))) * mm
    if frame_rate_hz:
        duration = float(times_s[last] - times_s[first])
        dts = np.diff(times_s[first:last + 1])
        with np.errstate(invalid="ignore", divide="ignore"):
            v = np.abs(steps[:, 0]) * mm / np.where(dts > 0, dts, np.nan)
        v = v[np.isfinite(v)]
        # Per-frame increments are noisy; quote speeds over ~1 ms windows.
        win = max(1, int(round(0.001 * frame_rate_hz)))
        if v.size >= win:
            v = np.convolve(v, np.ones(win) / win, mode="valid")
        speed = {"mean": float(np.mean(v)), "median": float(np.median(v)),
                 "p95": float(np.percentile(v, 95)), "max": float(np.max(v))} if v.size else {}
    else:
        duration = float("nan")
        speed = {}
    d = p[-1] - p[0]
    skew = float(np.degrees(np.arctan2(d[1], abs(d[0])))) if abs(d[0]) > 0 else 0.0
    rotation = float(angles_deg[last] - angles_deg[first])
    gaps = [e for e in events if e.kind == "gap"]
    gap_rows = float(sum(e.details.get("missing_rows", 0.0) for e in gaps))
    unbridged = [e for e in gaps if not e.details.get("bridged", False)]
    finite = np.isfinite(image)
    rows_any = finite.any(axis=1)
    cols_any = finite.any(axis=0)
    box = finite[rows_any][:, cols_any] if rows_any.any() and cols_any.any() else finite
    coverage = float(box.mean()) if box.size else 0.0
    mean_conf = float(np.mean(confidence[idx]))
    reasons = []
    verdict = "usable"
    too_fast = [e for e in unbridged if e.details.get("reason") == "too_fast"]
    lost = [e for e in unbridged if e.details.get("reason") != "too_fast"]
    if too_fast:
        verdict = "unusable"
        reasons.append(f"swipe too fast: {len(too_fast)} place(s) where successive frames do "
                       "not overlap, so an unknown stretch of finger was not seen; swipe more "
                       "slowly")
    if lost:
        verdict = "unusable"
        reasons.append(f"{len(lost)} gap(s) after dropped frames with no overlap; an unknown "
                       "stretch of finger was not seen")
    if n_plates is not None and n_plates < MIN_PLATES:
        verdict = "unusable"
        reasons.append(f"the strip has only {n_plates} usable plates: too little texture per "
                       f"frame to place the frames reliably (fewer than {MIN_PLATES})")
    elif n_plates is not None and n_plates < FEW_PLATES:
        reasons.append(f"small strip ({n_plates} usable plates): placement less reliable, "
                       "errors of several pixels and percent are possible")
    elif n_cols is not None and n_cols < NARROW_COLS:
        reasons.append(f"narrow strip ({n_cols} columns of usable plates): placement less "
                       "reliable, slips of a ridge period (several pixels, several percent of "
                       "the length) are possible")
    bridged = [e for e in gaps if e.details.get("bridged", False)]
    if bridged:
        reasons.append(f"{len(bridged)} run(s) of dropped frames bridged by overlap; placement "
                       "there is less certain")
    if length_mm < min_length_mm:
        verdict = "unusable"
        reasons.append(f"swipe too short: {length_mm:.1f} mm of finger seen "
                       f"(at least {min_length_mm:.0f} mm needed); swipe the whole fingertip")
    if mean_conf < 0.5:
        verdict = "unusable"
        reasons.append(f"placement unreliable (mean confidence {mean_conf:.2f})")
    blank = _caused(events, "no_texture")
    if blank:
        mm = sum(e.details["travel_mm"] for e in blank)
        unc = float(np.sqrt(sum(e.details["uncertainty_px"] ** 2 for e in blank))) * pitch_um / 1000
        reasons.append(f"{len(blank)} stretch(es) with no ridges (a crease or scar?), {mm:.1f} mm "
                       f"in all, crossed at the swipe's speed: length there uncertain by about "
                       f"{unc:.2f} mm")
    limit = _caused(events, "overlap_limit")
    if limit:
        v = max(e.details["speed_px_per_frame"] for e in limit)
        reasons.append(f"{len(limit)} place(s) where the finger moved up to {v:.1f} px per frame "
                       f"on a {n_rows}-row strip: successive frames barely overlap and were "
                       "placed at the speed around them, so the length may be off by a few "
                       "percent; swipe more slowly or raise the frame rate")
    swerve = _caused(events, "swerve")
    if swerve:
        x = max(e.details["excursion_px"] for e in swerve)
        reasons.append(f"{len(swerve)} place(s) where the placement swerves sideways by up to "
                       f"{x:.0f} px ({x * pitch_um / 1000:.1f} mm) within "
                       f"{_SWERVE_TRAVEL_PX * pitch_um / 1000:.1f} mm of travel, which a finger "
                       "sliding over the sensor does not do: ridges running straight over the "
                       "strip left the sideways placement undetermined there, and the image "
                       "is distorted")
        # ... and on a small or narrow strip at the limit already: a strip of few plates
        # or columns has no well-placed stretch that could outweigh the swerve (bench_geometry.py:
        # a 20x16 strip 10.8 px across RMS and an 8x24 one 22 % long, both swerving by 10 px
        # and both called usable).
        small = ((n_plates is not None and n_plates < FEW_PLATES)
                 or (n_cols is not None and n_cols < NARROW_COLS))
        if x >= _SWERVE_UNUSABLE_PX or small:
            verdict = "unusable"
    if n_rows <= FEW_ROWS:
        reasons.append(f"strip of only {n_rows} rows: placement less reliable, errors of "
                       "several percent of the length are possible (over so few rows, ridges "
                       "running across the strip leave the motion along them undetermined)")
    end = _caused(events, "end_step")
    if end:
        v = max(abs(e.details["step_px"]) for e in end)
        reasons.append(f"{len(end)} frame(s) at the swipe's ends placed up to {v:.1f} px against "
                       "the swipe's direction from their neighbour: a doubtful placement of a "
                       "frame seen from one side only, not counted as the finger moving back")
    n_low = (counts.get("low_confidence", 0) - len(blank) - len(limit) - len(swerve)
             - len(end))
    if n_low and mean_conf >= 0.5:
        reasons.append(f"{n_low} stretch(es) of low placement confidence (e.g. ridges parallel "
                       "to the swipe)")
    if counts.get("stall"):
        reasons.append(f"finger stopped {counts['stall']} time(s) during the swipe")
    if counts.get("backtrack"):
        reasons.append(f"finger moved backwards {counts['backtrack']} time(s)")
    if abs(skew) > 3.0:
        reasons.append(f"slanted swipe: {skew:+.1f} degrees from the sensor axis (corrected)")
    if abs(rotation) > 1.0:
        reasons.append(f"finger turned by {rotation:+.1f} degrees during the swipe (corrected)")
    if coverage < 0.8 and verdict == "usable":
        reasons.append(f"only {100 * coverage:.0f} % of the image area holds data")
    return QualityReport(verdict=verdict, reasons=tuple(reasons), swipe_length_mm=length_mm,
                         travel_mm=travel_mm, duration_s=duration, speed_mm_s=speed,
                         skew_deg=skew, rotation_deg=rotation, coverage=coverage,
                         n_gaps=len(gaps), gap_rows=gap_rows, frames_in_contact=(first, last),
                         mean_confidence=mean_conf, counts=counts)
