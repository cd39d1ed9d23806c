"""Compare an image stitched elsewhere (e.g. on the device) with a reference reconstruction.

``compare(image, reference)`` aligns the image to the reference row by row and reports the
along-swipe scale error, the lateral shear, missing and duplicated rows, a block-wise local
distortion field and the similarity (NCC, SSIM) after alignment. ``compare_frames(image,
frames)`` stitches the reference from the swipe's frames first.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from ._types import _frozen_array, _plain
from ._validate import check_int, check_positive

__all__ = ["Comparison", "compare", "compare_frames", "plot_distortion"]


@dataclass(frozen=True, eq=False)
class Comparison:
    """An image measured against a reference.

    Attributes
    ----------
    scale_along_pct : float
        Along-swipe scale error of the image in %: (image length / reference length - 1)
        * 100 over the matched rows (positive: the image is stretched).
    shear : float
        Lateral shear: across-swipe displacement of the image per along-swipe pixel
        (image rows drift sideways by ``shear`` columns per row).
    shear_deg : float
        ``degrees(arctan(shear))``.
    offset_px : (2,) ndarray of float64
        Reference position (row, col) of image pixel (0, 0) from the row-wise fit.
    row_map : (H,) ndarray of float64
        Reference row matched to each image row (NaN where no match).
    col_shift : (H,) ndarray of float64
        Reference column of each image row's column 0 (NaN where no match).
    local_scale_pct : (H,) ndarray of float64
        Local along-swipe scale error in % (a line fit over ``scale_window_rows``).
    missing_rows : int
        Reference rows the image skips (sum over jumps of the row map).
    duplicated_rows : int
        Image rows that repeat the previous reference row.
    missing_at, duplicated_at : tuple of int
        Image rows after which rows are missing / which duplicate their predecessor.
    block_centres_px : (N, 2) ndarray of float64
        Image positions (row, col) of the distortion blocks' centres.
    displacement_px : (N, 2) ndarray of float64
        Local distortion: where each block is found in the reference minus where the global
        fit (row map line and shear) puts it; NaN where the block was not matched.
    distortion_rms_px : float
        RMS of the finite displacements.
    ncc : float
        Normalised cross-correlation (Pearson) of the aligned image with the reference.
    ssim : float
        Structural similarity (scikit-image ``structural_similarity``) of the same, both
        standardised (zero mean, unit spread) over the pixels they share.
    matched_fraction : float
        Fraction of image rows matched.
    """

    scale_along_pct: float
    shear: float
    shear_deg: float
    offset_px: np.ndarray
    row_map: np.ndarray
    col_shift: np.ndarray
    local_scale_pct: np.ndarray
    missing_rows: int
    duplicated_rows: int
    missing_at: tuple
    duplicated_at: tuple
    block_centres_px: np.ndarray
    displacement_px: np.ndarray
    distortion_rms_px: float
    ncc: float
    ssim: float
    matched_fraction: float

    def __post_init__(self):
        for name in ("offset_px", "row_map", "col_shift", "local_scale_pct", "block_centres_px",
                     "displacement_px"):
            object.__setattr__(self, name, _frozen_array(getattr(self, name)))
        for name in ("missing_at", "duplicated_at"):
            object.__setattr__(self, name, tuple(int(v) for v in getattr(self, name)))
        for name in ("missing_rows", "duplicated_rows"):
            object.__setattr__(self, name, int(getattr(self, name)))

    def to_dict(self, *, arrays=False):
        """JSON-ready summary (per-row and per-block arrays only with ``arrays=True``)."""
        out = {}
        for f in dataclasses.fields(self):
            v = getattr(self, f.name)
            if isinstance(v, np.ndarray) and v.ndim >= 1 and v.size > 2 and not arrays:
                continue
            out[f.name] = _plain(v)
        return out


def _as_image(value, name):
    if hasattr(value, "image") and hasattr(value, "positions"):
        value = value.image
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise TypeError(f"{name} must be a 2-D array of numbers (or a Reconstruction); got "
                        f"{type(value).__name__}") from exc
    if arr.ndim != 2:
        raise ValueError(f"{name} must be a 2-D image (rows along the swipe); got shape "
                         f"{arr.shape}")
    if arr.shape[0] < 16 or arr.shape[1] < 16:
        raise ValueError(f"{name} must be at least 16 x 16 pixels; got shape {arr.shape}")
    if np.isinf(arr).any():
        raise ValueError(f"{name} contains inf values (NaN marks no data)")
    if not np.isfinite(arr).any():
        raise ValueError(f"{name} holds no data (all NaN)")
    return arr


def _standardise(img):
    """Zero mean, unit spread over the data; NaN (no data) -> 0; float32 for OpenCV."""
    ok = np.isfinite(img)
    v = img[ok]
    sd = float(v.std()) or 1.0
    out = np.where(ok, (img - float(v.mean())) / sd, 0.0)
    return out.astype(np.float32), ok


def _parabolic(ym, y0, yp):
    den = ym - 2.0 * y0 + yp
    return 0.5 * (ym - yp) / den if den < 0 else 0.0


def _match(template, search):
    """Best position of ``template`` in ``search`` by normalised correlation
    (cv2.matchTemplate, TM_CCOEFF_NORMED) with a parabolic sub-pixel peak."""
    import cv2
    res = cv2.matchTemplate(search, template, cv2.TM_CCOEFF_NORMED)
    _, vmax, _, (mx, my) = cv2.minMaxLoc(res)
    dy = _parabolic(res[my - 1, mx], vmax, res[my + 1, mx]) if 0 < my < res.shape[0] - 1 else 0.0
    dx = _parabolic(res[my, mx - 1], vmax, res[my, mx + 1]) if 0 < mx < res.shape[1] - 1 else 0.0
    return my + dy, mx + dx, float(vmax)


def compare(image, reference, *, image_pitch_um=None, reference_pitch_um=None,
            search_rows=12, search_cols=12, block_px=32, scale_window_rows=41, min_score=0.5):
    """Measure an image against a reference of the same swipe.

    Parameters
    ----------
    image : (H, W) array_like
        The image under test (e.g. stitched on the device); axis 0 along the swipe; NaN
        where it holds no data.
    reference : (H', W') array_like or Reconstruction
        The reference (e.g. ``stitch`` on the same frames, or ground truth).
    image_pitch_um, reference_pitch_um : float, optional
        Pixel pitches; when both are given and differ, the image is resampled to the
        reference pitch first (so the scale error is the physical one). Default None.
    search_rows, search_cols : int, optional
        Search range (pixels) around the prediction for each row. Default 12 and 12.
    block_px : int, optional
        Side of the square blocks of the distortion field. Default 32.
    scale_window_rows : int, optional
        Rows of the line fit giving the local scale. Default 41.
    min_score : float, optional
        Least normalised correlation for a row or block to count as matched. Default 0.5.

    Returns
    -------
    Comparison

    Notes
    -----
    1. Global start: phase correlation of the two images (scikit-image
       ``phase_cross_correlation``) [1]_.
    2. Row map: each image row (a 1-row template over the columns with data) is found in
       the reference by normalised cross-correlation (OpenCV ``matchTemplate``) near the
       position predicted from the previous rows, with a 3-point parabolic peak fit. Its
       slope gives the along-swipe scale; jumps of the row map are missing rows, flat steps
       duplicated rows; the column of each match gives the shear.
    3. Distortion field: square blocks are matched in the same way around the position the
       global fit predicts; what is left is the local distortion.
    4. Similarity: the image is resampled onto the reference grid through the row map and
       compared by NCC and SSIM [2]_ over the pixels both cover.

    References
    ----------
    .. [1] M. Guizar-Sicairos, S. T. Thurman and J. R. Fienup, "Efficient subpixel image
           registration algorithms", Optics Letters 33(2), 156-158 (2008).
           doi:10.1364/OL.33.000156
    .. [2] Z. Wang, A. C. Bovik, H. R. Sheikh and E. P. Simoncelli, "Image quality
           assessment: from error visibility to structural similarity", IEEE Trans. Image
           Processing 13(4), 600-612 (2004). doi:10.1109/TIP.2003.819861

    Examples
    --------
    >>> import numpy as np
    >>> from scipy import ndimage
    >>> ref = ndimage.gaussian_filter(np.random.default_rng(1).standard_normal((200, 96)), 2.0)
    >>> img = np.delete(ref, [100, 101, 102], axis=0)          # three rows lost
    >>> c = compare(img, ref)
    >>> c.missing_rows, c.duplicated_rows
    (3, 0)
    """
    img = _as_image(image, "image")
    ref = _as_image(reference, "reference")
    search_rows = check_int(search_rows, name="search_rows", lo=1)
    search_cols = check_int(search_cols, name="search_cols", lo=0)
    block_px = check_int(block_px, name="block_px", lo=8)
    scale_window_rows = check_int(scale_window_rows, name="scale_window_rows", lo=3)
    if image_pitch_um is not None and reference_pitch_um is not None:
        pi = check_positive(image_pitch_um, name="image_pitch_um")
        pr = check_positive(reference_pitch_um, name="reference_pitch_um")
        if abs(pi / pr - 1.0) > 1e-9:
            ok = np.isfinite(img)
            z = pi / pr
            img = ndimage.zoom(np.where(ok, img, np.nanmean(img)), z, order=1)
            okz = ndimage.zoom(ok.astype(float), z, order=1) > 0.5
            img[~okz] = np.nan
    a, a_ok = _standardise(img)
    b, b_ok = _standardise(ref)
    h, w = a.shape
    # ---- global start by phase correlation (images padded to a common size) ----
    from skimage.registration import phase_cross_correlation
    hh, ww = max(h, b.shape[0]), max(w, b.shape[1])
    pa = np.zeros((hh, ww), np.float32)
    pb = np.zeros((hh, ww), np.float32)
    pa[:h, :w] = a
    pb[:b.shape[0], :b.shape[1]] = b
    shift, _, _ = phase_cross_correlation(pb, pa, upsample_factor=1, normalization="phase")
    d0 = np.array([shift[0] % hh, shift[1] % ww], dtype=float)
    d0[0] -= hh if d0[0] > hh / 2 else 0
    d0[1] -= ww if d0[1] > ww / 2 else 0
    # ---- row map ----
    cols = np.flatnonzero(a_ok.mean(axis=0) > 0.5)
    c_lo, c_hi = (int(cols[0]), int(cols[-1]) + 1) if cols.size else (0, w)
    tw = c_hi - c_lo
    bpad = np.pad(b, ((search_rows + 1, search_rows + 1), (search_cols + 1, search_cols + 1)))
    off_r, off_c = search_rows + 1, search_cols + 1
    up = 20
    yy = np.arange((bpad.shape[0] - 1) * up + 1, dtype=np.float64) / up
    bup = ndimage.map_coordinates(bpad, np.meshgrid(yy, np.arange(bpad.shape[1], dtype=float),
                                                    indexing="ij"),
                                  order=3, mode="nearest").astype(np.float32)
    row_map = np.full(h, np.nan)
    col_map = np.full(h, np.nan)
    score = np.zeros(h)
    pred_r, pred_c = None, None
    # Start at the image row best covered, go both ways.
    cover = a_ok[:, c_lo:c_hi].mean(axis=1)
    start = int(np.argmax(cover))
    order = list(range(start, h)) + list(range(start - 1, -1, -1))
    last = {}
    # The start row is searched over the whole reference (central columns, so that a
    # lateral offset up to a quarter of the width is found too).
    m_c = max(1, min(tw // 4, 64))
    tmpl0 = a[start:start + 1, c_lo + m_c:c_hi - m_c]
    if tmpl0.shape[1] >= 8 and b.shape[1] >= tmpl0.shape[1]:
        y0, x0, s0 = _match(tmpl0, b)
        self_start = (y0, x0 - m_c) if s0 >= min_score else (start + d0[0], c_lo + d0[1])
    else:
        self_start = (start + d0[0], c_lo + d0[1])
    for i in order:
        if cover[i] < 0.5 or a[i, c_lo:c_hi].std() < 1e-6:
            continue
        step = 1 if i >= start else -1
        prev = i - step
        if prev in last:
            pr_, pc_ = last[prev]
            pred_r, pred_c = pr_ + step, pc_
        elif i == start or pred_r is None:
            pred_r, pred_c = self_start
        else:
            pred_r, pred_c = pred_r + step, pred_c
        r0 = int(round(pred_r)) - search_rows + off_r
        cc0 = int(round(pred_c)) - search_cols + off_c
        if r0 < 0 or r0 + 2 * search_rows + 1 > bpad.shape[0] or cc0 < 0 or \
                cc0 + tw + 2 * search_cols > bpad.shape[1]:
            continue
        win = bpad[r0:r0 + 2 * search_rows + 1, cc0:cc0 + tw + 2 * search_cols]
        tmpl = a[i:i + 1, c_lo:c_hi]
        dy, dx, s = _match(tmpl, win)
        if s < min_score:
            continue
        # Fine: the same row against the reference upsampled along the swipe (cubic
        # spline), +-1.5 px around the coarse peak, so that the peak's asymmetry (a single
        # row differs from its neighbours) does not bias the sub-pixel position.
        yc = r0 + int(round(dy))
        xc = cc0 + int(round(dx))
        f0 = (yc - 1) * up - up // 2
        f1 = (yc + 1) * up + up // 2 + 1
        x0 = xc - 1
        if f0 >= 0 and f1 <= bup.shape[0] and x0 >= 0 and x0 + tw + 2 <= bup.shape[1]:
            fy, fx, s2 = _match(tmpl, bup[f0:f1, x0:x0 + tw + 2])
            if s2 >= s - 1e-3:
                dy = (f0 + fy) / up - r0
                dx = x0 + fx - cc0
                s = s2
        row_map[i] = r0 + dy - off_r
        col_map[i] = cc0 + dx - off_c - c_lo
        score[i] = s
        last[i] = (row_map[i], col_map[i] + c_lo)
    okr = np.isfinite(row_map)
    if okr.sum() < 8:
        raise ValueError(f"image does not match the reference: only {int(okr.sum())} of {h} "
                         "rows found (is it the same swipe?)")
    ii = np.flatnonzero(okr)
    # Robust line fits (one reweighting pass).
    def fit(y):
        p = np.polyfit(ii, y, 1)
        r = y - np.polyval(p, ii)
        s = 1.4826 * np.median(np.abs(r - np.median(r))) + 1e-6
        keep = np.abs(r) < 5 * s + 1.0
        return np.polyfit(ii[keep], y[keep], 1)
    pr_fit = fit(row_map[ii])
    pc_fit = fit(col_map[ii])
    # Scale from the ends of the matched span (robust to steps): reference rows spanned per
    # image row.
    lo_i, hi_i = ii[0], ii[-1]
    k = max(1, min(5, len(ii) // 10))
    span_ref = np.median(row_map[ii[-k:]]) - np.median(row_map[ii[:k]])
    span_img = np.median(ii[-k:].astype(float)) - np.median(ii[:k].astype(float))
    slope = span_ref / span_img if span_img > 0 else pr_fit[0]
    scale_pct = (1.0 / slope - 1.0) * 100.0 if slope > 0 else float("nan")
    # Shear: column drift per reference row.
    shear = float(pc_fit[0] / pr_fit[0]) if pr_fit[0] != 0 else float("nan")
    # Missing / duplicated rows from consecutive matched rows.
    d = np.diff(row_map)
    both = okr[1:] & okr[:-1]
    dd = np.where(both, d, np.nan)
    jump = np.flatnonzero(both & (dd > 1.5))
    dup = np.flatnonzero(both & (np.abs(dd) < 0.5))
    missing = int(np.sum(np.round(dd[jump] - 1.0))) if len(jump) else 0
    # Local scale: slope of a least-squares line through the row map over
    # ``scale_window_rows`` rows, after removing the steps counted above.
    steps = np.zeros(h)
    if len(jump):
        steps[jump + 1] = np.round(dd[jump] - 1.0)
    if len(dup):
        steps[dup + 1] -= 1.0
    mc = np.where(okr, row_map - np.cumsum(steps), np.nan)
    fin = np.isfinite(mc)
    mc0 = np.where(fin, mc - np.arange(h), 0.0)
    kk = np.arange(scale_window_rows) - (scale_window_rows - 1) / 2.0
    f = fin.astype(float)
    s_w = np.convolve(f, np.ones(scale_window_rows), mode="same")
    s_k = np.convolve(f, kk[::-1], mode="same")
    s_kk = np.convolve(f, (kk ** 2)[::-1], mode="same")
    s_y = np.convolve(mc0, np.ones(scale_window_rows), mode="same")
    s_ky = np.convolve(mc0, kk[::-1], mode="same")
    with np.errstate(invalid="ignore", divide="ignore"):
        den = s_kk - s_k ** 2 / s_w
        slope_l = 1.0 + (s_ky - s_k * s_y / s_w) / den
        local = (1.0 / slope_l - 1.0) * 100.0
    local[s_w < 0.8 * scale_window_rows] = np.nan
    # ---- distortion field ----
    centres, disp = [], []
    half = block_px // 2
    for r in range(half, h - half + 1, block_px):
        for c in range(max(half, c_lo + half), min(w, c_hi) - half + 1, block_px):
            blk = a[r - half:r + half, c - half:c + half]
            if a_ok[r - half:r + half, c - half:c + half].mean() < 0.9 or blk.std() < 1e-6:
                continue
            pr_ = np.interp(r, ii, row_map[ii]) if lo_i <= r <= hi_i else np.polyval(pr_fit, r)
            pc_ = np.polyval(pc_fit, r) + c
            r0 = int(round(pr_ - half)) - search_rows + off_r
            c0 = int(round(pc_ - half)) - search_cols + off_c
            centres.append((r, c))
            if r0 < 0 or c0 < 0 or r0 + block_px + 2 * search_rows > bpad.shape[0] or \
                    c0 + block_px + 2 * search_cols > bpad.shape[1]:
                disp.append((np.nan, np.nan))
                continue
            win = bpad[r0:r0 + block_px + 2 * search_rows, c0:c0 + block_px + 2 * search_cols]
            dy, dx, s = _match(blk, win)
            if s < min_score:
                disp.append((np.nan, np.nan))
                continue
            found = (r0 + dy - off_r + half, c0 + dx - off_c + half)
            gr = np.polyval(pr_fit, r)
            disp.append((found[0] - gr, found[1] - pc_))
    centres = np.array(centres, dtype=float).reshape(-1, 2)
    disp = np.array(disp, dtype=float).reshape(-1, 2)
    fd = np.isfinite(disp).all(axis=1)
    rms = float(np.sqrt(np.mean(np.sum(disp[fd] ** 2, axis=1)))) if fd.any() else float("nan")
    # ---- similarity on the reference grid ----
    ncc, ssim = _similarity(img, ref, row_map, col_map, ii)
    offset = np.array([np.polyval(pr_fit, 0.0), np.polyval(pc_fit, 0.0)])
    return Comparison(scale_along_pct=float(scale_pct), shear=shear,
                      shear_deg=float(np.degrees(np.arctan(shear))), offset_px=offset,
                      row_map=row_map, col_shift=col_map, local_scale_pct=local,
                      missing_rows=missing, duplicated_rows=len(dup),
                      missing_at=tuple(jump.tolist()), duplicated_at=tuple((dup + 1).tolist()),
                      block_centres_px=centres, displacement_px=disp, distortion_rms_px=rms,
                      ncc=ncc, ssim=ssim, matched_fraction=float(okr.mean()))


def _similarity(img, ref, row_map, col_map, ii):
    """NCC and SSIM of the image resampled onto the reference grid through the row map."""
    from skimage.metrics import structural_similarity
    hr, wr = ref.shape
    rm = row_map[ii]
    order = np.argsort(rm, kind="stable")
    rm_s, ii_s = rm[order], ii[order].astype(float)
    keep = np.concatenate([[True], np.diff(rm_s) > 1e-6])
    rm_s, ii_s = rm_s[keep], ii_s[keep]
    y = np.arange(hr, dtype=float)
    inside = (y >= rm_s[0]) & (y <= rm_s[-1])
    src_r = np.interp(y, rm_s, ii_s)
    shift_c = np.interp(src_r, ii.astype(float), col_map[ii])
    rr, cc = np.meshgrid(src_r, np.arange(wr, dtype=float), indexing="ij")
    cc = cc - shift_c[:, None]
    ok = np.isfinite(img)
    fill = np.where(ok, img, 0.0)
    val = ndimage.map_coordinates(fill, [rr, cc], order=3, mode="nearest")
    wv = ndimage.map_coordinates(ok.astype(float), [rr, cc], order=1, mode="constant", cval=0.0)
    m = (wv > 0.99) & inside[:, None] & np.isfinite(ref)
    if m.sum() < 64:
        return float("nan"), float("nan")
    x = val[m]
    r = ref[m]
    ncc = float(np.corrcoef(x, r)[0, 1])
    rows = np.flatnonzero(m.any(axis=1))
    colz = np.flatnonzero(m.any(axis=0))
    box = (slice(rows[0], rows[-1] + 1), slice(colz[0], colz[-1] + 1))
    xa = np.where(m, val, np.nan)[box]
    ra = np.where(m, ref, np.nan)[box]
    mm = m[box]
    # Both standardised over the common pixels first, so that a different gain or offset of
    # the two pipelines does not count against the structure.
    xa = np.where(mm, (xa - x.mean()) / (x.std() or 1.0), 0.0)
    ra = np.where(mm, (ra - r.mean()) / (r.std() or 1.0), 0.0)
    if min(xa.shape) < 7:
        return ncc, float("nan")
    rng = float(max(np.ptp(ra), np.ptp(xa), 1e-12))
    _, smap = structural_similarity(ra, xa, data_range=rng, full=True)
    return ncc, float(np.mean(smap[mm]))


def compare_frames(image, frames, *, image_pitch_um=None, stitch_options=None, **options):
    """Stitch the reference from the swipe's frames, then :func:`compare`.

    Parameters
    ----------
    image : (H, W) array_like
        The image under test.
    frames : (T, R, C) array_like
        The swipe's frames.
    image_pitch_um : float, optional
        Pitch of ``image``; default None (taken as the reference's).
    stitch_options : dict, optional
        Keyword options for :func:`stripstitch.stitch`. Default None.
    **options
        Passed to :func:`compare` (``search_rows``, ``block_px``, ...).

    Returns
    -------
    Comparison
    """
    from .pipeline import stitch
    res = stitch(frames, **(stitch_options or {}))
    return compare(image, res.image, image_pitch_um=image_pitch_um,
                   reference_pitch_um=float(res.pitch_um[0]), **options)


def plot_distortion(comparison, *, ax=None, scale=None):
    """Quiver plot of the local distortion field (matplotlib, imported here).

    Parameters
    ----------
    comparison : Comparison
    ax : matplotlib Axes, optional
        Draw here; default None (a new figure).
    scale : float, optional
        Arrow scale passed to ``quiver``; default None (automatic).

    Returns
    -------
    matplotlib.figure.Figure
    """
    if not isinstance(comparison, Comparison):
        raise TypeError(f"comparison must be a Comparison; got {type(comparison).__name__}")
    import matplotlib
    if ax is None:
        matplotlib.use("Agg", force=False)
        import matplotlib.pyplot as plt
        fig, ax = plt.subplots(figsize=(4, 6))
    else:
        fig = ax.figure
    c = comparison.block_centres_px
    d = comparison.displacement_px
    ok = np.isfinite(d).all(axis=1)
    # Axes: across (x) to the right, along (y) downwards, as the image is shown.
    ax.quiver(c[ok, 1], c[ok, 0], d[ok, 1], d[ok, 0], angles="xy", scale_units="xy",
              scale=scale, color="tab:red")
    ax.scatter(c[~ok, 1], c[~ok, 0], marker="x", color="grey", s=12)
    ax.invert_yaxis()
    ax.set_aspect("equal")
    ax.set_xlabel("across (px)")
    ax.set_ylabel("along (px)")
    ax.set_title(f"scale {comparison.scale_along_pct:+.2f} %, shear "
                 f"{comparison.shear_deg:+.2f} deg, rms {comparison.distortion_rms_px:.2f} px",
                 fontsize=8)
    return fig
