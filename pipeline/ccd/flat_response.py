"""Flat response: divide the lamp spectrum (and the slit illumination) out of a combined flat.

Smooth models (cubic least-squares splines with clipping) of the lamp spectrum along
the dispersion and of the slit illumination along the slit; what is left is the
pixel-to-pixel response, with UNILLUMINATED and BAD_PIXEL bits.
"""

import warnings
from dataclasses import dataclass, field

import numpy as np

from pipeline.core.checks import as_2d
from pipeline.core.errors import CalibrationError
from pipeline.core.maskbits import MASK_DTYPE, MaskBit

__all__ = ["FlatResponse", "normalise_flat"]

_BAD = MASK_DTYPE(MaskBit.BAD_PIXEL)
_UNLIT = MASK_DTYPE(MaskBit.UNILLUMINATED)


@dataclass(frozen=True)
class FlatResponse:
    """A normalised master flat.

    Attributes
    ----------
    response : ndarray, shape (ny, nx), float32
        Pixel-to-pixel response (times the slit illumination when kept),
        mean 1 over good illuminated pixels; 1 where the mask is set.
    variance : ndarray, shape (ny, nx), float32
        Variance of ``response``.
    mask : ndarray, shape (ny, nx), uint8
        BAD_PIXEL and UNILLUMINATED bits.
    lamp_shape : ndarray, shape (nx,)
        Smooth lamp spectrum divided out (units of the input).
    illumination : ndarray, shape (ny, nx), float32
        Smooth slit illumination (1 outside the slit); divided out unless kept.
    info : dict
        ``norm``, ``response_scatter``, ``n_bad``, ``n_unilluminated``,
        ``illuminated_rows``.
    """

    response: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    lamp_shape: np.ndarray
    illumination: np.ndarray
    info: dict = field(default_factory=dict)


