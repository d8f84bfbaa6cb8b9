"""Find arc-lamp lines in a calibrated arc frame and measure their centroids.

Steps (each a pure function on arrays):

1. :func:`extract_band` sums rows around the slit centre into a 1-D spectrum,
   with its variance and a mask (masked pixels are replaced by the mean of
   the good rows of their column, scaled to the full band).
2. :func:`continuum_level` estimates the continuum and scattered light as a
   smooth low running percentile; it is subtracted before detection.
3. :func:`find_arc_lines` detects peaks above a signal-to-noise threshold and
   fits each with a pixel-integrated Gaussian plus a linear background by
   weighted least squares (:func:`fit_gaussian_windows`, vectorised
   Levenberg-Marquardt), subtracting the fitted neighbours before a second
   pass. Centroid uncertainties come from the covariance of the fit (photon
   and read noise as given by the variance). Lines are flagged when a window
   pixel is saturated or masked, when a neighbour is closer than a few FWHM
   (blend), at the array edge, or when the fit fails.

The rule's adapter (:func:`pipeline.wavelength.steps.find_arc_lines_file`) reads a
calibrated arc frame and writes the line table (ECSV) for the wavelength solution.

Longer than 500 lines because detection, the vectorised window fits and the deblending
passes share the window arrays and flags; split apart they would hand half a dozen arrays
between modules.
"""

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage, signal, special

from pipeline.core import maskbits
from pipeline.core.checks import as_1d_float, as_2d
from pipeline.core.errors import InputFileError

__all__ = [
    "LineFlag", "ArcSpectrum", "ArcLines", "extract_band", "sum_rows", "continuum_level",
    "fit_gaussian_windows", "measure_lines", "find_arc_lines", "lines_table",
    "read_lines_table",
]

_SQRT_2PI = math.sqrt(2 * math.pi)
_FWHM_PER_SIGMA = 2 * math.sqrt(2 * math.log(2))


class LineFlag:
    """Bit flags of measured arc lines (0 = clean)."""

    SATURATED = 1    #: a pixel of the fit window is saturated
    BLENDED = 2      #: another detected line lies within ``blend_separation_fwhm`` FWHM
    EDGE = 4         #: the fit window is cut by the end of the spectrum
    FIT_FAILED = 8   #: the fit did not converge or gave an implausible width or centre
    MASKED = 16      #: a pixel of the fit window is masked for another reason

    NAMES = {1: "SATURATED", 2: "BLENDED", 4: "EDGE", 8: "FIT_FAILED", 16: "MASKED"}

    @classmethod
    def describe(cls, value):
        """Names of the flags set in ``value``."""
        return [name for bit, name in cls.NAMES.items() if int(value) & bit]


# --------------------------------------------------------------------------------------
# extraction and continuum
# --------------------------------------------------------------------------------------

@dataclass(frozen=True)
class ArcSpectrum:
    """A 1-D arc spectrum summed over a band of rows.

    Attributes
    ----------
    flux : ndarray, shape (nx,), electron
    variance : ndarray, shape (nx,), electron^2
    mask : ndarray of uint8, shape (nx,)
        SATURATED where any row of the band is saturated; all the bits of the
        column where no row is good (then ``flux`` is 0 and ``variance`` inf).
    rows : (int, int)
        First and last row (inclusive) of the band.
    """

    flux: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    rows: tuple


