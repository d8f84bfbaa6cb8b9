"""Sky model and subtraction in the native (unrectified) detector coordinates.

Method (Kelson 2003, PASP 115, 688)
----------------------------------
Every sky pixel (objects masked, bad pixels and cosmic rays excluded) is a
sample of the sky spectrum at the wavelength the 2-D solution gives its
centre. Because monochromatic lines are tilted and curved on the detector,
pixels of different rows sample the spectrum at different sub-pixel phases,
so the sky spectrum is known far better than one point per pixel. The sky is
fitted as a cubic B-spline in wavelength, optionally times Legendre
polynomials in the slit position (to follow an illumination or line-width
change along the slit)::

    S(λ, y) = Σ_j Σ_k c_jk B_j(λ) L_k(y')

by weighted linear least squares (normal equations, banded Cholesky), and
evaluated at every pixel of the frame. No resampling of the data happens, so
the noise of the sky-subtracted frame is the noise of the raw pixels: this is
why the sky is fitted here and not after rectification.

Choices
-------
* Breakpoints are spaced ``knot_spacing_px`` times the median dispersion
  (default 0.6 px); intervals with fewer than ``min_points_per_interval``
  samples are merged, so frames with untilted lines still have a well-posed
  fit.
* Weights use a *model* variance ``a + b S + c S^2`` (S >= 0): the
  coefficients of ``var ≈ a + b * data + c * data^2`` are fitted once on the
  frame (read noise, variance per electron, flat-field error). Weighting by the data's own variance would bias
  the fit low by about one electron, since low pixels would get high weights.
  The first iteration uses the pixel variances.
* The sky is multiplied by a slit-illumination function ``I(y)`` (a
  smoothing spline along the slit whose smoothness is set by generalised
  cross-validation, Craven & Wahba 1979, Numer. Math. 31, 377, as implemented by
  ``scipy.interpolate.make_smoothing_spline``) fitted alternately with the wavelength model from the sky
  rows: vignetting and slit-width irregularities that the flat field leaves
  in the frame. Under an object it is bridged by a straight line fitted to
  the 20 rows on each side, so structure finer than the object's mask cannot
  be followed there (the demo slit's 0.6 % ripples leave sky errors of a few
  tenths of a percent under a star). Flat fields that keep the slit
  illumination leave only a smooth residual here.
* Robustness to cosmic rays and residual defects: pixels further than
  ``reject_sigma`` from the model (in units of the model noise) are left out
  and the fit repeated, until the rejected set stops changing; they get the
  SKY_OUTLIER bit. A wavelength interval that would lose more than 20 % of its
  pixels keeps them all (the model is wrong there, not the pixels), so a
  bright line core can never be rejected away.
* The model's own variance ``b(λ, y)^T C b(λ, y)`` (C = inverse of the normal
  matrix) is computed exactly from the band of C (Hutchinson & de Hoog 1985,
  Numer. Math. 47, 99, recursion for the band of the inverse of a banded
  matrix; citation from memory). This error is common to all rows at one
  wavelength: extraction adds it as a correlated term.
"""

from dataclasses import dataclass, field

import numpy as np
from numpy.polynomial import legendre
from scipy import sparse
from scipy.interpolate import BSpline
from scipy.linalg import cho_solve_banded, cholesky_banded

from pipeline.core.maskbits import MASK_DTYPE, MaskBit
from pipeline.extraction.variance import variance_model_coefficients

__all__ = ["SkyModel", "fit_sky", "subtract_sky"]


@dataclass(frozen=True)
class SkyModel:
    """A fitted sky.

    Attributes
    ----------
    sky : ndarray, shape (ny, nx), electron
        Sky model at every pixel.
    sky_variance : ndarray, shape (ny, nx), electron^2
        Variance of the model itself (not of a pixel); correlated along the slit.
    rejected : ndarray of bool, shape (ny, nx)
        Sky pixels rejected as outliers in the last iteration.
    background_variance : ndarray, shape (ny, nx), electron^2
        Noise-free variance a pixel holding only sky would have: ``a + b S + c S^2``.
    info : dict
        ``variance_coefficients`` (a in electron^2, b in electron, c),
        ``n_breakpoints``, ``n_points``, ``n_rejected``, ``n_iterations``,
        ``chi2_dof`` (of the last fit, model variance), ``spatial_order``,
        ``knot_spacing_angstrom``.
    """

    sky: np.ndarray
    sky_variance: np.ndarray
    rejected: np.ndarray
    background_variance: np.ndarray
    info: dict = field(default_factory=dict)


