"""Key-frame tracker: one compiled pass over the frames for real-time placement (fast mode).

Every frame is registered against a *key frame* (an earlier frame it still overlaps), not
only against its predecessor, so the small errors of small steps do not add up: while the
finger moves less than ``reach`` rows from the key, every frame is placed relative to the
same key and the error stays that of one pair. A new key is taken when the displacement
from the current one is large (at least half the reach) and nearly a whole number of pixels
in both axes: two frames a whole number of pixels apart sample the finger on the same grid,
so the interpolation and edge-aliasing errors that depend on the fractional shift vanish in
the hop that the rest of the swipe builds on. Where the finger stands still the key is
renewed when it no longer matches (a finger turning on the spot) and when the finger sets off
again (see _KEY_REFRESH_FRAMES).

Each registration is inverse-compositional Gauss-Newton (translation and offset) with cubic
convolution interpolation, started from the position the last step predicts (the motion is
smooth at kHz frame rates); a normalised cross-correlation search over every integer shift
takes over only when that fails. All of it runs in one compiled loop (numba): about 11 us a
frame for an 8 x 192 strip whose finger covers 136 columns, 17 us for 16 x 128, on one core of
a 2.0 GHz Xeon (benchmarks/bench_throughput.py times the whole fast mode).

The filter is a constant-velocity Kalman filter whose state also holds the positions of the
current and the previous key frame (stochastic cloning [3]_): every registration measures a
position relative to a key, and the correlation this creates is kept instead of ignored. Each
frame is registered against both keys while they overlap it, so a key's error is averaged
over the frames that see both instead of being handed on. Its acceleration allowance is
split along and across the current direction of travel [4]_ (the across share a fifth of it,
``sideways_acc``): a finger changes speed freely but hardly its direction, and where the
ridges run nearly straight over the strip, the registrations read the shift along them weakly
and biased; the path then keeps the direction the well-seen frames set instead of walking off
along the ridges. Tracking starts at the best-seen frame in the middle of the swipe and runs
forwards and backwards from it, so the partial contact at the ends is met with a velocity the
well-seen frames set.

References
----------
.. [1] S. Baker and I. Matthews, "Lucas-Kanade 20 years on: a unifying framework", Int. J.
       Computer Vision 56(3), 221-255 (2004). doi:10.1023/B:VISI.0000011205.11775.fd
.. [2] R. Keys, "Cubic convolution interpolation for digital image processing", IEEE Trans.
       ASSP 29(6), 1153-1160 (1981). doi:10.1109/TASSP.1981.1163711
.. [3] S. I. Roumeliotis and J. W. Burdick, "Stochastic cloning: a generalized framework for
       processing relative state measurements", Proc. IEEE ICRA 2002, 1788-1795.
       doi:10.1109/ROBOT.2002.1014801
.. [4] Y. Bar-Shalom, X. R. Li and T. Kirubarajan, "Estimation with Applications to Tracking
       and Navigation", Wiley 2001, sec. 6.3.3 (discrete white-noise acceleration model).
.. [5] H. Knutsson and C.-F. Westin, "Normalized and differential convolution", Proc.
       IEEE CVPR 1993, 515-523. doi:10.1109/CVPR.1993.341081
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numba
import numpy as np

from ._jit import JIT
from ._validate import check_array, check_frames, check_in_range, check_int, check_positive

__all__ = ["TrackResult", "track", "FrameTracker"]



@dataclass(frozen=True, eq=False)
class TrackResult:
    """Placement of the frames of a chain by the key-frame tracker.

    Attributes
    ----------
    positions : (N, 2) float64
        Position (along, across; px) of each chain frame relative to the first.
    info : (N, 2, 2) float64
        Information (px^-2) of each frame's registration against its reference frame
        (zero for the first frame and where a link failed).
    reference : (N,) int64
        Chain index of the frame each frame was registered against (-1: none).
    ncc : (N,) float64
        Normalised correlation of that registration's overlap.
    sigma : (N,) float64
        Residual standard deviation of that registration.
    link_ok : (N - 1,) bool
        Whether frame k + 1 was placed by a registration (False: no overlap found; placed
        by the motion alone).
    n_keys : int
        Number of key frames taken.
    variance : (N, 2) float64
        The filter's variance (px^2) of each position relative to the frame tracking started
        from (grows towards the ends: the drift the filter expects).
    start : int
        Chain index tracking started from (its ``reference`` is -1 and ``info`` zero).
    symmetric_edges : bool
        Whether the key frames took the edge-symmetric half-sample filters (see
        :func:`track`'s ``symmetric_edges``; with ``"auto"``, the one chosen).
    """

    positions: np.ndarray
    info: np.ndarray
    reference: np.ndarray
    ncc: np.ndarray
    sigma: np.ndarray
    link_ok: np.ndarray
    n_keys: int
    variance: np.ndarray
    start: int
    symmetric_edges: bool = False


@numba.njit(**JIT)
def _keys_w(f, w):
    f = np.float32(f)
    f2 = f * f
    f3 = f2 * f
    w[0] = -0.5 * f3 + f2 - 0.5 * f
    w[1] = 1.5 * f3 - 2.5 * f2 + 1.0
    w[2] = -1.5 * f3 + 2.0 * f2 + 0.5 * f
    w[3] = 0.5 * f3 - 0.5 * f2


@numba.njit(**JIT)
def _gradients(b, g0, g1, edge_along):
    """Central differences; at the first and last row and column the nearest interior
    difference (a gradient through the residual's own sample would bias the shift towards
    zero). Without ``edge_along`` (strips of four rows or more) the along gradient of the
    first and last row is zero instead: those rows then inform the across shift only. The
    nearest interior difference there is the slope a row and a half away, and a frame
    moving forwards always has its first row in the overlap and its last row out of it, so
    that misplaced slope reads along shifts long (with the half-sample filter's one-sided
    windows, see _lagrange_taps: on 8-row strips +0.4 to +2 % of span over scikit-image
    photographs; see DEVELOPERS.md)."""
    r_n, c_n = b.shape
    half = np.float32(0.5)
    for r in range(r_n):
        # along: the rows differenced, and the factor (whole rows: vectorised)
        if r_n < 3:
            lo, hi, f = 0, 1, np.float32(1.0)
        elif r == 0:
            lo, hi, f = 1, 2, np.float32(1.0 if edge_along or r_n < 4 else 0.0)
        elif r == r_n - 1:
            lo, hi, f = r_n - 3, r_n - 2, np.float32(1.0 if edge_along or r_n < 4 else 0.0)
        else:
            lo, hi, f = r - 1, r + 1, half
        bl = b[lo]
        bh = b[hi]
        ga = g0[r]
        for c in range(c_n):
            ga[c] = f * (bh[c] - bl[c])
        br = b[r]
        gc = g1[r]
        bn = br[2:]                      # views indexed from 0: no negative-index check
        gm = gc[1:c_n - 1]
        for c in range(c_n - 2):
            gm[c] = half * (bn[c] - br[c])
        gc[0] = br[2] - br[1]
        gc[c_n - 1] = br[c_n - 2] - br[c_n - 3]


@numba.njit(cache=True, inline="always")
def _slot(x, ne):
    """Storage column of column x of the extended twice-denser grid: the even columns first
    (``ne`` of them), then the odd ones (see _upsample_extend)."""
    return x // 2 if x % 2 == 0 else ne + x // 2


@numba.njit(cache=True, inline="always")
def _taps(wc, loc, row, j, kc):
    """Mid-point j of a row from its own Lagrange taps."""
    acc = np.float32(0.0)
    b0 = loc[j]
    for k in range(kc):
        acc += wc[j, k] * row[b0 + k]
    return acc


@numba.njit(**JIT)
def _upsample_extend(a, lor, wr, loc, wc, out):
    """Twice-denser grid (Lagrange mid-points, up to 6 taps) with Keys' boundary extension:
    interpolating it by cubic convolution has about eight times less phase error at ridge
    frequencies than interpolating the plates themselves. Written into ``out``
    (2R + 3, 2C + 3) in place, its columns stored by phase: the C + 2 even columns of the
    extended grid first, then its C + 1 odd ones (see ``_slot``), so that a registration
    reads every other column from contiguous memory."""
    r_n, c_n = a.shape
    nr = 2 * r_n - 1
    nc = 2 * c_n - 1
    ne = c_n + 2
    kr = wr.shape[1]
    kc = wc.shape[1]
    # The interior mid-points between columns share one centred 6-tap stencil: taken as a
    # vectorised loop; the few near the edges from their own taps.
    ja = c_n
    jb = 0
    if kc == 6:
        jm = (c_n - 1) // 2
        for j in range(c_n - 1):
            if loc[j] == j - 2:
                same = True
                for k in range(kc):
                    if wc[j, k] != wc[jm, k]:
                        same = False
                if same:
                    ja = min(ja, j)
                    jb = max(jb, j + 1)
    row = np.empty(c_n, dtype=np.float32)
    # Row by row: even rows are the plates, odd rows the mid-points between them; then the
    # mid-points between columns, on every row.
    for r in range(nr):
        i = r // 2
        if r % 2 == 0:
            for c in range(c_n):
                row[c] = a[i, c]
        else:
            for c in range(c_n):
                row[c] = 0.0
            for k in range(kr):
                wk = wr[i, k]
                ak = a[lor[i] + k]
                for c in range(c_n):
                    row[c] += wk * ak[c]
        rr = 2 + r
        # plates: extended column 2 + 2c (even); mid-points: 3 + 2j (odd)
        ev = out[rr, 1:1 + c_n]
        od = out[rr, ne + 1:ne + c_n]
        for c in range(c_n):
            ev[c] = row[c]
        if jb > ja:
            v0 = wc[ja, 0]
            v1 = wc[ja, 1]
            v2 = wc[ja, 2]
            v3 = wc[ja, 3]
            v4 = wc[ja, 4]
            v5 = wc[ja, 5]
            # views indexed from 0 (an index like j - 2 is checked for wrap-around, which
            # keeps the loop from being vectorised: 6x slower)
            m_j = jb - ja
            q0 = row[ja - 2:ja - 2 + m_j]
            q1 = row[ja - 1:ja - 1 + m_j]
            q2 = row[ja:ja + m_j]
            q3 = row[ja + 1:ja + 1 + m_j]
            q4 = row[ja + 2:ja + 2 + m_j]
            q5 = row[ja + 3:ja + 3 + m_j]
            oj = od[ja:jb]
            for j in range(m_j):
                oj[j] = (v0 * q0[j] + v1 * q1[j] + v2 * q2[j] + v3 * q3[j] + v4 * q4[j]
                         + v5 * q5[j])
        # the mid-points near the edges, each from its own taps
        for j in range(c_n - 1):
            if j == ja:
                break
            od[j] = _taps(wc, loc, row, j, kc)
        for j in range(max(jb, ja), c_n - 1):
            od[j] = _taps(wc, loc, row, j, kc)
    # Keys' boundary extension, two samples per side: rows (over the columns of x = 2 .. 2C:
    # storage columns 1 .. C and C + 3 .. 2C + 1, as whole rows), then columns (all rows).
    # (At least 2 rows, so at least 3 grid rows: the three-point formula always applies.)
    for s0, s1 in ((1, c_n + 1), (ne + 1, ne + c_n)):
        m_s = s1 - s0
        o0 = out[0, s0:s1]
        o1 = out[1, s0:s1]
        i2 = out[2, s0:s1]
        i3 = out[3, s0:s1]
        i4 = out[4, s0:s1]
        h2 = out[nr + 2, s0:s1]
        h3 = out[nr + 3, s0:s1]
        j1 = out[nr + 1, s0:s1]
        j0 = out[nr, s0:s1]
        jm = out[nr - 1, s0:s1]
        for c in range(m_s):
            lo1 = 3.0 * i2[c] - 3.0 * i3[c] + i4[c]
            hi1 = 3.0 * j1[c] - 3.0 * j0[c] + jm[c]
            o1[c] = lo1
            o0[c] = 2.0 * lo1 - i2[c]
            h2[c] = hi1
            h3[c] = 2.0 * hi1 - j1[c]
    x0 = _slot(0, ne)
    x1 = _slot(1, ne)
    x2 = _slot(2, ne)
    x3 = _slot(3, ne)
    x4 = _slot(4, ne)
    y0 = _slot(nc - 1, ne)
    y1 = _slot(nc, ne)
    y2 = _slot(nc + 1, ne)
    y3 = _slot(nc + 2, ne)
    y4 = _slot(nc + 3, ne)
    for r in range(nr + 4):
        lo1 = 3.0 * out[r, x2] - 3.0 * out[r, x3] + out[r, x4]
        hi1 = 3.0 * out[r, y2] - 3.0 * out[r, y1] + out[r, y0]
        out[r, x1] = lo1
        out[r, x0] = 2.0 * lo1 - out[r, x2]
        out[r, y3] = hi1
        out[r, y4] = 2.0 * hi1 - out[r, y2]


@numba.njit(cache=True, inline="always")
def _rows4(up, ra, s0, n, w0, w1, w2, w3, out):
    """out[q] = the four rows ra .. ra + 3 of ``up`` weighted by w0 .. w3 at storage column
    s0 + q, q < n (contiguous views indexed from 0: no negative-index branch, vectorised)."""
    u0 = up[ra, s0:s0 + n]
    u1 = up[ra + 1, s0:s0 + n]
    u2 = up[ra + 2, s0:s0 + n]
    u3 = up[ra + 3, s0:s0 + n]
    for q in range(n):
        out[q] = w0 * u0[q] + w1 * u1[q] + w2 * u2[q] + w3 * u3[q]


@numba.njit(**JIT)
def _gauss_newton(up_a, ma, b, g0, g1, mb, d0, d1, iters, lam, res, scratch, full, pre):
    """Shift (d0, d1) with b(u) ~ a(u + d) + offset, from the start (d0, d1).

    ``up_a``: frame a on the twice-denser grid, Keys-extended (see _upsample_extend).
    A weak prior (information lam, px^-2 in units of the residual variance) holds the shift
    near its start along directions the overlap does not determine.
    res gets: d0, d1, I00, I01, I11 (noise-only information, px^-2), ncc, sigma, n, ok.
    """
    r_n, c_n = b.shape
    # work arrays from the caller (no allocation per call): 8 + 2 (C + 4) + C floats
    wy = scratch[0:4]
    wx = scratch[4:8]
    ta = scratch[8:c_n + 12]
    tb = scratch[c_n + 12:2 * c_n + 16]
    wrow = scratch[2 * c_n + 16:3 * c_n + 16]
    ne = c_n + 2                             # even columns of up_a stored first
    ok = 0.0
    st0 = d0
    st1 = d1
    i00 = i01 = i11 = 0.0
    ncc = 0.0
    sig = 0.0
    n = 0.0
    for it in range(iters):
        if not (abs(d0) < r_n - 1 and abs(d1) < c_n - 3):
            ok = 0.0
            break
        f0 = np.floor(2.0 * d0)
        f1 = np.floor(2.0 * d1)
        k0 = int(f0)
        k1 = int(f1)
        _keys_w(2.0 * d0 - f0, wy)
        _keys_w(2.0 * d1 - f1, wx)
        # b's rows r (columns c) whose sample point r + d0 lies inside a's rows [0, R-1]
        r_lo = max(0, int(np.ceil(-d0)))
        r_hi = min(r_n - 1, int(np.floor(r_n - 1 - d0)))
        c_lo = max(0, int(np.ceil(-d1)))
        c_hi = min(c_n - 1, int(np.floor(c_n - 1 - d1)))
        # Single-precision sums within a row (vectorised), accumulated in double per row.
        sw = sg0 = sg1 = sgg00 = sgg01 = sgg11 = 0.0
        sr = sg0r = sg1r = 0.0
        si = st = sii = stt = sit = 0.0
        kc = int(np.floor(d1 + 0.5))
        x_first = 2 * c_lo + k1 - 1          # first up-grid column a tap touches
        n_p = c_hi - c_lo + 2
        w0 = wy[0]
        w1 = wy[1]
        w2 = wy[2]
        w3 = wy[3]
        c0 = x_first + 2                     # extended column of the first tap (>= 0)
        # Plate c's taps are the extended columns c0 + 2p + (0, 1, 2, 3), p = c - c_lo: every
        # other column from two runs of one phase each, contiguous in up_a's storage.
        sa = _slot(c0, ne)
        sb = _slot(c0 + 1, ne)
        for r in range(r_lo, r_hi + 1):
            ra = 2 * r + k0 + 1              # extended row of tap -1: (2r + k0 - 1) + 2
            _rows4(up_a, ra, sa, n_p, w0, w1, w2, w3, ta)
            _rows4(up_a, ra, sb, n_p, w0, w1, w2, w3, tb)
            # The row's overlap as views indexed from 0 (no negative-index check: vectorised).
            n_q = c_hi + 1 - c_lo
            ta1 = ta[1:n_q + 1]
            tb1 = tb[1:n_q + 1]
            bv = b[r, c_lo:c_hi + 1]
            g0v = g0[r, c_lo:c_hi + 1]
            g1v = g1[r, c_lo:c_hi + 1]
            x0 = wx[0]
            x1 = wx[1]
            x2 = wx[2]
            x3 = wx[3]
            if full:
                # Every plate usable: the template's own sums over the row come from its
                # row totals; only the sums that involve the interpolated key remain.
                z32 = np.float32(0.0)
                ri = rii = rit = r0i = r1i = z32
                for q in range(n_q):
                    iv = x0 * ta[q] + x1 * tb[q] + x2 * ta1[q] + x3 * tb1[q]
                    ri += iv
                    rii += iv * iv
                    rit += iv * bv[q]
                    r0i += g0v[q] * iv
                    r1i += g1v[q] * iv
                # template sums over the row minus the columns outside the overlap (few)
                width = c_hi + 1 - c_lo
                e0, e1, e2, e3, e4, e5, e6, e7, e8 = _template_row(b, g0, g1, r, c_n - width,
                                                                   c_lo, width)
                sw += c_hi + 1 - c_lo
                sg0 += pre[0, r] - e0
                sg1 += pre[1, r] - e1
                sgg00 += pre[2, r] - e2
                sgg01 += pre[3, r] - e3
                sgg11 += pre[4, r] - e4
                rt_ = pre[5, r] - e5
                st += rt_
                stt += pre[6, r] - e6
                si += ri
                sii += rii
                sit += rit
                sr += ri - rt_
                sg0r += r0i - (pre[7, r] - e7)
                sg1r += r1i - (pre[8, r] - e8)
                continue
            # weight: both plates usable (a's nearest plate to the sample point)
            rm = min(max(int(np.floor(r + d0 + 0.5)), 0), r_n - 1)
            for c in range(c_lo, c_hi + 1):
                wrow[c] = mb[r, c] * ma[rm, min(max(c + kc, 0), c_n - 1)]
            z32 = np.float32(0.0)
            rw = rg0 = rg1 = rgg00 = rgg01 = rgg11 = z32
            rr = rg0r = rg1r = z32
            ri = rt = rii = rtt = rit = z32
            wv = wrow[c_lo:c_hi + 1]
            for q in range(n_q):
                w = wv[q]
                iv = x0 * ta[q] + x1 * tb[q] + x2 * ta1[q] + x3 * tb1[q]
                tv = bv[q]
                e = iv - tv
                a0 = g0v[q]
                a1 = g1v[q]
                wa0 = w * a0
                wa1 = w * a1
                rw += w
                rg0 += wa0
                rg1 += wa1
                rgg00 += wa0 * a0
                rgg01 += wa0 * a1
                rgg11 += wa1 * a1
                rr += w * e
                rg0r += wa0 * e
                rg1r += wa1 * e
                ri += w * iv
                rt += w * tv
                rii += w * iv * iv
                rtt += w * tv * tv
                rit += w * iv * tv
            sw += rw
            sg0 += rg0
            sg1 += rg1
            sgg00 += rgg00
            sgg01 += rgg01
            sgg11 += rgg11
            sr += rr
            sg0r += rg0r
            sg1r += rg1r
            si += ri
            st += rt
            sii += rii
            stt += rtt
            sit += rit
        n = sw
        if n < 12.0:
            ok = 0.0
            break
        # Offset eliminated (Schur complement), then the 2 x 2 step.
        h00 = sgg00 - sg0 * sg0 / n
        h01 = sgg01 - sg0 * sg1 / n
        h11 = sgg11 - sg1 * sg1 / n
        q0 = sg0r - sg0 * sr / n
        q1 = sg1r - sg1 * sr / n
        vi = sii - si * si / n
        vt = stt - st * st / n
        cv = sit - si * st / n
        ncc = cv / np.sqrt(max(vi * vt, 1e-30))
        # residual variance after removing the offset
        ee = (sii - 2.0 * sit + stt) - sr * sr / n
        sig = np.sqrt(max(ee / max(n - 3.0, 1.0), 1e-12))
        pw = lam * sig * sig
        q0 += pw * (d0 - st0)
        q1 += pw * (d1 - st1)
        a00 = h00 + pw
        a11 = h11 + pw
        det = a00 * a11 - h01 * h01
        if det <= 0.0:
            ok = 0.0
            break
        s0 = (a11 * q0 - h01 * q1) / det
        s1 = (a00 * q1 - h01 * q0) / det
        if not (np.isfinite(s0) and np.isfinite(s1)):
            ok = 0.0
            break
        d0 -= s0
        d1 -= s1
        s2 = sig * sig
        i00 = h00 / s2
        i01 = h01 / s2
        i11 = h11 / s2
        ok = 1.0
        # Each step takes about 90 % of the way (central differences understate the slope of
        # ridge-frequency content by about 8 %), so after a step under 0.01 px what is left is
        # about a thousandth of a pixel, far below the model error allowed for.
        if abs(s0) < 1e-2 and abs(s1) < 1e-2:
            break
    res[0] = d0
    res[1] = d1
    res[2] = i00
    res[3] = i01
    res[4] = i11
    res[5] = ncc
    res[6] = sig
    res[7] = n
    res[8] = ok


@numba.njit(cache=True, inline="always")
def _run_sums(b, g0, g1, zero):
    """Sums of g0, g1, g0^2, g0 g1, g1^2, b, b^2, g0 b, g1 b over runs of equal length (views
    indexed from 0: vectorised), in the type of ``zero``."""
    s0 = s1 = s2 = s3 = s4 = s5 = s6 = s7 = s8 = zero
    for c in range(b.shape[0]):
        a0 = zero + g0[c]
        a1 = zero + g1[c]
        t = zero + b[c]
        s0 += a0
        s1 += a1
        s2 += a0 * a0
        s3 += a0 * a1
        s4 += a1 * a1
        s5 += t
        s6 += t * t
        s7 += a0 * t
        s8 += a1 * t
    return s0, s1, s2, s3, s4, s5, s6, s7, s8


@numba.njit(cache=True, inline="always")
def _template_row(b, g0, g1, r, n, c_skip, width):
    """Sums of g0, g1, g0^2, g0 g1, g1^2, b, b^2, g0 b, g1 b over n columns of row r: column
    k for k < c_skip, column k + width after (a run of ``width`` columns skipped); double."""
    k1 = min(c_skip, n)
    u = _run_sums(b[r, :k1], g0[r, :k1], g1[r, :k1], 0.0)
    lo = k1 + width
    hi = n + width
    v = _run_sums(b[r, lo:hi], g0[r, lo:hi], g1[r, lo:hi], 0.0)
    return (u[0] + v[0], u[1] + v[1], u[2] + v[2], u[3] + v[3], u[4] + v[4], u[5] + v[5],
            u[6] + v[6], u[7] + v[7], u[8] + v[8])


@numba.njit(**JIT)
def _template_sums(b, g0, g1, pre):
    """Per-row sums over all columns of g0, g1, g0^2, g0 g1, g1^2, b, b^2, g0 b, g1 b
    (``pre``, (9, R)); a registration subtracts the few columns outside its overlap. Single
    precision within a row, like the registration's own row sums (a few hundred terms:
    relative error ~1e-7, far below the noise; 4x faster than double)."""
    r_n = b.shape[0]
    for r in range(r_n):
        sums = _run_sums(b[r], g0[r], g1[r], np.float32(0.0))
        for k in range(9):
            pre[k, r] = sums[k]


# Search candidates whose scores differ by less than this are taken as equally good.
_TIE = 0.01


@numba.njit(**JIT)
def _coarse(a, b, m, max_along, max_across, p0, p1, use_prior, res):
    """Integer shift of b against a by normalised cross-correlation over every candidate,
    scored by a lower confidence bound (NCC - 2 / sqrt(n)); a candidate within 1.5 px of
    the prediction (p0, p1) wins unless the global peak is clearly stronger. ``res`` (5,)
    gets the chosen shift and its score, then the global choice (``res[3:5]``).

    The NCC is taken over each candidate's overlap (its means and spreads; plates weighted
    by ``m``), so the rows' means count: with ridges running across the strip (an arch)
    they carry nearly all of the along-swipe signal. (Rows normalised one by one lost it: on
    an 8x64 arch at 18 dB the search put a 1.2-row step at 7 rows, a one-row overlap of
    noise, and a false gap ended the link.)"""
    r_n, c_n = a.shape
    res[3] = 0.0
    res[4] = 0.0
    n_d = 2 * max_along + 1
    n_e = 2 * max_across + 1
    score = np.full((n_d, n_e), -1e30)
    best = -1e30
    full = True
    for r in range(r_n):
        for c in range(c_n):
            if m[r, c] != 1.0:
                full = False
    if full:
        # Every plate usable: the overlap's sums of a, a^2, b, b^2 from running sums along
        # each row, so only the cross products are summed per candidate (a third of the work).
        pa = np.zeros((r_n, c_n + 1))
        pa2 = np.zeros((r_n, c_n + 1))
        pb = np.zeros((r_n, c_n + 1))
        pb2 = np.zeros((r_n, c_n + 1))
        for r in range(r_n):
            for c in range(c_n):
                x = float(a[r, c])
                y = float(b[r, c])
                pa[r, c + 1] = pa[r, c] + x
                pa2[r, c + 1] = pa2[r, c] + x * x
                pb[r, c + 1] = pb[r, c] + y
                pb2[r, c + 1] = pb2[r, c] + y * y
    for d in range(-max_along, max_along + 1):
        rl = max(0, -d)
        rh = min(r_n, r_n - d)
        if rh - rl < 1:
            continue
        for e in range(-max_across, max_across + 1):
            cl = max(0, -e)
            ch = min(c_n, c_n - e)
            if ch - cl < 4:
                continue
            sn = sx = sy = sxx = syy = sxy = 0.0
            if full:
                sn = float((rh - rl) * (ch - cl))
                for r in range(rl, rh):
                    sx += pa[r + d, ch + e] - pa[r + d, cl + e]
                    sxx += pa2[r + d, ch + e] - pa2[r + d, cl + e]
                    sy += pb[r, ch] - pb[r, cl]
                    syy += pb2[r, ch] - pb2[r, cl]
                    xr = a[r + d, cl + e:ch + e]
                    yr = b[r, cl:ch]
                    rxy = np.float32(0.0)
                    for c in range(ch - cl):
                        rxy += xr[c] * yr[c]
                    sxy += rxy
            else:
                for r in range(rl, rh):
                    for c in range(cl, ch):
                        w = m[r + d, c + e] * m[r, c]
                        x = a[r + d, c + e]
                        y = b[r, c]
                        sn += w
                        sx += w * x
                        sy += w * y
                        sxx += w * x * x
                        syy += w * y * y
                        sxy += w * x * y
            if sn < 4.0:
                continue
            vx = sxx - sx * sx / sn
            vy = syy - sy * sy / sn
            if not (vx > 0.0 and vy > 0.0):
                continue
            v = (sxy - sx * sy / sn) / np.sqrt(vx * vy) - 2.0 / np.sqrt(sn)
            score[d + max_along, e + max_across] = v
            if v > best:
                best = v
    # Among the candidates as good as the best (within _TIE), the one nearest the prediction
    # (or no shift): on oblique ridges the peak is a ridge line through the integer grid, and
    # a far end of it is a start the refinement slides back from by more than the 1.5 px it
    # may move (an 8x64 arch: a good 0.95 match rejected, a false gap).
    q0 = p0 if use_prior else 0.0
    q1 = p1 if use_prior else 0.0
    bd = be = 0
    bdist = 1e30
    bnear = -1e30
    nd = ne = 0
    for i in range(n_d):
        for k in range(n_e):
            v = score[i, k]
            if v <= -1e29:
                continue
            d = i - max_along
            e = k - max_across
            if v >= best - _TIE:
                dist = (d - q0) ** 2 + (e - q1) ** 2
                if dist < bdist:
                    bdist = dist
                    bd = d
                    be = e
            if use_prior and abs(d - p0) <= 1.5 and abs(e - p1) <= 1.5 and v > bnear:
                bnear = v
                nd = d
                ne = e
    best = score[bd + max_along, be + max_across] if best > -1e29 else best
    # the global choice (the caller accepts a refinement that slid onto it)
    res[3] = bd
    res[4] = be
    if use_prior and bnear > -1e29 and bnear >= 0.75 * best:
        bd = nd
        be = ne
        best = bnear
    res[0] = bd
    res[1] = be
    res[2] = best


# State of the filter: position (2), velocity (2) and clones of the position at the current
# and at the previous key frame (2 + 2). Every registration measures position - clone:
# carrying the keys' positions in the state (stochastic cloning) keeps the correlation among
# all frames measured against the same key, so the motion model and the frames that see both
# keys correct a key's error instead of passing it on unchanged.
_NS = 8
# The filter's float state: running NCC, x (_NS), P (_NS x _NS), then the key's time and
# the best NCC against it (from _ST_KEY_T on).
_ST_KEY_T = 1 + _NS + _NS * _NS
# The filter's white acceleration across the finger's current direction of travel, as a
# fraction of q_acc (along it, q_acc): a finger speeds up and slows down freely but hardly
# changes direction, and on a slanted swipe its across speed follows its along speed. Where
# the ridges run nearly straight over a stretch (the lower finger, the fingertip arriving),
# a registration reads the shift along the ridges only weakly, and biased by tenths of a
# pixel by the interpolation's phase error (noise-free 16x128 frames at 1.5-1.8 px per frame:
# single links 0.3-0.6 px off along the ridges from the true start, while frames with rows
# aligned read the true across shift within 0.08 px); with the same allowance in every
# direction, such links walked the path 5 px off across within 40 frames, which no later
# model pass can see (the data do not change along the ridges). Held to its direction, the
# path crosses such stretches at the direction the well-seen frames set. Measured (default
# mode, across RMS median; bench_random.py's generator, 64 swipes each, seeds 7000 / 8000 /
# 9200): 18 x 14 mm fingers (wider than the strip, so no pad edge in view across) 0.274 /
# 0.315 / 0.278 -> 0.222 / 0.255 / 0.220 px; 12 x 10 mm fingers 0.127 / 0.139 / 0.115 ->
# 0.125 / 0.129 / 0.114 px, worst span error 0.64 -> 0.40 % (seed 7000). Fractions of 0.05
# to 0.35 all helped (18 x 14 seed 7000: 0.225 / 0.237 / 0.220 / 0.222 / 0.243 at 0.05 / 0.1
# / 0.15 / 0.2 / 0.35).
_ACC_SIDE = 0.2
# Speed (px per frame) under which the direction of travel is not trusted (a stall, a
# reversal): the allowance is then q_acc in every direction.
_STILL_PX = 0.05
# A registration is a failed prediction when it ends more than 1.5 px from it in either axis
# (then the frame is searched against its predecessor, and a link that fails both is a gap);
# but where the information's smaller eigenvalue is under this share of the larger, only the
# distance along the larger one's direction counts: ridges running straight over the whole
# strip leave the shift along them to the prior, the Gauss-Newton steps wander there, and
# with the filter held to the finger's direction (_ACC_SIDE) the wandering measurements
# failed their predictions and broke the track (the simulator's default 20 x 14 mm finger,
# a tented arch on 16x128 at 50 mm/s: two false gaps, span +10.7 %; held as before, 12.6 px
# across; with this -0.11 % and 2.3 px, fast mode +10.9 -> -0.00 %). 0.01 did not cover that
# swipe; 0.1 let a 12x96 arch accept wandering links its searches had placed better (across
# 0.065 -> 0.249 px) and bench_bands.py's fast span median 0.111 -> 0.142 %; 0.03 changed
# neither.
_WEAK_RATIO = 0.03


@numba.njit(**JIT)
def _kalman_predict(x, P, dt, q_acc, side):
    """Constant-velocity prediction over dt frames with white acceleration (px/frame^2),
    ``q_acc`` along the current direction of travel and ``side * q_acc`` across it."""
    for k in range(2):
        x[k] += x[k + 2] * dt
    # P <- F P F^T + Q, F = identity with dt at (k, k + 2)
    for i in range(_NS):
        for k in range(2):
            P[i, k] += dt * P[i, k + 2]
    for j in range(_NS):
        for k in range(2):
            P[k, j] += dt * P[k + 2, j]
    # Q: white acceleration, a2 = q_acc^2 along the current velocity and side^2 a2 across it
    # (the finger changes speed freely but keeps its direction; see _ACC_SIDE), the same in
    # every direction while the finger is (nearly) still.
    a2 = q_acc * q_acc
    vn = np.sqrt(x[2] * x[2] + x[3] * x[3])
    if vn > _STILL_PX:
        u0 = x[2] / vn
        u1 = x[3] / vn
        s2 = side * side
    else:
        u0 = 1.0
        u1 = 0.0
        s2 = 1.0
    for k in range(2):
        for m in range(2):
            uu = (u0 if k == 0 else u1) * (u0 if m == 0 else u1)
            a = a2 * (uu + s2 * ((1.0 if k == m else 0.0) - uu))
            P[k, m] += 0.25 * dt ** 4 * a
            P[k, m + 2] += 0.5 * dt ** 3 * a
            P[k + 2, m] += 0.5 * dt ** 3 * a
            P[k + 2, m + 2] += dt * dt * a


@numba.njit(**JIT)
def _near_prediction(res, s0, s1):
    """Whether a registration ended within 1.5 px of its start (the prediction) in each
    direction it determines: along the least determined direction of its information, when
    that holds under _WEAK_RATIO of the most determined one's, any distance passes (the
    texture leaves the shift there to the prior, and the Gauss-Newton steps wander)."""
    d0 = res[0] - s0
    d1 = res[1] - s1
    j00 = res[2]
    j01 = res[3]
    j11 = res[4]
    h = 0.5 * (j00 + j11)
    r = np.sqrt(0.25 * (j00 - j11) ** 2 + j01 * j01)
    lmax = h + r
    lmin = h - r
    if lmax > 0.0 and lmin < _WEAK_RATIO * lmax:
        # unit vector of the most determined direction
        if abs(j01) > 1e-30:
            e0 = lmax - j11
            e1 = j01
        elif j00 >= j11:
            e0 = 1.0
            e1 = 0.0
        else:
            e0 = 0.0
            e1 = 1.0
        n = np.sqrt(e0 * e0 + e1 * e1)
        return abs((d0 * e0 + d1 * e1) / n) < 1.5
    return abs(d0) < 1.5 and abs(d1) < 1.5


@numba.njit(**JIT)
def _kalman_update(x, P, slot, m0, m1, j00, j01, j11, ks):
    """Update with a measurement (m0, m1) of position - clone[slot] whose information is
    [[j00, j01], [j01, j11]].

    The measurement covariance is the inverse of the (regularised) information, so a
    direction the overlap does not determine (aperture problem) leaves the prediction alone.
    """
    eps = 1e-6
    a = j00 + eps
    d = j11 + eps
    det = a * d - j01 * j01
    r00 = d / det
    r01 = -j01 / det
    r11 = a / det
    # P H^T: column k is P[:, k] - P[:, slot + k]
    PH = ks[:, 0:2]
    K = ks[:, 2:4]
    Pn = ks[:, 4:4 + _NS]
    for i in range(_NS):
        for k in range(2):
            PH[i, k] = P[i, k] - P[i, slot + k]
    s00 = PH[0, 0] - PH[slot, 0] + r00
    s01 = PH[0, 1] - PH[slot, 1] + r01
    s11 = PH[1, 1] - PH[slot + 1, 1] + r11
    sd = s00 * s11 - s01 * s01
    i00 = s11 / sd
    i01 = -s01 / sd
    i11 = s00 / sd
    e0 = m0 - (x[0] - x[slot])
    e1 = m1 - (x[1] - x[slot + 1])
    for i in range(_NS):
        K[i, 0] = PH[i, 0] * i00 + PH[i, 1] * i01
        K[i, 1] = PH[i, 0] * i01 + PH[i, 1] * i11
    for i in range(_NS):
        x[i] += K[i, 0] * e0 + K[i, 1] * e1
    # P <- P - K (H P) with H P = (P H^T)^T
    for i in range(_NS):
        for j in range(_NS):
            Pn[i, j] = P[i, j] - K[i, 0] * PH[j, 0] - K[i, 1] * PH[j, 1]
    for i in range(_NS):
        for j in range(_NS):
            P[i, j] = 0.5 * (Pn[i, j] + Pn[j, i])


@numba.njit(**JIT)
def _kalman_copy(x, P, src, dst):
    """State components src, src + 1 copied into dst, dst + 1 (a clone: fully correlated)."""
    for k in range(2):
        x[dst + k] = x[src + k]
    for i in range(_NS):
        for k in range(2):
            P[i, dst + k] = P[i, src + k]
    for k in range(2):
        for j in range(_NS):
            P[dst + k, j] = P[src + k, j]


@numba.njit(**JIT)
def _with_model_error(j00, j01, j11, s2m):
    """Noise-only information plus a model-error allowance (aliasing, interpolation):
    J_eff = (J^-1 + s^2 I)^-1 = J - J (J + I / s^2)^-1 J."""
    b00 = j00 + 1.0 / s2m
    b11 = j11 + 1.0 / s2m
    bd = b00 * b11 - j01 * j01
    c00 = b11 / bd
    c01 = -j01 / bd
    c11 = b00 / bd
    t00 = j00 * c00 + j01 * c01
    t01 = j00 * c01 + j01 * c11
    t10 = j01 * c00 + j11 * c01
    t11 = j01 * c01 + j11 * c11
    return (j00 - (t00 * j00 + t01 * j01), j01 - (t00 * j01 + t01 * j11),
            j11 - (t10 * j01 + t11 * j11))


# A registration (predicted or searched) must be about as good as the links so far: its NCC
# at least the running mean of the accepted ones minus this. Predicted links had only the
# absolute floor (min_ncc) before: as the finger left a strip half uncovered, the frame after
# a 0.6 mm jump matched the one before at the predicted shift with 0.59 against 0.97-0.99
# (the uncovered plates' static level correlates at any shift), and the gap went unreported.
# Too-fast bench: 22 -> 23 of 24 gaps; 64 random swipes: no false event, same accuracy. One
# genuine 4-row link inside a jump (blurred, 19 dB) failed with it and was pushed out to R.
_NCC_DROP = 0.25
# ... and as good as them (within this) where the refinement slid from the searched candidate
# onto the search's global best: ridges repeat along the swipe, and across a true gap a
# false match slid so too with the looser bar (too-fast bench, an 8x192 arch at 100 mm/s:
# its gap went unreported and the span error went from -2.7 to -7.8 %).
_NCC_DROP_SLID = 0.05
# Keys in a stall. A finger that stalls keeps its key for the whole stall (it does not move
# away from it), and that key is often a few rows back, taken before the finger slowed down.
# Two rules keep it from going stale:
# - When the finger sets off again (a step of _KEY_MOVE_STEP px per frame period or more after
#   _KEY_STILL_SPAN frames under _KEY_STILL_STEP) on a key at least _KEY_REFRESH_FRAMES frame
#   periods old, the frame is placed against the last still frame, which becomes the key
#   (as when a prediction fails). Against the old key its first frames overlap it by fewer
#   and fewer rows: bench_random.py's swipes with a stall (default mode, seed 7000) came out
#   up to 0.41 % short (0.29 % now; along RMS mean over all 64 swipes 0.071 -> 0.064 px).
# - While the finger stands still, a key whose NCC with the frame has fallen to
#   1 - NCC > 2 (1 - best NCC against it) + 0.02 is replaced by the frame. A finger turns on
#   the spot as it stalls, and every frame was registered by translation alone against a key
#   turned ever further from it: scikit-image's grass photograph swiped at 0.77 px per frame
#   on an 8x192 strip, turning 2 degrees in a stall of 170 frames, read 0.55 with the key at
#   the end of the stall and the first frames after it placed 1.3 px short along (0.07 now;
#   the gravel photograph turning the other way 0.56 -> 0.04 px). Only while still: as a
#   frame moves away from its key the NCC falls anyway (fewer rows overlap).
_KEY_REFRESH_FRAMES = 16.0
_KEY_STILL_STEP = 0.05
_KEY_STILL_SPAN = 8
_KEY_MOVE_STEP = 0.3
_KEY_DECORRELATED = 2.0
_KEY_DECORRELATED_ADD = 0.02


@numba.njit(**JIT)
def _still(pos, tchain, j):
    """The finger stood still (under _KEY_STILL_STEP px per frame period) over the
    _KEY_STILL_SPAN frames up to frame j."""
    k = j - _KEY_STILL_SPAN
    if k < 0:
        return False
    span = max(tchain[j] - tchain[k], 1e-9)
    return max(abs(pos[j, 0] - pos[k, 0]), abs(pos[j, 1] - pos[k, 1])) < _KEY_STILL_STEP * span


@numba.njit(**JIT)
def _sets_off(pos, tchain, j, p0, p1):
    """Frame j (placed at p0, p1) moved on from frame j - 1 by _KEY_MOVE_STEP px per frame
    period or more, after the finger had stood still up to frame j - 1 (:func:`_still`)."""
    now = max(abs(p0 - pos[j - 1, 0]), abs(p1 - pos[j - 1, 1]))
    return (now > _KEY_MOVE_STEP * max(tchain[j] - tchain[j - 1], 1e-9)
            and _still(pos, tchain, j - 1))


@numba.njit(**JIT)
def _track(z, m, chain, tchain, lor, wr, loc, wc, max_along, max_across, reach, iters, lam,
           min_ncc, q_acc, q_side, model_px, use_old, info_scale, sym, up_key, up_old, st_f, st_i,
           ref_base, pos, info, ref, ncc, sig, link_ok, pvar):
    """Place chain[1:] (chain[0] is placed: at ``pos[0]``). The filter lives in ``st_f``
    (running NCC, state, covariance) and ``st_i`` (started, have_v, have_old, key relative to
    chain[0], keys so far) and the key frames in ``up_key``/``up_old``, so a swipe can be fed
    in pieces, each starting with the last frame of the one before. ``ref`` gets each
    frame's key as ``ref_base`` + chain index (-1: no overlap). Returns the keys so far."""
    n_ch = chain.shape[0]
    r_n, c_n = z.shape[1], z.shape[2]
    key_caller = up_key
    old_caller = up_old
    swaps = 0
    up_prev = np.zeros((2 * r_n + 3, 2 * c_n + 3), dtype=np.float32)
    g0 = np.empty((r_n, c_n), dtype=np.float32)
    g1 = np.empty((r_n, c_n), dtype=np.float32)
    res = np.zeros(9)
    res2 = np.zeros(9)
    res_key = np.zeros(9)                       # a key registration held while another is tried
    scratch = np.zeros(3 * c_n + 16, dtype=np.float32)
    pre = np.zeros((9, r_n))
    full = True
    for r in range(r_n):
        for c in range(c_n):
            if m[r, c] != 1.0:
                full = False
    ks = np.zeros((_NS, _NS + 4))                # Kalman work array
    cres = np.zeros(5)
    x = st_f[1:1 + _NS].copy()
    P = st_f[1 + _NS:1 + _NS + _NS * _NS].copy().reshape((_NS, _NS))
    if st_i[0] == 0:
        x[:] = 0.0
        P[:, :] = 0.0
        have_v = False
        have_old = False
        ncc_run = 0.0
        key = 0
        key_t = tchain[0]
        key_best = 0.0
        _upsample_extend(z[chain[0]], lor, wr, loc, wc, up_key)
        n_keys = 1
    else:
        have_v = st_i[1] != 0
        have_old = st_i[2] != 0
        key = st_i[3]
        n_keys = st_i[4]
        ncc_run = st_f[0]
        key_t = st_f[_ST_KEY_T]
        key_best = st_f[_ST_KEY_T + 1]
    ref[0] = -1
    s2m = model_px * model_px
    # The older key is used while at least two rows still overlap it.
    old_reach = r_n - 2.0
    for j in range(1, n_ch):
        t = chain[j]
        b = z[t]
        _gradients(b, g0, g1, not sym)
        if full:
            _template_sums(b, g0, g1, pre)
        dt = tchain[j] - tchain[j - 1]
        _kalman_predict(x, P, dt, q_acc, q_side)
        placed = False
        fresh = False
        exit_try = False
        if have_v:
            s0 = x[0] - x[4]
            s1 = x[1] - x[5]
            if abs(s0) < r_n - 1 and abs(s1) < c_n // 2:
                _gauss_newton(up_key, m, b, g0, g1, m, s0, s1, iters, lam, res, scratch, full,
                              pre)
                if (res[8] > 0.0 and res[5] >= max(min_ncc, ncc_run - _NCC_DROP)
                        and _near_prediction(res, s0, s1)):
                    placed = True
                    if (tchain[j] - key_t >= _KEY_REFRESH_FRAMES and key < j - 1
                            and _sets_off(pos, tchain, j, x[4] + res[0], x[5] + res[1])):
                        # the finger sets off after standing still on a stale key: placed
                        # against the last still frame instead, which becomes the key
                        # (this placement stands if that fails)
                        placed = False
                        exit_try = True
                        res_key[:] = res
        if not placed:
            # Against the previous frame: integer search, then refinement.
            a = z[chain[j - 1]]
            pp0 = x[0] - pos[j - 1, 0]
            pp1 = x[1] - pos[j - 1, 1]
            _coarse(a, b, m, max_along, max_across, pp0, pp1, have_v, cres)
            if cres[2] > 0.0:
                _upsample_extend(a, lor, wr, loc, wc, up_prev)
                _gauss_newton(up_prev, m, b, g0, g1, m, cres[0], cres[1], iters + 2, lam, res,
                              scratch, full, pre)
                # The prediction failed, so something abrupt happened (a jump, a dropped
                # frame): a match found by search must be about as good as the links so far,
                # or it is a chance resemblance and the link is a gap. It must also stay
                # within 1.5 px of where the search put it, or, if the search chose a
                # candidate near the prediction over its global best, end within 1.5 px of
                # that best: the two then agree (a finger that set off again at 2.8 px per
                # frame after a stall was searched near its prediction of 0, slid onto the
                # true shift, and the link had ended as a gap).
                if res[8] > 0.0 and res[5] >= max(min_ncc, ncc_run - _NCC_DROP):
                    if abs(res[0] - cres[0]) < 1.5 and abs(res[1] - cres[1]) < 1.5:
                        placed = True
                    elif ((cres[3] != cres[0] or cres[4] != cres[1])
                          and abs(res[0] - cres[3]) < 1.5 and abs(res[1] - cres[4]) < 1.5
                          and res[5] >= ncc_run - _NCC_DROP_SLID):
                        placed = True
                if placed:
                    fresh = True
                    key = j - 1
                    key_t = tchain[j - 1]
                    key_best = 0.0
                    up_key[:, :] = up_prev
                    have_old = False
                    n_keys += 1
            if not placed and exit_try:
                res[:] = res_key
                placed = True
        if placed:
            e00, e01, e11 = _with_model_error(info_scale * res[2], info_scale * res[3],
                                              info_scale * res[4], s2m)
            if fresh:
                # First link, or the prediction failed: the previous frame (as placed) is the
                # new origin of the relative measurements and the velocity starts afresh.
                x[4] = pos[j - 1, 0]
                x[5] = pos[j - 1, 1]
                x[0] = x[4] + res[0]
                x[1] = x[5] + res[1]
                x[2] = res[0] / max(dt, 1e-9)
                x[3] = res[1] / max(dt, 1e-9)
                for i in range(_NS):
                    for k in range(_NS):
                        P[i, k] = 0.0
                for k in range(2):
                    vk = (e11 if k else e00)
                    pv = 1.0 / max(vk, 1e-6) + s2m
                    P[k, k] = pv
                    P[k + 2, k + 2] = pv / max(dt * dt, 1e-9) + 0.01
                    P[k, k + 2] = pv / max(dt, 1e-9)
                    P[k + 2, k] = pv / max(dt, 1e-9)
            else:
                _kalman_update(x, P, 4, res[0], res[1], e00, e01, e11, ks)
                if have_old:
                    s0 = x[0] - x[6]
                    s1 = x[1] - x[7]
                    if abs(s0) <= old_reach and abs(s1) < c_n // 2:
                        _gauss_newton(up_old, m, b, g0, g1, m, s0, s1, iters, lam, res2, scratch,
                                      full, pre)
                        if (res2[8] > 0.0 and res2[5] >= min_ncc
                                and abs(res2[0] - s0) < 0.5 and abs(res2[1] - s1) < 0.5):
                            f00, f01, f11 = _with_model_error(info_scale * res2[2],
                                                              info_scale * res2[3],
                                                              info_scale * res2[4], s2m)
                            _kalman_update(x, P, 6, res2[0], res2[1], f00, f01, f11, ks)
            pos[j, 0] = x[0]
            pos[j, 1] = x[1]
            info[j, 0, 0] = e00
            info[j, 0, 1] = e01
            info[j, 1, 0] = e01
            info[j, 1, 1] = e11
            ref[j] = key + ref_base
            ncc[j] = res[5]
            sig[j] = res[6]
            link_ok[j - 1] = True
            have_v = True
            # running mean of the accepted correlations (about the last ten links)
            ncc_run = res[5] if ncc_run == 0.0 else 0.9 * ncc_run + 0.1 * res[5]
            if not fresh:
                key_best = max(key_best, res[5])
        else:
            # No overlap found: carried by the motion; the frame starts a new key.
            pos[j, 0] = x[0]
            pos[j, 1] = x[1]
            ref[j] = -1
            ncc[j] = res[5] if res[8] > 0.0 else 0.0
            sig[j] = res[6]
            link_ok[j - 1] = False
            key = j
            key_t = tchain[j]
            key_best = 0.0
            _upsample_extend(b, lor, wr, loc, wc, up_key)
            _kalman_copy(x, P, 0, 4)
            have_old = False
            n_keys += 1
            pvar[j, 0] = P[0, 0]
            pvar[j, 1] = P[1, 1]
            continue
        # A new key: far enough from the current one (half the reach), at the displacement
        # nearest a whole pixel among this frame and the frames predicted to follow before
        # the reach is exceeded (or as far as the overlap allows). The current key becomes
        # the older one.
        e0 = x[0] - x[4]
        e1 = x[1] - x[5]
        frac = max(abs(e0 - np.round(e0)), abs(e1 - np.round(e1)))
        promote = abs(e0) >= reach or abs(e1) >= c_n // 4
        if not promote and abs(e0) >= 0.5 * reach:
            promote = frac < 0.1
            if not promote:
                best = 1.0
                step = max(dt, 1e-9)
                for k in range(1, 65):
                    f0 = e0 + x[2] * step * k
                    f1 = e1 + x[3] * step * k
                    if abs(f0) >= reach or abs(f1) >= c_n // 4:
                        break
                    best = min(best, max(abs(f0 - np.round(f0)), abs(f1 - np.round(f1))))
                promote = frac <= best + 0.02
        if (not promote and key_best > 0.0
                and 1.0 - ncc[j] > _KEY_DECORRELATED * (1.0 - key_best) + _KEY_DECORRELATED_ADD
                and _still(pos, tchain, j)):
            promote = True                    # standing still, the key has decorrelated
        if promote:
            key = j
            key_t = tchain[j]
            key_best = 0.0
            tmp = up_old
            up_old = up_key
            up_key = tmp
            swaps += 1
            _upsample_extend(b, lor, wr, loc, wc, up_key)
            _kalman_copy(x, P, 4, 6)
            _kalman_copy(x, P, 0, 4)
            have_old = use_old and r_n >= 4
            n_keys += 1
        pvar[j, 0] = P[0, 0]
        pvar[j, 1] = P[1, 1]
    if swaps % 2 == 1:
        # the caller's arrays hold each other's frame: swap their contents back
        tmpc = key_caller.copy()
        key_caller[:, :] = old_caller
        old_caller[:, :] = tmpc
    st_f[0] = ncc_run
    st_f[1:1 + _NS] = x
    st_f[1 + _NS:1 + _NS + _NS * _NS] = P.reshape(_NS * _NS)
    st_f[_ST_KEY_T] = key_t
    st_f[_ST_KEY_T + 1] = key_best
    st_i[0] = 1
    st_i[1] = 1 if have_v else 0
    st_i[2] = 1 if have_old else 0
    st_i[3] = key - (n_ch - 1)
    st_i[4] = n_keys
    return n_keys