def extract_band(data, variance, mask, *, center_row=None, half_width_rows=5):
    """Sum the rows ``center_row +- half_width_rows`` of a frame into a spectrum.

    Parameters
    ----------
    data : ndarray, shape (ny, nx), electron
    variance : ndarray, shape (ny, nx), electron^2
    mask : ndarray of uint8, shape (ny, nx)
    center_row : int, optional
        Default: the middle row ``ny // 2``.
    half_width_rows : int
        Half width of the band in rows.

    Returns
    -------
    ArcSpectrum
    """
    data = as_2d(data, "data")
    variance = as_2d(variance, "variance")
    mask = as_2d(mask, "mask")
    if variance.shape != data.shape or mask.shape != data.shape:
        raise ValueError(f"`variance` {variance.shape} and `mask` {mask.shape} must have the "
                         f"shape of `data` {data.shape}")
    ny = data.shape[0]
    center = ny // 2 if center_row is None else int(center_row)
    if not 0 <= center < ny:
        raise ValueError(f"`center_row` must be in 0..{ny - 1}, got {center_row!r}")
    if int(half_width_rows) < 0:
        raise ValueError(f"`half_width_rows` must be >= 0, got {half_width_rows!r}")
    lo, hi = max(0, center - int(half_width_rows)), min(ny - 1, center + int(half_width_rows))
    flux, var, msk = sum_rows(data[lo:hi + 1], variance[lo:hi + 1], mask[lo:hi + 1])
    return ArcSpectrum(flux, var, msk, (lo, hi))


def sum_rows(data, variance, mask):
    """Sum over the rows (axis -2) with masked pixels replaced by the good-row mean.

    Parameters
    ----------
    data, variance : ndarray, shape (..., n_rows, nx)
    mask : ndarray of uint8, shape (..., n_rows, nx)

    Returns
    -------
    flux, variance : ndarray, shape (..., nx)
        ``variance`` is inf where no row is good.
    mask : ndarray of uint8, shape (..., nx)
        SATURATED where any row is saturated; all the bits where no row is good.
    """
    data = np.asarray(data, dtype=float)
    variance = np.asarray(variance, dtype=float)
    good = (mask == 0) & np.isfinite(data) & np.isfinite(variance)
    n_rows = data.shape[-2]
    n_good = good.sum(axis=-2)
    scale = np.where(n_good > 0, n_rows / np.maximum(n_good, 1), 0.0)
    flux = np.where(good, data, 0.0).sum(axis=-2) * scale
    var = np.where(good, variance, 0.0).sum(axis=-2) * scale ** 2
    sat = np.bitwise_or.reduce(mask & np.uint8(maskbits.MaskBit.SATURATED), axis=-2)
    all_bits = np.bitwise_or.reduce(mask, axis=-2)
    out_mask = np.where(n_good == 0, all_bits | np.uint8(maskbits.MaskBit.NONFINITE
                                                         if not np.any(all_bits) else 0), sat)
    var = np.where(n_good == 0, np.inf, var)
    return flux, var, out_mask.astype(maskbits.MASK_DTYPE)


def continuum_level(flux, *, window_px=61, percentile=10.0, good=None, variance=None,
                    line_sigma=3.0, iterations=3):
    """Smooth continuum plus scattered light under an emission-line spectrum.

    A running ``percentile`` over ``window_px`` pixels gives a first floor
    between the lines. Then, ``iterations`` times, pixels more than
    ``line_sigma`` noise above the current level (and their neighbours) are
    treated as line light, and the level is the running median of the remaining
    pixels (unbiased for symmetric noise, unlike a low percentile), smoothed by a
    running mean over the same window.

    Parameters
    ----------
    flux : ndarray, shape (nx,), electron
    window_px : int
        Window length (pixels); wider than a few line widths.
    percentile : float
        Running percentile (0-100) of the first estimate.
    good : ndarray of bool, shape (nx,), optional
        Pixels to use; others are filled by interpolation first.
    variance : ndarray, shape (nx,), electron^2, optional
        Pixel variance; default: estimated from the spread below the level.
    line_sigma : float
    iterations : int

    Returns
    -------
    ndarray, shape (nx,), electron
    """
    flux = as_1d_float(flux, "flux")
    window = int(window_px)
    if window < 3:
        raise ValueError(f"`window_px` must be >= 3, got {window_px!r}")
    if not 0 <= percentile <= 100:
        raise ValueError(f"`percentile` must be in 0..100, got {percentile!r}")
    idx = np.arange(flux.size)
    use = np.ones(flux.size, bool) if good is None else np.asarray(good, dtype=bool).copy()
    if not use.any():
        return np.zeros(flux.size)

    def filled(keep):
        values = flux.copy()
        if not keep.all():
            values[~keep] = np.interp(idx[~keep], idx[keep], flux[keep])
        return values

    level = ndimage.uniform_filter1d(
        ndimage.percentile_filter(filled(use), percentile, size=window, mode="nearest"),
        window, mode="nearest")
    for _ in range(int(iterations)):
        resid = flux - level
        if variance is not None:
            noise = np.sqrt(np.where(np.isfinite(variance) & (variance > 0), variance, np.inf))
        else:
            below = resid[use & (resid <= 0)]
            noise = np.full(flux.size, 1.4826 * np.median(np.abs(below)) if below.size else 1.0)
        line = ndimage.binary_dilation(resid > line_sigma * noise, iterations=2)
        keep = use & ~line
        if keep.sum() < 3:
            break
        level = ndimage.uniform_filter1d(
            ndimage.median_filter(filled(keep), size=window, mode="nearest"), window, mode="nearest")
    return level