def _breakpoints(lam, spacing, min_points):
    lo, hi = float(lam.min()), float(lam.max())
    n = max(int(np.ceil((hi - lo) / spacing)), 1)
    bp = np.linspace(lo, hi, n + 1)
    counts = np.histogram(lam, bins=bp)[0]
    # merge poorly sampled intervals into their neighbours (drop an inner breakpoint)
    keep = [bp[0]]
    acc = 0
    for i in range(len(counts)):
        acc += counts[i]
        if acc >= min_points or i == len(counts) - 1:
            keep.append(bp[i + 1])
            acc = 0
    if len(keep) > 2 and np.histogram(lam, bins=keep)[0][-1] < min_points:
        del keep[-2]  # last interval too thin: join it to the previous one
    return np.asarray(keep)


def _design(lam, yn, knots, spatial_order):
    """Compact design matrix: column indices and values, (n_pts, 4 * (K + 1)) each.

    Unknowns are interleaved as ``j * (K + 1) + k`` (B-spline j, Legendre k), so
    the normal matrix is banded with half-bandwidth ``4 * (K + 1) - 1``.
    Wavelengths outside the knots are clamped to the end knots.
    """
    lam = np.clip(lam, knots[3], knots[-4])
    b = BSpline.design_matrix(lam, knots, 3)
    n_pts = lam.size
    # scipy stores exactly k + 1 = 4 consecutive entries per row
    bcols = np.asarray(b.indices).reshape(n_pts, 4)
    bvals = np.asarray(b.data).reshape(n_pts, 4)
    kk = spatial_order + 1
    leg = legendre.legvander(yn, spatial_order)  # (n_pts, kk)
    cols = (bcols[:, :, None] * kk + np.arange(kk)[None, None, :]).reshape(n_pts, -1)
    vals = (bvals[:, :, None] * leg[:, None, :]).reshape(n_pts, -1)
    return cols, vals, b.shape[1] * kk


def _normal_band(cols, vals, weights, values, n_par):
    """Upper band (LAPACK layout) of A^T W A and A^T W d for the compact design."""
    p = cols.shape[1]
    rows = np.repeat(np.arange(cols.shape[0]), p)
    a = sparse.csr_matrix((vals.ravel(), (rows, cols.ravel())), shape=(cols.shape[0], n_par))
    aw = a.multiply(weights[:, None]).tocsr()
    g = (a.T @ aw).tocsr()
    rhs = np.asarray(aw.T @ values).ravel()
    m = p - 1
    ab = np.zeros((m + 1, n_par))
    for d in range(m + 1):
        diag = g.diagonal(d)
        ab[m - d, d:] = diag
    return ab, rhs, m


def _inverse_band(cb, m):
    """Band (|i-j| <= m) of the inverse of U^T U, U upper banded (LAPACK layout)."""
    n = cb.shape[1]

    def u(i, j):  # U[i, j] for i <= j <= i + m
        return cb[m + i - j, j]

    s = np.zeros((m + 1, n))  # s[d, i] = Sigma[i, i + d]

    def sig(i, j):
        i, j = (i, j) if i <= j else (j, i)
        return s[j - i, i] if j - i <= m and j < n else 0.0

    for i in range(n - 1, -1, -1):
        uii = u(i, i)
        ks = range(i + 1, min(i + m, n - 1) + 1)
        uik = [u(i, k) for k in ks]
        for j in range(min(i + m, n - 1), i - 1, -1):
            acc = sum(uk * sig(k, j) for uk, k in zip(uik, ks))
            s[j - i, i] = ((1.0 / uii if i == j else 0.0) - acc) / uii
    return s


def _model_variance(cols, vals, sband):
    n_pts, p = cols.shape
    out = np.zeros(n_pts)
    for a in range(p):
        for b in range(p):
            ca, cb_ = cols[:, a], cols[:, b]
            lo = np.minimum(ca, cb_)
            d = np.abs(ca - cb_)
            inside = d < sband.shape[0]
            term = np.where(inside, sband[np.minimum(d, sband.shape[0] - 1), lo], 0.0)
            out += vals[:, a] * vals[:, b] * term
    return out