def _knots_with_data(xs, knot_spacing, k=3):
    """Interior knots about ``knot_spacing`` apart, each interval holding data.

    ``xs`` is sorted. A candidate knot is kept only when at least two points
    lie between it and the previous kept knot and at least ``k + 1`` points
    lie beyond it, so the Schoenberg-Whitney conditions of the least-squares
    spline hold even across gaps left by rejected points.
    """
    lo, hi = xs[0], xs[-1]
    n_int = int((hi - lo) // max(float(knot_spacing), 1.0))
    if n_int < 2:
        return np.array([])
    candidates = np.linspace(lo, hi, n_int + 1)[1:-1]
    # the counts at every candidate at once; only the choice depends on the last kept knot
    left = np.searchsorted(xs, candidates, "left")
    right = np.searchsorted(xs, candidates, "right")
    kept = []
    last_right = int(np.searchsorted(xs, lo, "right"))
    for t, n_left, n_right in zip(candidates, left.tolist(), right.tolist()):
        if n_left - last_right >= 2 and xs.size - n_right >= k + 1:
            kept.append(t)
            last_right = n_right
    return np.array(kept)


def _nanmedian_rows(values):
    """``numpy.nanmedian(values, axis=1)``, taking the faster ``numpy.median`` for the rows
    without NaN (the same numbers)."""
    values = np.asarray(values)
    nan_rows = np.isnan(values).any(axis=1)
    if not nan_rows.any():
        return np.median(values, axis=1)
    out = np.empty(values.shape[0])
    out[~nan_rows] = np.median(values[~nan_rows], axis=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)       # rows all NaN: NaN
        out[nan_rows] = np.nanmedian(values[nan_rows], axis=1)
    return out


#: columns per chunk of the lamp-spectrum statistics (bounds the temporary arrays)
_LAMP_CHUNK_COLUMNS = 256


def _spline_smooth(x, y, *, knot_spacing, sigma=3.0, maxiters=5, x_eval=None):
    """Cubic least-squares spline of y(x) with evenly spaced knots and clipping.

    ``x`` increasing; NaN in ``y`` are left out. Returns the spline at ``x_eval``
    (default ``x``), clamped to the range of ``x``.
    """
    from astropy.stats import sigma_clip
    from scipy.interpolate import LSQUnivariateSpline

    x = np.asarray(x, float)
    y = np.asarray(y, float)
    x_eval = x if x_eval is None else np.asarray(x_eval, float)
    finite = np.isfinite(y)
    good = finite.copy()
    if good.sum() < 5:
        fill = np.nanmedian(y) if good.any() else 1.0
        return np.full(x_eval.shape, fill)
    spline = None
    for _ in range(max(int(maxiters), 1)):
        xs, ys = x[good], y[good]
        k = min(3, xs.size - 1)
        spline = LSQUnivariateSpline(xs, ys, _knots_with_data(xs, knot_spacing, k), k=k)
        # every finite point is judged against the new fit (rejected ones may come back)
        resid = np.where(finite, y - spline(x), np.nan)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            clipped = sigma_clip(resid, sigma=sigma, maxiters=1, cenfunc="median",
                                 stdfunc="mad_std")
        new_good = finite & ~np.ma.getmaskarray(clipped)
        if np.array_equal(new_good, good) or new_good.sum() < 5:
            break
        good = new_good
    return spline(np.clip(x_eval, x[0], x[-1]))


def _subsample(values, limit=400_000):
    """Every k-th value, at most about ``limit`` (statistics of a few 1e5 values suffice)."""
    values = np.asarray(values).ravel()
    return values[::max(values.size // limit, 1)]


def _clipped_stats(values, **kwargs):
    """astropy sigma_clipped_stats without its warning about NaN (they are left out)."""
    from astropy.stats import sigma_clipped_stats
    from astropy.utils.exceptions import AstropyUserWarning

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AstropyUserWarning)
        warnings.simplefilter("ignore", RuntimeWarning)
        return sigma_clipped_stats(values, **kwargs)


#: floor of the response scatter in the deviance test (noise-free flats would flag everything)
_MIN_RESPONSE_SCATTER = 1e-3
#: slit-end rows whose profile misses the smooth illumination by more than this are unlit
_EDGE_MISFIT = 0.005
_MAX_EDGE_ROWS = 5


def normalise_flat(flat, variance=None, *, lamp_knot_spacing_px=40.0,
                   keep_slit_illumination=False, illumination_bin_px=64,
                   illumination_knot_spacing_px=5.0, min_slit_illumination=0.3,
                   min_flat_snr=20.0, min_response=0.5, max_response=1.5,
                   deviant_sigma=6.0):
    """Divide the lamp spectrum (and the slit illumination) out of a combined flat.

    Parameters
    ----------
    flat : ndarray, shape (ny, nx)
        Combined flat in canonical orientation (x = dispersion).
    variance : ndarray, shape (ny, nx), optional
        Its variance (for the S/N criterion and the response variance).
    lamp_knot_spacing_px : float, px
        Knot spacing of the cubic spline fitted to the lamp spectrum along x.
    keep_slit_illumination : bool
        Keep the slit illumination in the result (the response is then
        pixel response times illumination) instead of dividing it out.
    illumination_bin_px : int, px
        Width of the column bins in which the slit profile is measured.
    illumination_knot_spacing_px : float, px
        Knot spacing of the spline fitted along the slit to each bin's profile.
    min_slit_illumination : float
        Rows whose illumination is below this fraction of the slit's brightest
        level are UNILLUMINATED.
    min_flat_snr : float
        Pixels whose combined flat has a lower signal-to-noise ratio are
        UNILLUMINATED (too little lamp light).
    min_response, max_response : float
        Responses outside this range are BAD_PIXEL.
    deviant_sigma : float
        Responses farther from 1 than this many robust standard deviations are BAD_PIXEL.

    Returns
    -------
    FlatResponse

    Notes
    -----
    1. Row profile ``p(y)`` = median along x; rows above ``min_slit_illumination``
       of its 95th percentile are illuminated.
    2. Lamp spectrum: each column's clipped mean of ``flat / p(y)`` over the
       illuminated rows, smoothed along x by a cubic spline with clipping.
    3. Slit illumination: ``flat / lamp`` medianed in column bins, each bin's
       profile smoothed along y by a spline (deviant rows, e.g. dead columns,
       rejected), interpolated linearly in x. Lit rows at the slit ends whose
       profile misses the spline by more than 0.5 % (at most 5 per end) are
       treated as unilluminated: the spline cannot follow the steep edge.
    4. Response = ``flat / (lamp * illumination)`` (or ``flat / lamp``),
       divided by its clipped mean over good illuminated pixels. Large-scale
       response structure ends up in the smooth models, not in the response.

    Examples
    --------
    >>> yy, xx = np.mgrid[0:40, 0:300]
    >>> flat = (500.0 + xx) * np.where((yy > 3) & (yy < 36), 1.0, 0.0)
    >>> r = normalise_flat(flat, min_flat_snr=0)
    >>> bool(np.allclose(r.response[r.mask == 0], 1.0, atol=1e-3))
    True
    """
    from scipy.interpolate import interp1d

    f = as_2d(flat, "flat", dtype=np.float32).astype(np.float64)
    ny, nx = f.shape
    var = None if variance is None else np.asarray(variance, dtype=np.float64)
    if var is not None and var.shape != f.shape:
        raise ValueError(f"`variance` must have the shape of `flat` {f.shape}, got {var.shape}")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        profile = _nanmedian_rows(f)
        top = np.nanpercentile(profile, 95)
        if not np.isfinite(top) or top <= 0:
            raise CalibrationError("the combined flat has no positive signal; expected "
                                   "lamp-illuminated frames")
        rows_lit = profile > min_slit_illumination * top
        p_norm = profile / np.nanmean(profile[rows_lit])
        # clipped per column, so chunks of columns give the same numbers with less memory
        lit_rows, p_lit = np.nonzero(rows_lit)[0], p_norm[rows_lit, None]
        lamp_raw = np.concatenate([np.asarray(_clipped_stats(
            f[lit_rows, c0:c0 + _LAMP_CHUNK_COLUMNS] / p_lit, axis=0, sigma=3.0, maxiters=3,
            cenfunc="median", stdfunc="mad_std")[1], float)
            for c0 in range(0, nx, _LAMP_CHUNK_COLUMNS)])
    x = np.arange(nx, dtype=float)
    lamp = _spline_smooth(x, lamp_raw, knot_spacing=lamp_knot_spacing_px)
    lamp = np.where(lamp > 0, lamp, np.nan)
    r = f / lamp[None, :]
    # slit illumination in column bins
    width = max(int(illumination_bin_px), 1)
    edges = np.arange(0, nx + width, width)
    edges[-1] = nx
    edges = np.unique(np.clip(edges, 0, nx))
    centres, profiles, misfits = [], [], []
    y = np.arange(ny, dtype=float)
    lit_idx = np.nonzero(rows_lit)[0]
    for c0, c1 in zip(edges[:-1], edges[1:]):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            prof = _nanmedian_rows(r[:, c0:c1])
        smooth = np.ones(ny)
        if lit_idx.size >= 5:
            smooth[lit_idx[0]:lit_idx[-1] + 1] = _spline_smooth(
                y[lit_idx], prof[lit_idx], knot_spacing=illumination_knot_spacing_px,
                x_eval=y[lit_idx[0]:lit_idx[-1] + 1])
        centres.append(0.5 * (c0 + c1 - 1))
        profiles.append(smooth)
        with np.errstate(divide="ignore", invalid="ignore"):
            misfits.append(np.abs(prof / smooth - 1))
    del r
    profiles = np.array(profiles).T  # (ny, nbins)
    # Slit ends: the smooth profile cannot follow the steep edge. Lit rows at either end
    # whose profile misses the fit by more than _EDGE_MISFIT (median over the bins) are
    # treated as unilluminated, at most _MAX_EDGE_ROWS rows per end.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        row_misfit = np.nanmedian(np.array(misfits), axis=0)
    n_edge = 0
    if lit_idx.size > 2 * _MAX_EDGE_ROWS:
        for order in (lit_idx[:_MAX_EDGE_ROWS], lit_idx[::-1][:_MAX_EDGE_ROWS]):
            for row in order:
                if not row_misfit[row] > _EDGE_MISFIT:
                    break
                rows_lit[row] = False
                n_edge += 1
        lit_idx = np.nonzero(rows_lit)[0]
    if len(centres) == 1:
        illum = np.repeat(profiles, nx, axis=1)
    else:
        illum = interp1d(centres, profiles, axis=1, bounds_error=False,
                         fill_value=(profiles[:, 0], profiles[:, -1]))(x)
    illum_level = np.nanmean(illum[rows_lit]) if rows_lit.any() else 1.0
    illum /= illum_level
    # Full-frame float64 arrays are what this costs in memory at full size: each one below
    # is freed, or updated in place, as soon as it is no longer needed (the same numbers).
    model = lamp[None, :] * (illum if not keep_slit_illumination else 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        response = f / model
        resp_var = None
        if var is not None:
            model **= 2
            resp_var = var / model
    del model
    unlit = ~rows_lit[:, None] | (illum < min_slit_illumination) | ~np.isfinite(response)
    if var is not None:
        with np.errstate(divide="ignore", invalid="ignore"):
            snr = np.sqrt(var)
            np.divide(f, snr, out=snr)
        unlit |= ~(snr >= min_flat_snr)
        del snr
    shape = f.shape
    del f, var
    unlit = np.broadcast_to(unlit, shape).copy()
    good = ~unlit
    if not good.any():
        raise CalibrationError("no illuminated pixel in the combined flat; check "
                               "flat.min_slit_illumination and flat.min_flat_snr")
    sample = _subsample(response[good])
    norm, _, _ = _clipped_stats(sample, sigma=3.0, maxiters=5)
    response /= norm
    if resp_var is not None:
        resp_var /= norm ** 2
    _, med, scatter = _clipped_stats(sample / norm, sigma=5.0, maxiters=5,
                                     cenfunc="median", stdfunc="mad_std")
    bad = good & ((response < min_response) | (response > max_response)
                  | (np.abs(response - 1.0) > deviant_sigma * max(scatter, _MIN_RESPONSE_SCATTER)))
    del good
    mask = np.zeros(shape, dtype=MASK_DTYPE)
    mask[unlit] |= _UNLIT
    mask[bad] |= _BAD
    flagged = mask != 0
    response[flagged] = 1.0
    response = response.astype(np.float32)
    if resp_var is None:
        resp_var = np.zeros(shape)
    flagged |= ~np.isfinite(resp_var)
    resp_var[flagged] = 0.0
    resp_var = resp_var.astype(np.float32)
    info = {"norm": float(norm), "response_scatter": float(scatter),
            "n_bad": int(bad.sum()), "n_unilluminated": int(unlit.sum()),
            "illuminated_rows": [int(lit_idx[0]), int(lit_idx[-1])] if lit_idx.size else [],
            "n_edge_rows_unlit": n_edge,
            "keep_slit_illumination": bool(keep_slit_illumination)}
    return FlatResponse(response, resp_var, mask, lamp, illum.astype(np.float32), info)