# --------------------------------------------------------------------------------------
# Gaussian fits (vectorised)
# --------------------------------------------------------------------------------------

def _integrated_gaussian(x, mu, sigma):
    """Fraction of a unit Gaussian in pixels ``x - 0.5 .. x + 0.5`` and its derivatives."""
    up = (x + 0.5 - mu) / sigma
    lo = (x - 0.5 - mu) / sigma
    frac = special.ndtr(up) - special.ndtr(lo)
    g_up = np.exp(-0.5 * up * up) / _SQRT_2PI
    g_lo = np.exp(-0.5 * lo * lo) / _SQRT_2PI
    d_mu = -(g_up - g_lo) / sigma
    d_sigma = -(up * g_up - lo * g_lo) / sigma
    return frac, d_mu, d_sigma


def _gauss_model(x, c, par):
    """Model ``F P(x; mu, sigma) + b0 + b1 (x - c)`` of each window and its Jacobian.

    ``x`` (n, k), ``c`` (n,), ``par`` (n, 5) -> model (n, k), jacobian (n, k, 5).
    """
    frac, d_mu, d_sigma = _integrated_gaussian(x, par[:, 1:2], par[:, 2:3])
    t = x - c[:, None]
    model = par[:, 0:1] * frac + par[:, 3:4] + par[:, 4:5] * t
    jac = np.stack([frac, par[:, 0:1] * d_mu, par[:, 0:1] * d_sigma, np.ones_like(x), t], axis=-1)
    return model, jac