def _illumination(rows_u, d_u, base_u, var_u, keep, ny, *, bridge_rows=20, min_row_fraction=0.5):
    """Slit illumination I(y): per-row scale of the sky, smoothed along the slit.

    Each row's scale is the weighted least-squares ratio of its sky pixels to
    the wavelength model (rows with less than ``min_row_fraction`` of the
    typical number of sky pixels are not used; rows below 90 % of the median
    level, the slit ends, keep their own ratio). The other ratios are smoothed by a
    cubic smoothing spline (:func:`scipy.interpolate.make_smoothing_spline`,
    weights = inverse variances of the ratios, smoothing chosen by generalised
    cross-validation). Across a gap (rows under an object) a weighted straight
    line fitted to the ratios of up to ``bridge_rows`` rows on each side is
    used: extrapolating a smooth curve from the gap's edges would carry the
    noise of the last rows into the whole gap. The ends are held constant.
    Normalised to a weighted mean of 1.
    """
    from scipy.interpolate import make_smoothing_spline

    w = np.where(keep, 1.0 / var_u, 0.0)
    num = np.bincount(rows_u, weights=w * d_u * base_u, minlength=ny)
    den = np.bincount(rows_u, weights=w * base_u ** 2, minlength=ny)
    npx = np.bincount(rows_u, weights=keep.astype(float), minlength=ny)
    full = np.median(npx[npx > 0]) if np.any(npx > 0) else 0.0
    has = (den > 0) & (npx >= min_row_fraction * full)
    ys = np.flatnonzero(has)
    if ys.size < 6:
        return np.ones(ny)
    ratio = num[has] / den[has]
    wts = den[has] / np.mean(den[has])
    # rows far below the typical level (slit ends, vignetted corners) keep their own
    # ratio: a steep edge would force the smoothing to follow noise everywhere
    bright = ratio > 0.9 * np.median(ratio)
    at_data = ratio.copy()
    if bright.sum() >= 6:
        try:
            at_data[bright] = make_smoothing_spline(ys[bright].astype(float), ratio[bright],
                                                    w=wts[bright])(ys[bright].astype(float))
        except (ValueError, np.linalg.LinAlgError):
            at_data[bright] = float(np.sum(num[has][bright]) / np.sum(den[has][bright]))
    rows = np.arange(ny, dtype=float)
    illum = np.interp(rows, ys, at_data)
    # bridge every interior gap with a local weighted straight line
    gaps = np.flatnonzero(np.diff(ys) > 1)
    for g in gaps:
        lo_edge, hi_edge = ys[g], ys[g + 1]
        near = ((ys >= lo_edge - bridge_rows) & (ys <= lo_edge)) | \
               ((ys >= hi_edge) & (ys <= hi_edge + bridge_rows))
        if near.sum() >= 4:
            coef = np.polyfit(ys[near].astype(float), ratio[near], 1, w=np.sqrt(wts[near]))
            inside = slice(lo_edge + 1, hi_edge)
            illum[inside] = np.polyval(coef, rows[inside])
    illum = np.clip(illum, 0.0, None)
    return illum / (np.sum(den[has] * illum[has]) / np.sum(den[has]))