@numba.njit(**JIT)
def _masked_power(z, frames, m):
    """Sum of z^2 over the plates of mask ``m`` for each frame of ``frames`` (no copy of
    the frames)."""
    r_n, c_n = m.shape
    out = np.zeros(frames.shape[0])
    for k in range(frames.shape[0]):
        zt = z[frames[k]]
        s = 0.0
        for r in range(r_n):
            zr = zt[r]
            mr = m[r]
            acc = np.float32(0.0)
            for c in range(c_n):
                acc += zr[c] * zr[c] * mr[c]
            s += acc
        out[k] = s
    return out


def _outputs(n):
    """Output arrays of :func:`_track` for n chain frames: positions, information,
    references, NCC, residual sigma, links, variances."""
    return (np.zeros((n, 2)), np.zeros((n, 2, 2)), np.full(n, -1, dtype=np.int64), np.zeros(n),
            np.zeros(n), np.zeros(max(n - 1, 0), dtype=np.bool_), np.zeros((n, 2)))


def _fresh_state(shape):
    """Key frames and filter state of :func:`_track` before its first frame."""
    r_n, c_n = shape
    return (np.zeros((2 * r_n + 3, 2 * c_n + 3), dtype=np.float32),
            np.zeros((2 * r_n + 3, 2 * c_n + 3), dtype=np.float32),
            np.zeros(_ST_KEY_T + 2), np.zeros(5, dtype=np.int64))