def fit_gaussian_windows(x, y, weight, p0, *, max_iter=40, min_sigma_px=0.3):
    """Weighted least-squares fits of pixel-integrated Gaussians, many windows at once.

    Model in each window: ``F * P(x; mu, sigma) + b0 + b1 * (x - c)`` where
    ``P`` is the Gaussian integrated over the pixel and ``c`` the initial centre.

    Parameters
    ----------
    x : ndarray, shape (n, k), px
        Pixel centres of each window.
    y : ndarray, shape (n, k)
        Data (electron).
    weight : ndarray, shape (n, k), 1/electron^2
        Inverse variance; 0 for pixels to ignore.
    p0 : ndarray, shape (n, 5)
        Initial ``[F, mu, sigma, b0, b1]``.
    max_iter : int
    min_sigma_px : float
        Lower bound on sigma during the iterations.

    Returns
    -------
    params : ndarray, shape (n, 5)
    cov : ndarray, shape (n, 5, 5)
        Covariance from the inverse normal matrix (not rescaled by chi^2).
    chi2 : ndarray, shape (n,)
    dof : ndarray of int, shape (n,)
    converged : ndarray of bool, shape (n,)

    Notes
    -----
    Levenberg-Marquardt with one damping factor per window; a window stops
    when its centre moves by less than 1e-6 px and chi^2 by less than 1e-8
    relative; windows stopped by the damping or iteration limit count as converged
    when their last accepted centre step was below 1e-3 px.
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    w = np.asarray(weight, dtype=float)
    p = np.array(p0, dtype=float, copy=True)
    n = p.shape[0]
    c = p[:, 1].copy()

    model, jac = _gauss_model(x, c, p)
    chi2 = np.sum(w * (y - model) ** 2, axis=1)
    lam = np.full(n, 1e-3)
    active = np.ones(n, dtype=bool)
    converged = np.zeros(n, dtype=bool)
    last_step = np.full(n, np.inf)
    eye = np.eye(5)
    for _ in range(max_iter):
        if not active.any():
            break
        idx = np.flatnonzero(active)
        J, W = jac[idx], w[idx]
        A = np.einsum("nki,nk,nkj->nij", J, W, J)
        g = np.einsum("nki,nk,nk->ni", J, W, y[idx] - model[idx])
        diag = np.einsum("nii->ni", A)
        damp = A + (lam[idx, None] * np.maximum(diag, 1e-12))[:, :, None] * eye
        try:
            step = np.linalg.solve(damp, g[..., None])[..., 0]
        except np.linalg.LinAlgError:
            step = np.stack([np.linalg.lstsq(m, v, rcond=None)[0] for m, v in zip(damp, g)])
        trial = p[idx] + step
        trial[:, 2] = np.maximum(trial[:, 2], min_sigma_px)
        trial_model, trial_jac = _gauss_model(x[idx], c[idx], trial)
        trial_chi2 = np.sum(W * (y[idx] - trial_model) ** 2, axis=1)
        better = trial_chi2 <= chi2[idx]
        acc = idx[better]
        rel = np.abs(chi2[idx] - trial_chi2) / np.maximum(chi2[idx], 1e-30)
        small = (np.abs(step[:, 1]) < 1e-6) & (rel < 1e-8)
        p[acc], model[acc], jac[acc] = trial[better], trial_model[better], trial_jac[better]
        chi2[acc] = trial_chi2[better]
        last_step[acc] = np.abs(step[better, 1])
        lam[acc] = np.maximum(lam[acc] / 10, 1e-9)
        lam[idx[~better]] *= 10
        converged[idx[better & small]] = True
        active[idx[(better & small) | (lam[idx] > 1e8)]] = False
    A = np.einsum("nki,nk,nkj->nij", jac, w, jac)
    cov = np.full((n, 5, 5), np.nan)
    ok = np.isfinite(A).all(axis=(1, 2))
    if ok.any():
        with np.errstate(all="ignore"):
            det_ok = np.abs(np.linalg.det(A[ok])) > 0
        sel = np.flatnonzero(ok)[det_ok]
        if sel.size:
            cov[sel] = np.linalg.inv(A[sel])
    dof = np.sum(w > 0, axis=1) - 5
    # windows that stopped without a decisive step (damping exhausted, or the iteration
    # limit) are accepted when their last accepted centre step was negligible
    converged |= last_step < 1e-3
    return p, cov, chi2, dof, converged


def _windows(nx, centres, half_width):
    """Column indices (clipped) of windows around ``centres`` and which lie inside."""
    offsets = np.arange(-half_width, half_width + 1)
    start = np.rint(centres).astype(int)
    cols = start[:, None] + offsets[None, :]
    inside = (cols >= 0) & (cols < nx)
    cols_c = np.clip(cols, 0, nx - 1)
    return cols_c, inside


def _neighbour_model(cols, x_px, flux_e, sigma_px, self_index, *, chunk=256):
    """Model flux of all fitted lines except each window's own, shape of ``cols``."""
    total = np.zeros(cols.shape)
    if x_px.size == 0:
        return total
    xc = cols.astype(float)
    for lo in range(0, x_px.size, chunk):
        sl = slice(lo, lo + chunk)
        frac, _, _ = _integrated_gaussian(xc[:, None, :], x_px[None, sl, None],
                                          sigma_px[None, sl, None])
        contrib = flux_e[None, sl, None] * frac
        own = self_index - lo
        rows = np.flatnonzero((own >= 0) & (own < contrib.shape[1]))
        contrib[rows, own[rows], :] = 0.0
        total += contrib.sum(axis=1)
    return total