def fit_sky(data, variance, mask, wave_map, sky_pixels, *, knot_spacing_px=0.6,
            spatial_order=0, fit_illumination=True, reject_sigma=5.0, max_iterations=8,
            min_points_per_interval=None, variance_coefficients=None):
    """Fit a B-spline sky to the sky pixels of a frame in native coordinates.

    Parameters
    ----------
    data : ndarray, shape (ny, nx), electron
        Calibrated frame, canonical orientation.
    variance : ndarray, shape (ny, nx), electron^2
    mask : ndarray of uint8, shape (ny, nx)
        0 = good; nonzero pixels are not used.
    wave_map : ndarray, shape (ny, nx), Angstrom
        Wavelength of every pixel centre.
    sky_pixels : ndarray of bool, shape (ny, nx)
        Pixels free of object light.
    knot_spacing_px : float
        Breakpoint spacing in units of the median dispersion (pixels).
    spatial_order : int
        Order of the Legendre polynomial along the slit (0 = sky uniform along
        the slit apart from the wavelength change and the illumination).
    fit_illumination : bool
        Fit a multiplicative slit-illumination function ``I(y)`` from the sky
        rows (interpolated under the objects); False = ``I = 1``.
    reject_sigma : float
        Rejection threshold in units of the model noise.
    max_iterations : int
        Largest number of fits.
    min_points_per_interval : int, optional
        Smallest number of samples between breakpoints; default
        ``8 * (spatial_order + 1)``.
    variance_coefficients : (float, float, float), optional
        ``(a, b, c)`` of ``variance ≈ a + b * data + c * data**2`` (see
        :func:`pipeline.extraction.variance.variance_model_coefficients`); default:
        fitted on the sky pixels (better: on all good pixels of the frame, as
        :func:`pipeline.extraction.frame.reduce_frame` does).

    Returns
    -------
    SkyModel

    Raises
    ------
    ValueError
        When the inputs disagree in shape or fewer sky pixels than parameters remain.

    Examples
    --------
    Rows shifted by 0.1 Angstrom each (20 rows span one 1.7-Angstrom pixel, so the sky is
    sampled at every phase):

    >>> wave = np.tile(np.linspace(5000, 5100, 60), (20, 1)) + np.arange(20)[:, None] * 0.1
    >>> sky = 100 + 500 * np.exp(-0.5 * ((wave - 5050) / 2.0) ** 2)
    >>> m = fit_sky(sky, sky, np.zeros(sky.shape, 'u1'), wave, np.ones(sky.shape, bool))
    >>> bool(np.allclose(m.sky, sky, rtol=2e-3))
    True
    """
    data = np.asarray(data, float)
    variance = np.asarray(variance, float)
    wave_map = np.asarray(wave_map, float)
    mask = np.asarray(mask)
    sky_pixels = np.asarray(sky_pixels, bool)
    if data.ndim != 2:
        raise ValueError(f"`data` must be 2-D (ny, nx), got shape {data.shape}")
    for name, arr in (("variance", variance), ("mask", mask), ("wave_map", wave_map),
                      ("sky_pixels", sky_pixels)):
        if arr.shape != data.shape:
            raise ValueError(f"`{name}` must have the shape of `data` {data.shape}, got {arr.shape}")
    if int(spatial_order) != spatial_order or spatial_order < 0:
        raise ValueError(f"`spatial_order` must be an integer >= 0, got {spatial_order!r}")
    if not knot_spacing_px > 0:
        raise ValueError(f"`knot_spacing_px` must be > 0, got {knot_spacing_px!r}")
    ny, nx = data.shape
    kk = spatial_order + 1
    min_pts = 8 * kk if min_points_per_interval is None else int(min_points_per_interval)
    usable = sky_pixels & (mask == 0) & np.isfinite(data) & np.isfinite(variance) \
        & (variance > 0) & np.isfinite(wave_map)
    n_usable = int(usable.sum())
    if n_usable < 50 * kk:
        raise ValueError(f"only {n_usable} usable sky pixels; need at least {50 * kk}")
    if variance_coefficients is None:
        a_var, b_var, c_var = variance_model_coefficients(data[usable], variance[usable])
    else:
        a_var, b_var, c_var = (float(c) for c in variance_coefficients)
    if not (b_var > 0 and np.isfinite(a_var)):
        a_var, b_var, c_var = float(np.median(variance[usable])), 0.0, 0.0
    a_var = max(a_var, 1e-6)

    def var_model(signal):
        sig = np.clip(signal, 0.0, None)
        return a_var + b_var * sig + c_var * sig ** 2

    yy = np.broadcast_to(np.arange(ny, dtype=float)[:, None], data.shape)
    yn_all = 2.0 * yy / max(ny - 1, 1) - 1.0
    lam_u, y_u, d_u, v_u = wave_map[usable], yn_all[usable], data[usable], variance[usable]
    disp = float(np.median(np.abs(np.diff(wave_map[ny // 2]))))
    spacing = knot_spacing_px * disp
    bp = _breakpoints(lam_u, spacing, min_pts)
    knots = np.concatenate([[bp[0]] * 3, bp, [bp[-1]] * 3])
    cols, vals, n_par = _design(lam_u, y_u, knots, spatial_order)
    if n_usable <= n_par:
        raise ValueError(f"{n_usable} usable sky pixels for {n_par} sky parameters")

    rows_u = np.broadcast_to(np.arange(ny)[:, None], data.shape)[usable]
    interval = np.clip(np.searchsorted(bp, lam_u) - 1, 0, bp.size - 2)
    n_per_interval = np.bincount(interval, minlength=bp.size - 1)
    illum_rows = np.ones(ny)
    illum_u = np.ones(n_usable)
    weight_var = v_u.copy()
    keep = np.ones(n_usable, bool)
    n_iter = 0
    for n_iter in range(1, max_iterations + 1):
        lit = illum_u > 1e-3  # rows without light carry no information on the spectrum
        w = np.where(keep & lit, illum_u ** 2 / weight_var, 0.0)
        ab, rhs, m = _normal_band(cols, vals, w, np.where(lit, d_u / np.where(lit, illum_u, 1.0),
                                                         0.0), n_par)
        ab[m] += 1e-10 * np.max(ab[m]) + 1e-300
        cb = cholesky_banded(ab, lower=False)
        coef = cho_solve_banded((cb, False), rhs)
        base_u = np.sum(vals * coef[cols], axis=1)
        model_u = base_u * illum_u  # the model of this fit
        weight_var = var_model(model_u)
        z = (d_u - model_u) / np.sqrt(weight_var)
        new_keep = np.abs(z) <= reject_sigma
        # a wavelength interval losing more than 20 % of its points has a model
        # problem, not cosmic rays: keep them all
        lost = np.bincount(interval, weights=(~new_keep).astype(float),
                           minlength=bp.size - 1) > 0.2 * n_per_interval
        new_keep |= lost[interval]
        old_illum = illum_rows
        if fit_illumination:
            illum_rows = _illumination(rows_u, d_u, base_u, weight_var, new_keep, ny)
            illum_u = illum_rows[rows_u]
        converged = (np.array_equal(new_keep, keep)
                     and np.max(np.abs(illum_rows - old_illum)) < 1e-4)
        keep = new_keep
        if converged and n_iter > 1:
            break
    # final fit with the last weights, illumination and rejected set (for the covariance)
    lit = illum_u > 1e-3
    w = np.where(keep & lit, illum_u ** 2 / weight_var, 0.0)
    ab, rhs, m = _normal_band(cols, vals, w, np.where(lit, d_u / np.where(lit, illum_u, 1.0), 0.0),
                              n_par)
    ab[m] += 1e-10 * np.max(ab[m]) + 1e-300
    cb = cholesky_banded(ab, lower=False)
    coef = cho_solve_banded((cb, False), rhs)
    model_u = np.sum(vals * coef[cols], axis=1) * illum_u
    chi2 = float(np.sum(np.where(keep, (d_u - model_u) ** 2 / weight_var, 0.0)))
    dof = max(int(keep.sum()) - n_par, 1)

    cols_all, vals_all, _ = _design(wave_map.ravel(), yn_all.ravel(), knots, spatial_order)
    illum_all = np.broadcast_to(illum_rows[:, None], data.shape)
    sky = np.sum(vals_all * coef[cols_all], axis=1).reshape(ny, nx) * illum_all
    sband = _inverse_band(cb, m)
    sky_var = _model_variance(cols_all, vals_all, sband).reshape(ny, nx) * illum_all ** 2
    rejected = np.zeros(data.shape, bool)
    rejected[usable] = ~keep
    background = var_model(sky)
    info = {
        "variance_coefficients": (a_var, b_var, c_var),
        "n_breakpoints": int(bp.size),
        "n_points": n_usable,
        "n_rejected": int((~keep).sum()),
        "n_iterations": n_iter,
        "chi2_dof": chi2 / dof,
        "spatial_order": int(spatial_order),
        "knot_spacing_angstrom": float(np.median(np.diff(bp))),
        "illumination": illum_rows,
    }
    return SkyModel(sky, np.clip(sky_var, 0.0, None), rejected, background, info)


def subtract_sky(data, variance, mask, model):
    """Subtract a sky model; the result's variance includes the model variance.

    Parameters
    ----------
    data : ndarray, shape (ny, nx), electron
    variance : ndarray, shape (ny, nx), electron^2
    mask : ndarray of uint8, shape (ny, nx)
    model : SkyModel

    Returns
    -------
    tuple of ndarray
        ``(data - sky, variance + sky_variance, mask | SKY_OUTLIER where rejected)``;
        the inputs are not changed.
    """
    out_mask = np.asarray(mask, dtype=MASK_DTYPE).copy()
    out_mask[model.rejected] |= MASK_DTYPE(MaskBit.SKY_OUTLIER)
    return (np.asarray(data, float) - model.sky, np.asarray(variance, float) + model.sky_variance,
            out_mask)