@functools.lru_cache(maxsize=64)
def _lagrange_taps(n, symmetric=False):
    """Mid-point rows of the Lagrange doubling matrix as (first tap, weights)."""
    from .register import _lagrange_upsample_matrix

    mat = _lagrange_upsample_matrix(n, symmetric=symmetric)[1::2]   # (n - 1, n)
    k = min(6, n)
    lo = np.zeros(max(n - 1, 1), dtype=np.int64)
    w = np.zeros((max(n - 1, 1), k), dtype=np.float32)
    for i in range(n - 1):
        nz = np.flatnonzero(mat[i])
        first = int(nz[0]) if nz.size else 0
        first = min(first, n - k)
        lo[i] = first
        w[i] = mat[i, first:first + k]
    lo.flags.writeable = False          # cached and shared
    w.flags.writeable = False
    return lo, w


def _checked_mask(plate_mask, shape):
    """The plate mask as a boolean array of ``shape``, or a ValueError naming it."""
    m = np.asarray(plate_mask)
    if m.shape != tuple(shape) or m.dtype.kind not in "biuf":
        raise ValueError(f"plate_mask must be a boolean array of shape {tuple(shape)}; got "
                         f"dtype {m.dtype}, shape {m.shape}")
    return m != 0


def _settings(shape, plate_mask, max_along_px, max_across_px, reach_px, iterations, prior_px,
              min_ncc, sigma_acc_px, sideways_acc, model_px, second_key, info_scale=1.0,
              symmetric_edges=False):
    """Checked options of :func:`track` as the arguments of :func:`_track` that follow the
    chain's times; the plate mask as float, and the band of rows and columns that holds
    usable plates (None: all of them)."""
    r_n, c_n = shape
    m = np.ascontiguousarray(_checked_mask(plate_mask, shape), dtype=np.float32)
    # Only the band of rows and columns that holds usable plates is registered (a finger
    # narrower than the strip leaves whole columns unused): less work, and the key frame's
    # boundary extension then starts at the band's edge instead of interpolating across
    # unused plates. Shifts do not depend on the crop.
    rows_ok = np.flatnonzero(m.any(axis=1))
    cols_ok = np.flatnonzero(m.any(axis=0))
    band = None
    b_r, b_c = r_n, c_n
    if rows_ok.size >= 2 and cols_ok.size >= 8 and (rows_ok.size < r_n or cols_ok.size < c_n):
        band = (slice(rows_ok[0], rows_ok[-1] + 1), slice(cols_ok[0], cols_ok[-1] + 1))
        b_r, b_c = rows_ok[-1] + 1 - rows_ok[0], cols_ok[-1] + 1 - cols_ok[0]
    max_along = r_n - 1 if max_along_px is None else check_int(max_along_px, name="max_along_px",
                                                             lo=0, hi=r_n - 1)
    max_across = int(np.clip(c_n // 8, 3, 12)) if max_across_px is None else \
        check_int(max_across_px, name="max_across_px", lo=0, hi=c_n - 4)
    if reach_px is None:
        reach_px = float(max(1, min(r_n - 2, int(np.floor(0.75 * (r_n - 1))))))
    reach_px = check_positive(reach_px, name="reach_px")
    iterations = check_int(iterations, name="iterations", lo=1, hi=50)
    prior_px = check_positive(prior_px, name="prior_px")
    sigma_acc_px = check_positive(sigma_acc_px, name="sigma_acc_px")
    sideways_acc = check_in_range(sideways_acc, 0.0, 1.0, name="sideways_acc")
    model_px = check_positive(model_px, name="model_px")
    # The prior's weight in units of the residual variance: lam * sigma^2 = sigma^2 / prior^2.
    lam = 1.0 / prior_px ** 2
    if not isinstance(symmetric_edges, (bool, np.bool_)):
        raise ValueError(f"symmetric_edges must be True or False here (\"auto\" is track()'s); "
                         f"got {symmetric_edges!r}")
    sym = bool(symmetric_edges)
    lor, wr = _lagrange_taps(int(b_r), sym)
    loc, wc = _lagrange_taps(int(b_c), sym)
    return m, band, (lor, wr, loc, wc, int(min(max_along, b_r - 1)), int(min(max_across, b_c - 4)),
                     float(reach_px), int(iterations), lam, float(min_ncc), float(sigma_acc_px),
                     float(sideways_acc), float(model_px), bool(second_key), float(info_scale),
                     sym)


def track(z, plate_mask, chain=None, *, times=None, max_along_px=None, max_across_px=None,
          reach_px=None, iterations=3, prior_px=0.5, min_ncc=0.5, sigma_acc_px=0.05,
          sideways_acc=_ACC_SIDE, model_px=0.02, start=None, second_key=True, prefilter_px=0.0,
          symmetric_edges=False):
    """Place frames by registering each against a key frame (see the module notes).

    Parameters
    ----------
    z : (T, R, C) array_like
        Prepared frames (fixed pattern removed), float.
    plate_mask : (R, C) array_like of bool
        Plates to use.
    chain : (N,) array_like of int, optional
        Indices of the frames to place, increasing (e.g. the frames in contact). Default all.
    times : (T,) array_like, optional
        Frame times in frame periods (for the motion prediction across dropped frames).
        Default ``arange(T)``.
    max_along_px, max_across_px : int, optional
        Search half-ranges of the fallback integer search. Defaults R - 1 and C // 8
        clipped to 3..12.
    reach_px : float, optional
        Largest along-swipe displacement from the key before a new key is taken. Default:
        ``0.75 (R - 1)``, at most R - 2 (two rows of overlap), at least 1.
    iterations : int
        Gauss-Newton iterations per registration. Default 3.
    prior_px : float
        Weak Gaussian prior (px) on each step around its prediction: along the direction
        where the overlap carries no information (ridges parallel to the shift) the estimate
        keeps the prediction. Default 0.5.
    min_ncc : float
        Smallest normalised correlation of an accepted registration. Default 0.5.
    sigma_acc_px : float
        Standard deviation of the acceleration (px per frame squared) of the constant-velocity
        Kalman filter that predicts each frame and carries the directions a registration
        leaves undetermined. Default 0.05.
    sideways_acc : float
        The filter's acceleration across the current direction of travel as a fraction of
        ``sigma_acc_px`` (along it, ``sigma_acc_px``), in [0, 1]: a finger changes speed
        freely but hardly its direction, so a stretch whose ridges leave the shift along them
        undetermined is crossed in the direction the well-seen frames set. 1: the same in
        every direction. Default 0.2.
    model_px : float
        Error (px) allowed for in every registration besides the noise (edge aliasing,
        interpolation). Default 0.02.
    start : int, optional
        Chain index tracking starts from (forwards to the end, then backwards to the
        beginning). Default: the frame of strongest texture in the middle third.
    second_key : bool
        Also register every frame against the previous key frame while it still overlaps
        (its position is in the filter state, so key errors are averaged, not inherited).
        Default True; False halves the work per frame at some cost in drift.
    prefilter_px : float
        Standard deviation (px) of a Gaussian low-pass applied to the frames before they are
        registered (normalised by the plate mask, so bad plates do not bleed), the strip's
        first and last rows and columns then left out (their smoothing is one-sided), and
        each registration's information divided by the pixels the smoothing correlates
        (4 pi sigma^2, at most 1). It takes out the aliased detail that makes registrations
        lock towards whole pixels (peak locking), at the cost of a texture's finest detail
        and of the two edge rows' overlap: frames cut from aliased plane waves, 16 x 96 at
        0.98 px per frame, 0.29-0.38 px along RMS unfiltered, 0.01-0.07 px at 0.7 px.
        Default 0: none.
    symmetric_edges : bool or "auto"
        Key frames upsampled with half-sample filters centred on every mid-point (shrinking
        towards the frame's edges instead of shifting inwards), and the first and last rows'
        along slope left out (strips of four rows or more): overlaps near a frame edge (all
        of them on strips of few rows) then carry no one-sided phase error, which read along
        shifts long on textures with detail finer than the plates. scikit-image photographs
        swiped over 8x192 (tracker alone, 40 swipes): span error median 0.47 -> 0.07 %,
        along RMS 0.30 -> 0.08 px; but on smooth band-limited textures (periods of 5 px and
        more) the short windows' amplitude error costs more than the phase error saved (an
        8-row strip at 5.5 px per frame: 0.008 -> 0.048 px per step). ``"auto"``: the swipe
        is tracked with both and the placement whose registrations leave the smaller
        residual is kept (see :func:`_less_residual`). Default False.

    Returns
    -------
    TrackResult

    Examples
    --------
    >>> import numpy as np
    >>> from scipy import ndimage
    >>> tex = ndimage.gaussian_filter(np.random.default_rng(0).standard_normal((400, 64)), 2.0)
    >>> z = np.stack([tex[2 * t: 2 * t + 8] for t in range(60)]).astype(np.float32)
    >>> res = track(z, np.ones((8, 64), bool))
    >>> bool(np.allclose(np.diff(res.positions[:, 0]), 2.0, atol=0.02))
    True
    """
    if isinstance(symmetric_edges, str):
        if symmetric_edges != "auto":
            raise ValueError(f'symmetric_edges must be True, False or "auto"; got {symmetric_edges!r}')
        both = [track(z, plate_mask, chain, times=times, max_along_px=max_along_px,
                      max_across_px=max_across_px, reach_px=reach_px, iterations=iterations,
                      prior_px=prior_px, min_ncc=min_ncc, sigma_acc_px=sigma_acc_px,
                      sideways_acc=sideways_acc, model_px=model_px, start=start,
                      second_key=second_key, prefilter_px=prefilter_px, symmetric_edges=sym)
                for sym in (True, False)]
        return both[0] if _less_residual(*both) else both[1]
    z = check_frames(z, min_frames=2, min_rows=2, min_cols=8)
    t_n, r_n, c_n = z.shape
    z = np.ascontiguousarray(z, dtype=np.float32)
    prefilter_px = check_in_range(prefilter_px, 0.0, 3.0, name="prefilter_px")
    info_scale = 1.0
    if prefilter_px > 0.0:
        z, plate_mask = _prefiltered(z, _checked_mask(plate_mask, (r_n, c_n)), prefilter_px)
        info_scale = min(1.0, 1.0 / (4.0 * np.pi * prefilter_px ** 2))
    m, band, kw = _settings((r_n, c_n), plate_mask, max_along_px, max_across_px, reach_px,
                            iterations, prior_px, min_ncc, sigma_acc_px, sideways_acc, model_px,
                            second_key, info_scale, symmetric_edges)
    if band is not None:
        z_run = np.ascontiguousarray(z[:, band[0], band[1]])
        m_run = np.ascontiguousarray(m[band])
    else:
        z_run, m_run = z, m
    if chain is None:
        chain = np.arange(t_n)
    chain = np.asarray(chain)
    if chain.ndim != 1 or chain.dtype.kind not in "iu":
        raise TypeError(f"chain must be a 1-D integer array; got dtype {chain.dtype}, "
                        f"shape {chain.shape}")
    if chain.size < 2 or (np.diff(chain) <= 0).any() or chain[0] < 0 or chain[-1] >= t_n:
        raise ValueError(f"chain must hold at least two increasing frame indices in 0..{t_n - 1}; "
                         f"got {chain.size} indices from {chain.min() if chain.size else None} "
                         f"to {chain.max() if chain.size else None}")
    chain = chain.astype(np.int64)
    tt = np.arange(t_n, dtype=np.float64) if times is None else \
        check_array(times, name="times", shape=(t_n,))
    n_ch = chain.size
    if start is None:
        # Start where the finger is best seen: the frame of strongest texture in the middle
        # third of the chain. The ends (the fingertip arriving, the finger leaving) show
        # partial contact whose registrations can slide along the ridges; tracked last,
        # from a velocity the well-seen frames set, they stay on a smooth path.
        mid = chain[n_ch // 3: max(n_ch // 3 + 1, (2 * n_ch) // 3)]
        start = n_ch // 3 + int(np.argmax(_masked_power(z, mid, m)))
    start = check_int(start, name="start", lo=0, hi=n_ch - 1)
    pos, info, ref, ncc, sig, link_ok, pvar = _outputs(n_ch)
    n_keys = 0
    tch = tt[chain]
    # Forward from the start, then backward from it (time reversed: the same constant-velocity
    # model with the velocity's sign flipped).
    for sub, times_sub in ((np.arange(start, n_ch), tch[start:]),
                           (np.arange(start, -1, -1), -tch[start::-1])):
        if sub.size < 2:
            continue
        k = sub.size
        p_, i_, r_, n_, s_, l_, v_ = _outputs(k)
        n_keys += _track(z_run, m_run, chain[sub], np.ascontiguousarray(times_sub), *kw,
                         *_fresh_state(z_run.shape[1:]), 0, p_, i_, r_, n_, s_, l_, v_)
        pvar[sub[1:]] = v_[1:]
        pos[sub[1:]] = p_[1:]
        info[sub[1:]] = i_[1:]
        ref[sub[1:]] = np.where(r_[1:] >= 0, sub[np.maximum(r_[1:], 0)], -1)
        ncc[sub[1:]] = n_[1:]
        s_[0] = s_[1] if k > 1 else 0.0
        sig[sub[1:]] = s_[1:]
        # link between sub[i] and sub[i + 1] -> chain link min(sub[i], sub[i + 1])
        link_ok[np.minimum(sub[:-1], sub[1:])] = l_
    pos -= pos[0]
    return TrackResult(positions=pos, info=info, reference=ref, ncc=ncc, sigma=sig,
                       link_ok=link_ok, n_keys=int(n_keys), variance=pvar, start=int(start),
                       symmetric_edges=bool(kw[-1]))


def _less_residual(a, b):
    """Whether placement ``a`` explains the frames better than ``b``: the mean squared
    residual of the registrations, over the frames both registered, is smaller (a tie or
    nothing in common: False).

    Both placements register the same frames against key frames interpolated with different
    half-sample filters, so with the noise common to both the difference is the filters'
    interpolation error: the likelihood of a Gaussian residual, one model against the other.
    On 8x192 swipes in fast mode it chose the edge-symmetric filters on all 20 scikit-image
    photographs (span error median 0.47 -> 0.07 % against the shifted windows) and on all 20
    random simulated fingers of bench_random.py's seed 7000 (on two of them the shifted
    windows were better, by 0.28 and 0.05 % of span), and the shifted windows on the four
    smooth band-limited swipes of the tests (along RMS 0.10-0.20 px with the symmetric
    filters, 0.008-0.08 with the shifted; median residual 0.012-0.025 against 0.004-0.018)."""
    common = (a.reference >= 0) & (b.reference >= 0)
    if not common.any():
        return False
    return float(np.mean(a.sigma[common] ** 2)) < float(np.mean(b.sigma[common] ** 2))


def _prefiltered(z, mask, sigma):
    """Frames smoothed by a Gaussian of ``sigma`` px in both axes, normalised by the plate
    mask (normalised convolution [5]_: a bad plate's value does not enter its neighbours'),
    and the mask with the strip's first and last rows and columns cleared (their smoothing
    reaches outside the strip, so they would see a boundary that does not move with the
    finger). Returns (z, mask)."""
    from scipy import ndimage

    w = mask.astype(np.float32)
    num = ndimage.gaussian_filter(z * w, sigma=(0.0, sigma, sigma), mode="nearest")
    den = ndimage.gaussian_filter(w, sigma=sigma, mode="nearest")
    out = (num / np.maximum(den, 1e-3)).astype(np.float32)
    out *= w
    keep = mask.copy()
    r_n, c_n = keep.shape
    if r_n > 2:
        keep[[0, r_n - 1]] = False
    if c_n > 2:
        keep[:, [0, c_n - 1]] = False
    return np.ascontiguousarray(out), keep


class FrameTracker:
    """The key-frame tracker fed as frames arrive: the forward half of :func:`track`, from the
    first frame pushed, with the filter and the key frames carried between pushes (memory
    does not grow with the swipe).

    Parameters
    ----------
    plate_mask : (R, C) array_like of bool
        Plates to use (fixed for the swipe).
    max_along_px, max_across_px, reach_px, iterations, prior_px, min_ncc, sigma_acc_px, \
sideways_acc, model_px, second_key, symmetric_edges
        As :func:`track` (``symmetric_edges`` True or False: a stream cannot track twice;
        the streaming stitcher chooses on the finger's arrival with :func:`track`).

    Examples
    --------
    >>> import numpy as np
    >>> rr, cc = np.mgrid[0:200, 0:48].astype(float)
    >>> tex = np.sin(0.7 * rr + 0.3 * cc) + np.cos(0.45 * rr - 0.5 * cc)
    >>> frames = np.stack([tex[2 * t: 2 * t + 8] for t in range(60)])
    >>> ft = FrameTracker(np.ones((8, 48), bool))
    >>> steps = [ft.push(frames[k:k + 10]) for k in range(0, 60, 10)]
    >>> pos = np.concatenate([s["positions"] for s in steps])
    >>> bool(np.allclose(np.diff(pos[:, 0]), 2.0, atol=0.02))
    True
    """

    def __init__(self, plate_mask, *, max_along_px=None, max_across_px=None, reach_px=None,
                 iterations=3, prior_px=0.5, min_ncc=0.5, sigma_acc_px=0.05,
                 sideways_acc=_ACC_SIDE, model_px=0.02, second_key=True, symmetric_edges=False):
        shape = np.shape(plate_mask)
        if len(shape) != 2 or shape[0] < 2 or shape[1] < 8:
            raise ValueError(f"plate_mask must have shape (R, C) with R >= 2 and C >= 8; got "
                             f"shape {shape}")
        self.shape = (int(shape[0]), int(shape[1]))
        m, self._band, self._kw = _settings(self.shape, plate_mask, max_along_px, max_across_px,
                                            reach_px, iterations, prior_px, min_ncc,
                                            sigma_acc_px, sideways_acc, model_px, second_key,
                                            symmetric_edges=symmetric_edges)
        self._m = np.ascontiguousarray(m[self._band]) if self._band is not None else m
        self._state = _fresh_state(self._m.shape)
        self._n = 0                       # frames pushed
        self._last = None                 # last frame (band), its position and time
        self._last_pos = np.zeros(2)
        self._last_t = 0.0
        self._key_pos = {}                # position of the current key frame (by index)

    @property
    def n_frames(self):
        """Frames pushed so far."""
        return self._n

    def push(self, frames, times=None):
        """Place the next frames.

        Parameters
        ----------
        frames : (K, R, C) array_like
            Prepared frames (fixed pattern removed), in order.
        times : (K,) array_like, optional
            Their times in frame periods (increasing, after the previous push's). Default:
            one frame period apart, continuing the count.

        Returns
        -------
        dict of arrays, one row per frame pushed
            ``positions`` (K, 2) relative to the first frame ever pushed; ``info`` (K, 2, 2);
            ``reference`` (K,) absolute index of the key frame each was registered against
            (-1: none); ``displacement`` (K, 2) from that key frame (0 where none); ``ncc``
            (K,); ``sigma`` (K,); ``link_ok`` (K,) whether the link from the previous frame
            held (False for the very first frame).
        """
        z = check_frames(frames, name="frames", min_frames=1, min_rows=2, min_cols=8)
        if z.shape[1:] != self.shape:
            raise ValueError(f"frames must have shape (K, {self.shape[0]}, {self.shape[1]}) like "
                             f"the plate mask; got {z.shape}")
        k = z.shape[0]
        tt = (self._n + np.arange(k, dtype=np.float64)) if times is None else \
            check_array(times, name="times", shape=(k,))
        zb = z[:, self._band[0], self._band[1]] if self._band is not None else z
        zb = np.ascontiguousarray(zb, dtype=np.float32)
        first = self._last is None
        out = {"positions": np.zeros((k, 2)), "info": np.zeros((k, 2, 2)),
               "reference": np.full(k, -1, dtype=np.int64), "displacement": np.zeros((k, 2)),
               "ncc": np.zeros(k), "sigma": np.zeros(k), "link_ok": np.zeros(k, dtype=bool)}
        if first:
            run_z, run_t, skip = zb, tt, 1
        else:
            if not tt[0] > self._last_t:
                raise ValueError(f"times must continue after the previous push's last time "
                                 f"{self._last_t}; got {tt[0]}")
            run_z = np.concatenate([self._last[None], zb])
            run_t = np.concatenate([[self._last_t], tt])
            skip = 0
        n = run_z.shape[0]
        if n >= 2:
            pos, info, ref, ncc, sig, link, var = _outputs(n)
            pos[0] = self._last_pos
            base = 0 if first else self._n - 1
            _track(run_z, self._m, np.arange(n, dtype=np.int64), run_t, *self._kw, *self._state,
                   base, pos, info, ref, ncc, sig, link, var)
            sl = slice(skip, None)          # this push's frames placed here (not the first ever)
            out["positions"][sl] = pos[1:]
            out["info"][sl] = info[1:]
            out["reference"][sl] = ref[1:]
            out["ncc"][sl] = ncc[1:]
            out["sigma"][sl] = sig[1:]
            out["link_ok"][sl] = link
            # displacement from each frame's key: the key is a frame of this run or the key
            # carried over from the previous push
            known = dict(self._key_pos)
            known.update({base + j: pos[j] for j in range(n)})
            disp = np.zeros((n, 2))
            for j in np.flatnonzero(ref >= 0):
                disp[j] = pos[j] - known[int(ref[j])]
            out["displacement"][sl] = disp[1:]
            key_abs = base + n - 1 + int(self._state[3][3])
            self._key_pos = {key_abs: known[key_abs]} if key_abs in known else {}
        self._last = zb[-1].copy()
        self._last_pos = out["positions"][-1].copy()
        self._last_t = float(tt[-1])
        self._n += k
        return out