def measure_lines(flux, variance, x_guess_px, *, sigma_guess_px, mask=None, background=None,
                  half_width_px=None, others_model=None, max_shift_px=None):
    """Fit a pixel-integrated Gaussian at each guessed position of one spectrum.

    Parameters
    ----------
    flux : ndarray, shape (nx,), electron
    variance : ndarray, shape (nx,), electron^2
    x_guess_px : ndarray, shape (n,), px
    sigma_guess_px : float or ndarray, px
    mask : ndarray of uint8, shape (nx,), optional
        Nonzero pixels get zero weight.
    background : ndarray, shape (nx,), optional
        Subtracted before the fit (e.g. :func:`continuum_level`).
    half_width_px : int, optional
        Window half width; default ``ceil(2.5 sigma) + 1``.
    others_model : callable, optional
        ``others_model(cols, i)`` -> model flux of the other lines in window ``i``
        (used for deblending).
    max_shift_px : float, optional
        Fits whose centre ends farther than this from the guess fail.

    Returns
    -------
    dict of ndarray, shape (n,)
        ``x_px, x_err_px, flux_e, flux_err_e, sigma_px, sigma_err_px, peak_e,
        background_e, chi2_reduced, ok, edge, saturated, masked``.
    """
    flux = as_1d_float(flux, "flux")
    variance = as_1d_float(variance, "variance", size=flux.size)
    x_guess = np.atleast_1d(np.asarray(x_guess_px, dtype=float))
    n = x_guess.size
    sigma0 = np.broadcast_to(np.asarray(sigma_guess_px, dtype=float), (n,)).copy()
    msk = np.zeros(flux.size, dtype=maskbits.MASK_DTYPE) if mask is None else np.asarray(mask)
    hw = int(half_width_px) if half_width_px is not None else int(math.ceil(2.5 * np.median(sigma0)) + 1)
    hw = max(hw, 3)
    values = flux - (0.0 if background is None else np.asarray(background, dtype=float))
    with np.errstate(divide="ignore"):
        weight_all = np.where((msk == 0) & np.isfinite(variance) & (variance > 0),
                              1.0 / variance, 0.0)
    cols, inside = _windows(values.size, x_guess, hw)
    y = values[cols]
    if others_model is not None:
        y = y - others_model(cols)
    w = np.where(inside, weight_all[cols], 0.0)
    x = cols.astype(float)
    edge_vals = np.concatenate([y[:, :2], y[:, -2:]], axis=1)
    base = np.median(edge_vals, axis=1)
    amp = np.sum(np.where(inside, y - base[:, None], 0.0), axis=1)
    amp = np.where(amp > 0, amp, np.abs(amp) + 1.0)
    p0 = np.column_stack([amp, x_guess, sigma0, base, np.zeros(n)])
    if n == 0:
        empty = np.zeros(0)
        return {k: empty for k in ("x_px", "x_err_px", "flux_e", "flux_err_e", "sigma_px",
                                   "sigma_err_px", "peak_e", "background_e", "chi2_reduced")} | {
            k: np.zeros(0, bool) for k in ("ok", "edge", "saturated", "masked")}
    p, cov, chi2, dof, conv = fit_gaussian_windows(x, y, w, p0)
    with np.errstate(invalid="ignore"):
        errs = np.sqrt(np.einsum("nii->ni", cov))
    shift_limit = hw if max_shift_px is None else float(max_shift_px)
    ok = (conv & np.isfinite(errs).all(axis=1) & (p[:, 0] > 0)
          & (np.abs(p[:, 1] - x_guess) <= shift_limit) & (p[:, 2] > 0.35) & (p[:, 2] < 3 * hw)
          & (dof > 0))
    sat_bit = np.uint8(maskbits.MaskBit.SATURATED)
    win_mask = np.where(inside, msk[cols], 0)
    saturated = np.any(win_mask & sat_bit, axis=1)
    masked = np.any(win_mask & ~sat_bit, axis=1)
    frac, _, _ = _integrated_gaussian(x, p[:, 1:2], np.maximum(p[:, 2:3], 1e-3))
    peak = p[:, 0] * frac.max(axis=1)
    return {
        "x_px": p[:, 1], "x_err_px": errs[:, 1], "flux_e": p[:, 0], "flux_err_e": errs[:, 0],
        "sigma_px": p[:, 2], "sigma_err_px": errs[:, 2], "peak_e": peak, "background_e": p[:, 3],
        "chi2_reduced": chi2 / np.maximum(dof, 1), "ok": ok, "edge": ~inside.all(axis=1),
        "saturated": saturated, "masked": masked,
    }


