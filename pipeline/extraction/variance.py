"""The noise model of a calibrated frame: variance = a + b S + c S^2.

The CCD step writes each pixel's variance from its own data (read noise, photon
noise, flat-field error). Weighting a fit by those data-based variances biases it
(low pixels get high weights), so the sky fit and the optimal extraction use a
*noise-free* model of the variance as a function of the expected signal ``S``:
``a`` (read noise and everything signal-independent, electron^2), ``b`` (variance
per electron of signal, 1 for a frame in electrons) and ``c`` (the flat field's
relative variance). :func:`variance_model_coefficients` fits the three on the
frame; :func:`flat_term_by_column` measures ``c`` column by column, because a lamp
flat's relative error changes along the dispersion.
"""

import numpy as np

__all__ = ["variance_model_coefficients", "flat_term_by_column"]


def variance_model_coefficients(data, variance, mask=None, *, clip_sigma=4.0):
    """Fit ``variance ≈ a + b * data + c * data**2`` over good pixels.

    Parameters
    ----------
    data : ndarray, electron
    variance : ndarray, electron^2
    mask : ndarray of uint8 or bool, optional
        Nonzero = excluded.
    clip_sigma : float
        Outlier rejection of the fit.

    Returns
    -------
    tuple of float
        ``(a, b, c)``: read-noise-like term (electron^2), variance per electron
        of signal (1 for a frame in electrons) and the relative variance of
        the flat field (``c * data**2``, the flat-field error the CCD step adds).

    Notes
    -----
    Fit over as wide a range of signal as possible (all good pixels of the
    frame, objects included): on a faint sky alone the slope is poorly
    determined. Only pixels above 5 times the read noise are used, because a
    data-based variance ``rn^2 + max(data, 0)`` is not linear near zero; with
    fewer than 50 of them, ``b = 1`` (data in electrons), ``c = 0`` and ``a``
    is the median of ``variance - max(data, 0)``. Weighted linear least squares
    with weights ``1 / (a + |data|)`` (relative residuals), with sigma
    clipping: :class:`astropy.modeling.fitting.FittingWithOutlierRemoval` with
    :class:`~astropy.modeling.fitting.LinearLSQFitter` and
    :func:`astropy.stats.sigma_clip`. A negative ``c`` is set to 0 and the line
    refitted.
    """
    from astropy.modeling import fitting, models
    from astropy.stats import sigma_clip

    d = np.asarray(data, float).ravel()
    v = np.asarray(variance, float).ravel()
    ok = np.isfinite(d) & np.isfinite(v) & (v > 0)
    if mask is not None:
        ok &= np.asarray(mask).ravel() == 0
    if ok.sum() < 10:
        raise ValueError(f"need at least 10 good pixels to model the variance, got {ok.sum()}")
    d, v = d[ok], v[ok]
    if d.size > 200000:  # a regular subsample is plenty for three coefficients
        step = d.size // 200000 + 1
        d, v = d[::step], v[::step]
    fitter = fitting.FittingWithOutlierRemoval(fitting.LinearLSQFitter(), sigma_clip,
                                               niter=3, sigma=clip_sigma)
    a = max(float(np.percentile(v, 5)), 1e-6)
    bright = d > 5.0 * np.sqrt(a)
    if bright.sum() < 50 or np.ptp(d[bright]) < 3.0 * np.sqrt(a):
        return float(np.median(v - np.clip(d, 0.0, None))), 1.0, 0.0
    d, v = d[bright], v[bright]
    quadratic = np.ptp(d) > 100.0 * np.sqrt(a)  # enough lever arm to see a flat-field term
    coef = (a, 1.0, 0.0)
    for _ in range(3):
        weights = 1.0 / (coef[0] + np.abs(d))
        fitted, _ = fitter(models.Polynomial1D(2 if quadratic else 1), d, v, weights=weights)
        new = (float(fitted.c0.value), float(fitted.c1.value),
               float(fitted.c2.value) if quadratic else 0.0)
        if quadratic and new[2] < 0:
            quadratic = False
            continue
        done = abs(new[0] - coef[0]) < 1e-3 * max(abs(coef[0]), 1.0)
        coef = (max(new[0], 1e-6), new[1], new[2])
        if done:
            break
    return coef


def flat_term_by_column(data, variance, mask, coefficients, *, min_signal_e=2000.0,
                        min_pixels=5, smooth_px=31):
    """Flat-field variance term ``c(x)`` of ``variance ≈ a + b S + c(x) S²`` per column.

    The flat field's relative variance is not one number: a lamp flat is
    faint where the lamp spectrum and the throughput are low (the blue end of
    a quartz lamp), so its relative error, which the CCD step propagates into
    every pixel's variance, changes several-fold along the dispersion. A
    single ``c`` (:func:`variance_model_coefficients`) then under-predicts the
    variance of bright objects there (by ~2x at the blue end of the demo
    frames). Here ``c`` is measured on every good pixel brighter than
    ``min_signal_e`` as ``(variance - a - b data) / data²`` (the calibrated
    variance is computed from the data, so this is the flat term the CCD step
    put in, up to the pixel-to-pixel spread of ``a`` and ``b``), its median
    taken per column, smoothed by a running median over ``smooth_px``
    columns, and interpolated over columns without enough bright pixels
    (the global ``c`` where no column has any).

    Parameters
    ----------
    data : ndarray, shape (ny, nx), electron
    variance : ndarray, shape (ny, nx), electron^2
    mask : ndarray, shape (ny, nx)
        Nonzero = excluded.
    coefficients : tuple of float
        ``(a, b, c)`` of :func:`variance_model_coefficients`.
    min_signal_e : float
        Pixels used must hold more electrons than this.
    min_pixels : int
        Columns need at least this many of them.
    smooth_px : int
        Running-median width along the dispersion, columns.

    Returns
    -------
    ndarray, shape (nx,)
        ``c(x)`` (>= 0): the relative variance of the flat in column ``x``.
    """
    from scipy.ndimage import median_filter

    d = np.asarray(data, float)
    v = np.asarray(variance, float)
    a, b, c = (float(x) for x in coefficients)
    nx = d.shape[1]
    ok = (np.asarray(mask) == 0) & np.isfinite(d) & np.isfinite(v) & (d > min_signal_e)
    with np.errstate(invalid="ignore", divide="ignore"):
        est = np.where(ok, (v - a - b * d) / d ** 2, np.nan)
    n_ok = ok.sum(axis=0)
    col = np.full(nx, np.nan)
    for j in np.flatnonzero(n_ok >= min_pixels):
        col[j] = np.median(est[ok[:, j], j])
    have = np.isfinite(col)
    if not have.any():
        return np.full(nx, max(c, 0.0))
    x = np.arange(nx)
    filled = np.interp(x, x[have], col[have])
    if have.sum() >= 3 and smooth_px > 1:
        sm = median_filter(col[have], size=min(int(smooth_px) | 1, int(have.sum()) | 1),
                           mode="nearest")
        filled = np.interp(x, x[have], sm)
    return np.clip(filled, 0.0, None)