# --------------------------------------------------------------------------------------
# line finding
# --------------------------------------------------------------------------------------

@dataclass(frozen=True)
class ArcLines:
    """Lines detected and measured in one arc spectrum (sorted by ``x_px``).

    Attributes
    ----------
    x_px, x_err_px : ndarray, shape (n,), px
        Centroid and its 1-sigma uncertainty (from the fit covariance).
    flux_e, flux_err_e : ndarray, shape (n,), electron
        Integrated line flux and uncertainty.
    fwhm_px, fwhm_err_px : ndarray, shape (n,), px
        Gaussian FWHM and uncertainty.
    peak_e : ndarray, shape (n,), electron
        Peak pixel value of the fitted line (above background).
    snr : ndarray, shape (n,)
        Integrated flux over its uncertainty.
    chi2_reduced : ndarray, shape (n,)
    flags : ndarray of int, shape (n,)
        :class:`LineFlag` bits (0 = clean).
    info : dict
        ``n_peaks``, ``fwhm_guess_px``, ``detection_snr``, ``rows``, ...
    """

    x_px: np.ndarray
    x_err_px: np.ndarray
    flux_e: np.ndarray
    flux_err_e: np.ndarray
    fwhm_px: np.ndarray
    fwhm_err_px: np.ndarray
    peak_e: np.ndarray
    snr: np.ndarray
    chi2_reduced: np.ndarray
    flags: np.ndarray
    info: dict = field(default_factory=dict)

    def __len__(self):
        return len(self.x_px)

    @property
    def clean(self):
        """Boolean array: lines with no flag."""
        return self.flags == 0


def _nearest_gap(x):
    """Distance from each value to its nearest neighbour (inf for a single value)."""
    gap = np.full(x.size, np.inf)
    if x.size > 1:
        order = np.argsort(x)
        d = np.diff(x[order])
        gap[order] = np.minimum(np.r_[np.inf, d], np.r_[d, np.inf])
    return gap


def find_arc_lines(flux, variance, *, mask=None, detection_snr=10.0, min_separation_px=2.0,
                   continuum_window_px=61, continuum_percentile=10.0, fwhm_guess_px=None,
                   fit_half_width_fwhm=1.5, blend_separation_fwhm=2.0, broad_fwhm_ratio=1.15,
                   saturation_e=None, deblend_passes=4):
    """Detect emission lines above a signal-to-noise threshold and measure them.

    Parameters
    ----------
    flux : ndarray, shape (nx,), electron
        Arc spectrum (e.g. :func:`extract_band`).
    variance : ndarray, shape (nx,), electron^2
    mask : ndarray of uint8, shape (nx,), optional
    detection_snr : float
        Minimum peak height above the continuum in units of the pixel noise.
    min_separation_px : float
        Minimum distance between detected peaks.
    continuum_window_px : int
        Window of :func:`continuum_level`.
    continuum_percentile : float
    fwhm_guess_px : float, optional
        Starting FWHM; default: median half-maximum width of the detected peaks.
    fit_half_width_fwhm : float
        Half width of each fit window in units of the FWHM guess.
    blend_separation_fwhm : float
        Lines closer than this many FWHM to another detected line are flagged BLENDED.
    broad_fwhm_ratio : float
        Lines wider than this times the median FWHM are flagged BLENDED (an
        unresolved blend looks like one broad line).
    saturation_e : float, optional
        Lines whose peak pixel exceeds this (electron, in the band sum) are flagged
        SATURATED, in addition to pixels with the SATURATED mask bit.
    deblend_passes : int
        Extra passes in which the fitted neighbours are subtracted before refitting
        (each pass roughly halves the pull of a neighbour 2.5 FWHM away; after 4
        passes it is below 0.003 px).

    Returns
    -------
    ArcLines

    Examples
    --------
    >>> x = np.arange(200.0)
    >>> f = 10 + 5000 * np.exp(-0.5 * ((x - 80.3) / 1.2) ** 2)
    >>> lines = find_arc_lines(f, f.copy())
    >>> round(float(lines.x_px[0]), 1)
    80.3
    """
    flux = as_1d_float(flux, "flux")
    variance = as_1d_float(variance, "variance", size=flux.size)
    if mask is None:
        mask = np.zeros(flux.size, dtype=maskbits.MASK_DTYPE)
    mask = np.asarray(mask)
    if mask.shape != flux.shape:
        raise ValueError(f"`mask` must have the shape of `flux` {flux.shape}, got {mask.shape}")
    if detection_snr <= 0:
        raise ValueError(f"`detection_snr` must be > 0, got {detection_snr!r}")
    unusable = (mask != 0) & ((mask & np.uint8(maskbits.MaskBit.SATURATED)) == 0)
    unusable |= ~np.isfinite(flux) | ~np.isfinite(variance)
    cont = continuum_level(np.where(np.isfinite(flux), flux, 0.0), window_px=continuum_window_px,
                           percentile=continuum_percentile, good=~unusable, variance=variance)
    resid = np.where(unusable, 0.0, flux - cont)
    sigma = np.sqrt(np.where(np.isfinite(variance) & (variance > 0), variance, np.inf))
    snr_pix = resid / sigma
    peaks, _ = signal.find_peaks(np.where(np.isfinite(snr_pix), resid, 0.0),
                                 distance=max(1.0, float(min_separation_px)))
    peaks = peaks[snr_pix[peaks] >= detection_snr]
    info = {"n_peaks": int(peaks.size), "detection_snr": float(detection_snr),
            "continuum_window_px": int(continuum_window_px),
            "continuum_median_e": float(np.median(cont))}
    if peaks.size == 0:
        empty = np.zeros(0)
        return ArcLines(empty, empty, empty, empty, empty, empty, empty, empty, empty,
                        np.zeros(0, int), info | {"fwhm_guess_px": math.nan})
    if fwhm_guess_px is None:
        widths = signal.peak_widths(resid, peaks, rel_height=0.5)[0]
        fwhm_guess = float(np.median(widths))
    else:
        fwhm_guess = float(fwhm_guess_px)
    fwhm_guess = max(fwhm_guess, 1.0)
    sigma_guess = fwhm_guess / _FWHM_PER_SIGMA
    hw = max(3, int(math.ceil(fit_half_width_fwhm * fwhm_guess)))
    # sub-pixel starting centres from a 3-point parabola
    left = resid[np.clip(peaks - 1, 0, flux.size - 1)]
    right = resid[np.clip(peaks + 1, 0, flux.size - 1)]
    centre = resid[peaks]
    denom = left - 2 * centre + right
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.where(denom < 0, 0.5 * (left - right) / denom, 0.0)
    x0 = peaks + np.clip(frac, -0.5, 0.5)
    fit = measure_lines(flux, variance, x0, sigma_guess_px=sigma_guess, mask=mask,
                        background=cont, half_width_px=hw)
    for _ in range(int(deblend_passes)):
        good = np.flatnonzero(fit["ok"])
        self_index = np.full(x0.size, -1)
        self_index[good] = np.arange(good.size)
        params = (fit["x_px"][good], fit["flux_e"][good], fit["sigma_px"][good])
        fit = measure_lines(flux, variance, np.where(fit["ok"], fit["x_px"], x0),
                            sigma_guess_px=np.where(fit["ok"], fit["sigma_px"], sigma_guess),
                            mask=mask, background=cont, half_width_px=hw,
                            others_model=lambda cols, params=params, self_index=self_index:
                            _neighbour_model(cols, *params, self_index))
    # a failed fit reports the detected peak, not wherever the fit wandered
    x = np.where(fit["ok"], fit["x_px"], x0)
    flags = np.zeros(x.size, dtype=int)
    flags[fit["saturated"]] |= LineFlag.SATURATED
    if saturation_e is not None:
        flags[flux[np.clip(np.rint(x).astype(int), 0, flux.size - 1)] >= saturation_e] |= \
            LineFlag.SATURATED
    flags[fit["masked"]] |= LineFlag.MASKED
    flags[fit["edge"]] |= LineFlag.EDGE
    flags[~fit["ok"]] |= LineFlag.FIT_FAILED
    fwhm = fit["sigma_px"] * _FWHM_PER_SIGMA
    order = np.argsort(x)
    # distance to the nearest other line, from the fitted centres and from the peaks
    gap = np.minimum(_nearest_gap(x), _nearest_gap(x0))
    ref_fwhm = np.nanmedian(np.where(fit["ok"], fwhm, np.nan)) if fit["ok"].any() else fwhm_guess
    flags[gap < blend_separation_fwhm * ref_fwhm] |= LineFlag.BLENDED
    flags[fit["ok"] & (fwhm > broad_fwhm_ratio * ref_fwhm)] |= LineFlag.BLENDED
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = fit["flux_e"] / fit["flux_err_e"]
    info.update(fwhm_guess_px=fwhm_guess, fwhm_median_px=float(ref_fwhm),
                fit_half_width_px=hw, n_flagged=int(np.count_nonzero(flags)))
    res = ArcLines(x[order], fit["x_err_px"][order], fit["flux_e"][order], fit["flux_err_e"][order],
                   fwhm[order], (fit["sigma_err_px"] * _FWHM_PER_SIGMA)[order],
                   fit["peak_e"][order], snr[order], fit["chi2_reduced"][order], flags[order], info)
    return res


# --------------------------------------------------------------------------------------
# line table
# --------------------------------------------------------------------------------------

def lines_table(lines, *, meta=None):
    """The measured lines as an astropy Table (one row per line, units attached).

    Parameters
    ----------
    lines : ArcLines
    meta : dict, optional
        Extra metadata (scalars) stored with the table.

    Returns
    -------
    astropy.table.Table
    """
    import astropy.units as u
    from astropy.table import Table

    table = Table()
    table["x_px"] = lines.x_px * u.pix
    table["x_err_px"] = lines.x_err_px * u.pix
    table["flux_e"] = lines.flux_e * u.electron
    table["flux_err_e"] = lines.flux_err_e * u.electron
    table["fwhm_px"] = lines.fwhm_px * u.pix
    table["fwhm_err_px"] = lines.fwhm_err_px * u.pix
    table["peak_e"] = lines.peak_e * u.electron
    table["snr"] = lines.snr
    table["chi2_reduced"] = lines.chi2_reduced
    table["flags"] = lines.flags.astype(np.int16)
    table["flag_names"] = [",".join(LineFlag.describe(f)) for f in lines.flags] if len(lines) else \
        np.zeros(0, dtype=str)
    for key, value in lines.info.items():
        table.meta[key] = value
    table.meta["flag_bits"] = ", ".join(f"{bit} {name}" for bit, name in LineFlag.NAMES.items())
    table.meta.update(meta or {})
    return table


def read_lines_table(path):
    """Read a line table written by :func:`find_arc_lines_file` back into :class:`ArcLines`.

    Raises
    ------
    InputFileError
        When the file cannot be read or lacks a column.
    """
    from astropy.table import Table

    try:
        table = Table.read(path, format="ascii.ecsv")
    except Exception as exc:  # astropy raises several types for bad files
        raise InputFileError(path, f"cannot be read as an ECSV line table ({exc})") from None
    cols = ("x_px", "x_err_px", "flux_e", "flux_err_e", "fwhm_px", "fwhm_err_px", "peak_e",
            "snr", "chi2_reduced", "flags")
    missing = [c for c in cols if c not in table.colnames]
    if missing:
        raise InputFileError(path, f"line table lacks column(s) {', '.join(missing)}; expected a "
                             "table written by pipeline.wavelength.steps.find_arc_lines_file")
    values = [np.asarray(table[c], dtype=float) for c in cols[:-1]]
    info = {k: v for k, v in table.meta.items()}
    return ArcLines(*values, np.asarray(table["flags"], dtype=int), info)
