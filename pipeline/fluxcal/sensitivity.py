"""The sensitivity: measured pixel by pixel on standard stars, and fitted.

The sensitivity ``S(lambda)`` converts the count rate density of a source above
the atmosphere into its flux density:

.. math::

    S(\\lambda) = \\frac{C(\\lambda) / (t\\,\\Delta\\lambda)}
                      {F_\\lambda(\\lambda)\\;10^{-0.4\\,k(\\lambda) X}}
    \\quad [\\mathrm{e^-\\,cm^2\\,erg^{-1}}]

with ``C`` the extracted electrons of one spectral pixel, ``t`` the exposure
time, ``Delta lambda`` the pixel's width in Angstrom, ``F_lambda`` the
standard's tabulated flux (erg/s/cm2/A) averaged over the pixel, ``k`` the
site extinction (mag/airmass) and ``X`` the airmass. It is fitted, in
magnitudes (``sensitivity_mag = 2.5 log10 S``), by a smooth function with
iterative rejection, with the star's absorption lines and telluric bands left
out (:func:`fit_sensitivity`).
"""

import math
from dataclasses import dataclass, field

import numpy as np

from pipeline.core.checks import as_1d_float, positive, same_shape
from pipeline.core.errors import FluxCalibrationError
from pipeline.fluxcal.extinction import as_airmass, extinction_at, transmission
from pipeline.fluxcal.pixels import MAG_PER_REL, as_mask, exclusion_mask, pixel_edges
from pipeline.fluxcal.standards import table_flux_in_pixels

__all__ = ["SensitivityPoints", "measure_sensitivity", "SensitivityFit", "fit_with_rejection",
           "fit_sensitivity"]


@dataclass(frozen=True)
class SensitivityPoints:
    """Sensitivity measured pixel by pixel on one standard-star spectrum.

    Parameters
    ----------
    wave_angstrom : ndarray, shape (n,), Angstrom
    sens_mag : ndarray, shape (n,), mag
        ``2.5 log10 S`` with S in e- cm2 / erg (NaN where not measurable).
    sens_mag_err : ndarray, shape (n,), mag
        Photon/read noise of the counts, with the error floor added in quadrature.
    usable : ndarray of bool, shape (n,)
        Finite, positive counts, mask 0 and covered by the flux table.
    excluded : ndarray of bool, shape (n,)
        Inside an excluded region (absorption line, telluric band).
    info : dict
        ``frame``, ``object``, ``airmass``, ``exptime_s``, ``table`` ...
    """

    wave_angstrom: np.ndarray
    sens_mag: np.ndarray
    sens_mag_err: np.ndarray
    usable: np.ndarray
    excluded: np.ndarray
    info: dict = field(default_factory=dict)

    @property
    def for_fit(self):
        """Pixels that enter the fit (usable and not excluded)."""
        return self.usable & ~self.excluded


def measure_sensitivity(wave_angstrom, counts_e, variance_e2, mask=None, *, exptime_s, airmass,
                        flux_table, extinction=None, exclude_regions=(),
                        error_floor_mag=0.002, slit_fraction=None, info=None):
    """Sensitivity of every pixel of a standard-star spectrum.

    Parameters
    ----------
    wave_angstrom : array_like, shape (n,), Angstrom
        Pixel centres (air), strictly increasing.
    counts_e : array_like, shape (n,), electron
        Extracted electrons per spectral pixel in the exposure.
    variance_e2 : array_like, shape (n,), electron^2
    mask : array_like of uint8 or bool, shape (n,), optional
        Bit mask; only pixels with mask 0 are used.
    exptime_s : float, seconds
    airmass : float
    flux_table : FluxTable
        The star's tabulated flux, integrated over each pixel.
    extinction : ExtinctionCurve or None
        Site curve; None applies no extinction correction.
    exclude_regions : sequence of [min, max], Angstrom
        Wavelength ranges left out of the fit (lines, telluric bands).
    error_floor_mag : float, mag
        Added in quadrature to the noise of each point, so that the highest
        signal-to-noise pixels do not dominate a fit whose limit is the flux
        table's accuracy (common practice; default 0.2 %).
    slit_fraction : array_like, shape (n,), optional
        Fraction of the star's light that entered the slit (see
        :mod:`pipeline.fluxcal.slitloss`). Given, the sensitivity refers to light
        entering the slit; None (default), it includes the standard's slit loss.

    Returns
    -------
    SensitivityPoints

    Examples
    --------
    >>> from pipeline.fluxcal.standards import FluxTable
    >>> t = FluxTable([4000.0, 6000.0], [1e-13, 1e-13])
    >>> w = np.linspace(4100.0, 5900.0, 10)
    >>> p = measure_sensitivity(w, np.full(10, 2e5), np.full(10, 2e5), exptime_s=1.0,
    ...                         airmass=1.0, flux_table=t)
    >>> round(float(p.sens_mag[3]), 3)
    40.0
    """
    wave = as_1d_float(wave_angstrom, "wave_angstrom")
    counts = as_1d_float(counts_e, "counts_e")
    var = as_1d_float(variance_e2, "variance_e2")
    same_shape([wave, counts, var], ["wave_angstrom", "counts_e", "variance_e2"])
    mask = as_mask(mask, wave)
    exptime_s = positive(exptime_s, "exptime_s")
    airmass = as_airmass(airmass)
    edges = pixel_edges(wave)
    dwave = np.diff(edges)
    table_flux = table_flux_in_pixels(flux_table, edges)
    k = (np.zeros_like(wave) if extinction is None
         else extinction_at(extinction, wave, outside="hold"))
    trans = transmission(k, airmass)
    with np.errstate(invalid="ignore", divide="ignore"):
        rate = counts / (exptime_s * dwave)
        if slit_fraction is not None:
            slit_fraction = np.asarray(slit_fraction, dtype=float)
            same_shape([wave, slit_fraction], ["wave_angstrom", "slit_fraction"])
            trans = trans * slit_fraction
        sens = rate / (table_flux * trans)
        usable = (np.isfinite(sens) & (sens > 0) & (mask == 0) & np.isfinite(var) & (var > 0)
                  & np.isfinite(table_flux))
        sens_mag = np.where(usable, 2.5 * np.log10(np.where(usable, sens, 1.0)), np.nan)
        rel = np.sqrt(np.where(usable, var, np.nan)) / np.where(usable, counts, np.nan)
    sens_err = np.hypot(MAG_PER_REL * rel, float(error_floor_mag))
    excluded = exclusion_mask(wave, exclude_regions)
    details = dict(info or {})
    details.update(airmass=airmass, exptime_s=exptime_s, table=flux_table.source,
                   table_name=flux_table.name,
                   extinction=(extinction.source if extinction is not None else "none"),
                   n_pixels=int(wave.size), n_usable=int(usable.sum()),
                   n_excluded=int((usable & excluded).sum()))
    return SensitivityPoints(wave, sens_mag, sens_err, usable, excluded, details)


@dataclass(frozen=True)
class SensitivityFit:
    """A smooth sensitivity curve in magnitudes, ``sensitivity_mag = 2.5 log10 S``.

    Parameters
    ----------
    kind : {'spline', 'chebyshev'}
    degree : int
        Spline degree, or Chebyshev order (highest power).
    coeffs : ndarray, shape (m,), mag
    covariance : ndarray, shape (m, m), mag^2
        Covariance of ``coeffs`` (scaled by the reduced chi-square of the fit
        when that exceeds 1).
    knots : ndarray, Angstrom
        Full knot vector (spline) or the domain ``[min, max]`` (Chebyshev).
    wave_min, wave_max : float, Angstrom
        Range of the fitted points.
    max_extrapolation_angstrom : float, Angstrom
        How far beyond the fitted range the curve is extended (linearly in
        magnitudes, from the end's value and slope); NaN further out.
    info : dict
        ``n_used``, ``n_rejected``, ``n_iter``, ``rms_percent``,
        ``rms_binned_percent``, ``chi2_reduced``, ``rejected`` (bool array over
        the fitted points, in the order given) ...
    """

    kind: str
    degree: int
    coeffs: np.ndarray
    covariance: np.ndarray
    knots: np.ndarray
    wave_min: float
    wave_max: float
    max_extrapolation_angstrom: float = 0.0
    info: dict = field(default_factory=dict)

    def design(self, wave_angstrom):
        """Design matrix, shape (n, m), of wavelengths inside :meth:`inside`.

        Beyond the fitted range (up to ``max_extrapolation_angstrom``) the rows
        extrapolate the curve linearly from its value and slope at the end, so
        the error from the covariance grows with the distance.
        """
        wave = np.asarray(wave_angstrom, dtype=float)
        rows = _design_matrix(self.kind, np.clip(wave, self.wave_min, self.wave_max),
                              self.knots, self.degree)
        step = min(1.0, 0.01 * (self.wave_max - self.wave_min))
        for end, inward, beyond in ((self.wave_min, step, wave < self.wave_min),
                                    (self.wave_max, -step, wave > self.wave_max)):
            if np.any(beyond):
                at = _design_matrix(self.kind, np.array([end, end + inward]), self.knots,
                                    self.degree)
                slope = (at[1] - at[0]) / inward
                rows[beyond] = at[0] + (wave[beyond] - end)[:, None] * slope[None, :]
        return rows

    def inside(self, wave_angstrom):
        """True where the curve is defined: the fitted range plus the allowed extrapolation."""
        wave = np.asarray(wave_angstrom, dtype=float)
        reach = float(self.max_extrapolation_angstrom)
        return (wave >= self.wave_min - reach) & (wave <= self.wave_max + reach)

    def mag(self, wave_angstrom):
        """``2.5 log10 S`` at the given wavelengths; NaN outside :meth:`inside`."""
        wave = np.asarray(wave_angstrom, dtype=float)
        inside = self.inside(wave)
        out = np.full(wave.shape, np.nan)
        if np.any(inside):
            out[inside] = self.design(wave[inside]) @ self.coeffs
        return out

    def mag_error(self, wave_angstrom):
        """1-sigma error of :meth:`mag` from the coefficients' covariance (mag)."""
        wave = np.asarray(wave_angstrom, dtype=float)
        inside = self.inside(wave)
        out = np.full(wave.shape, np.nan)
        if np.any(inside):
            a = self.design(wave[inside])
            out[inside] = np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", a, self.covariance, a),
                                             0.0))
        return out

    def sensitivity(self, wave_angstrom):
        """S in e- cm2 / erg; NaN outside the fitted range."""
        return 10.0 ** (0.4 * self.mag(wave_angstrom))


def _design_matrix(kind, x, knots, degree):
    if kind == "spline":
        from scipy.interpolate import BSpline
        x = np.clip(x, knots[degree], knots[-degree - 1])
        return BSpline.design_matrix(x, knots, degree).toarray()
    if kind == "chebyshev":
        lo, hi = knots
        t = np.clip((2.0 * x - (lo + hi)) / (hi - lo), -1.0, 1.0)
        return np.polynomial.chebyshev.chebvander(t, degree)
    raise ValueError(f"unknown sensitivity fit kind {kind!r}; expected 'spline' or 'chebyshev'")


def _spline_knots(x, *, knot_spacing_angstrom, degree):
    """Knot vector: interior knots at quantiles of the data (so masked gaps never
    leave an empty knot interval), about one per ``knot_spacing_angstrom``."""
    lo, hi = float(x.min()), float(x.max())
    n_intervals = max(1, int(round((hi - lo) / knot_spacing_angstrom)))
    # every interval needs clearly more points than coefficients it carries
    n_intervals = min(n_intervals, max(1, x.size // (4 * (degree + 1))))
    interior = np.quantile(x, np.linspace(0, 1, n_intervals + 1)[1:-1]) if n_intervals > 1 else []
    return np.concatenate([[lo] * (degree + 1), interior, [hi] * (degree + 1)])


def _weighted_lstsq(a, y, sigma):
    w = 1.0 / sigma
    aw = a * w[:, None]
    coeffs, *_ = np.linalg.lstsq(aw, y * w, rcond=None)
    cov = np.linalg.pinv(aw.T @ aw)
    return coeffs, cov


def fit_with_rejection(design, y, sigma, *, clip, max_iterations=5):
    """Weighted linear least squares with iterative rejection.

    Parameters
    ----------
    design : ndarray, shape (n, m)
    y, sigma : ndarray, shape (n,)
    clip : callable
        Called on the normalised residuals ``(y - model) / sigma`` of the
        points in use; returns a masked array whose mask marks outliers
        (e.g. ``functools.partial(astropy.stats.sigma_clip, sigma=3)``).
    max_iterations : int
        Rejection rounds; stops early when the rejected set no longer changes.

    Returns
    -------
    coeffs : ndarray, shape (m,)
    covariance : ndarray, shape (m, m)
    rejected : ndarray of bool, shape (n,)
    n_iter : int
    """
    n, m = design.shape
    rejected = np.zeros(n, dtype=bool)
    n_iter = 0
    coeffs, cov = _weighted_lstsq(design, y, sigma)
    for n_iter in range(1, int(max_iterations) + 1):
        resid = (y - design @ coeffs) / sigma
        clipped = np.ma.getmaskarray(clip(resid))
        new_rejected = clipped.copy()
        if (~new_rejected).sum() <= m:
            break
        if np.array_equal(new_rejected, rejected):
            break
        rejected = new_rejected
        coeffs, cov = _weighted_lstsq(design[~rejected], y[~rejected], sigma[~rejected])
    return coeffs, cov, rejected, n_iter


def fit_sensitivity(points, *, kind="spline", knot_spacing_angstrom=250.0, degree=3,
                    clip_sigma=3.0, max_iterations=5, bin_width_angstrom=100.0,
                    max_extrapolation_angstrom=150.0):
    """Fit one smooth sensitivity curve to the points of one or more standards.

    Parameters
    ----------
    points : SensitivityPoints or sequence of SensitivityPoints
        Measured points (all of one setup); only ``for_fit`` points enter.
    kind : {'spline', 'chebyshev'}
        Cubic (or ``degree``) B-spline with about one knot per
        ``knot_spacing_angstrom``, or a Chebyshev series of order ``degree``.
    knot_spacing_angstrom : float, Angstrom
        Spacing of the spline's interior knots (placed at quantiles of the
        fitted wavelengths, so excluded bands never leave an empty interval).
    degree : int
        Spline degree (1-5) or Chebyshev order (1-30).
    clip_sigma : float
        Points whose normalised residual deviates by more than this many
        (MAD-estimated) standard deviations from the median are rejected.
    max_iterations : int
        Rounds of rejection.
    bin_width_angstrom : float, Angstrom
        Bin width for the binned rms reported in ``info`` (systematic misfit,
        with the pixel noise averaged down).
    max_extrapolation_angstrom : float, Angstrom
        The curve is extended this far beyond the fitted points (e.g. when the
        end of the spectrum lies in an excluded absorption line).

    Returns
    -------
    SensitivityFit

    Raises
    ------
    FluxCalibrationError
        When fewer usable points are left than twice the number of
        coefficients.

    Notes
    -----
    Weighted linear least squares on the B-spline (or Chebyshev) design
    matrix, composed with :func:`astropy.stats.sigma_clip` on the normalised
    residuals. The covariance of the coefficients is ``(A^T W A)^-1`` times
    the reduced chi-square when that exceeds 1. Fitting magnitudes makes a
    grey offset between standards (slit losses, thin cloud) an additive
    constant and keeps the curve positive.
    """
    from functools import partial

    from astropy.stats import sigma_clip

    if isinstance(points, SensitivityPoints):
        points = [points]
    points = list(points)
    if not points:
        raise FluxCalibrationError("no standard-star spectrum to fit a sensitivity to")
    if kind not in ("spline", "chebyshev"):
        raise ValueError(f"`kind` must be 'spline' or 'chebyshev', got {kind!r}")
    degree = int(degree)
    if kind == "spline" and not 1 <= degree <= 5:
        raise ValueError(f"`degree` of a spline must be 1-5, got {degree}")
    if kind == "chebyshev" and not 1 <= degree <= 30:
        raise ValueError(f"`degree` (order) of a Chebyshev series must be 1-30, got {degree}")
    knot_spacing_angstrom = positive(knot_spacing_angstrom, "knot_spacing_angstrom")
    clip_sigma = positive(clip_sigma, "clip_sigma")

    sel = [p.for_fit for p in points]
    x = np.concatenate([p.wave_angstrom[s] for p, s in zip(points, sel)])
    y = np.concatenate([p.sens_mag[s] for p, s in zip(points, sel)])
    sig = np.concatenate([p.sens_mag_err[s] for p, s in zip(points, sel)])
    source = np.concatenate([np.full(int(s.sum()), i) for i, s in enumerate(sel)])
    order = np.argsort(x, kind="stable")
    x, y, sig, source = x[order], y[order], sig[order], source[order]
    n_coeff_min = degree + 1
    if x.size < 2 * n_coeff_min:
        raise FluxCalibrationError(
            f"only {x.size} usable standard-star pixels outside the excluded regions; need at "
            f"least {2 * n_coeff_min} for a {kind} of degree {degree}")
    if kind == "spline":
        knots = _spline_knots(x, knot_spacing_angstrom=knot_spacing_angstrom, degree=degree)
    else:
        knots = np.array([x.min(), x.max()])
    design = _design_matrix(kind, x, knots, degree)
    clip = partial(sigma_clip, sigma=clip_sigma, maxiters=1, cenfunc="median",
                   stdfunc="mad_std")
    coeffs, cov, rejected, n_iter = fit_with_rejection(design, y, sig, clip=clip,
                                                       max_iterations=max_iterations)
    model = design @ coeffs
    used = ~rejected
    dof = max(1, int(used.sum()) - coeffs.size)
    chi2_red = float(np.sum(((y - model)[used] / sig[used]) ** 2) / dof)
    cov = cov * max(1.0, chi2_red)
    ratio = 10.0 ** (0.4 * (y - model)) - 1.0
    rms_percent = float(100.0 * np.sqrt(np.mean(ratio[used] ** 2)))
    rms_binned = _binned_rms_percent(x[used], ratio[used], bin_width_angstrom)
    per_standard = []
    for i, p in enumerate(points):
        s = used & (source == i)
        per_standard.append(dict(
            frame=p.info.get("frame", ""), n_used=int(s.sum()),
            n_rejected=int((rejected & (source == i)).sum()),
            rms_percent=float(100.0 * np.sqrt(np.mean(ratio[s] ** 2))) if s.any() else math.nan,
            offset_percent=float(100.0 * np.median(ratio[s])) if s.any() else math.nan))
    # rejection flags back on the pixels of each SensitivityPoints given
    rejected_input_order = np.empty_like(rejected)
    rejected_input_order[order] = rejected
    splits = np.cumsum([int(s.sum()) for s in sel])[:-1]
    rejected_per_points = []
    for p, s, flags_sel in zip(points, sel, np.split(rejected_input_order, splits)):
        flags = np.zeros(p.wave_angstrom.shape, dtype=bool)
        flags[s] = flags_sel
        rejected_per_points.append(flags)
    info = dict(n_points=int(x.size), n_used=int(used.sum()), n_rejected=int(rejected.sum()),
                n_iter=n_iter, n_coeffs=int(coeffs.size), chi2_reduced=chi2_red,
                rms_percent=rms_percent, rms_binned_percent=rms_binned,
                bin_width_angstrom=float(bin_width_angstrom), clip_sigma=clip_sigma,
                knot_spacing_angstrom=knot_spacing_angstrom, per_standard=per_standard,
                rejected=rejected_per_points)
    return SensitivityFit(kind, degree, coeffs, cov, knots, float(x.min()), float(x.max()),
                          float(max_extrapolation_angstrom), info)


def _binned_rms_percent(x, ratio, width):
    if x.size == 0:
        return math.nan
    edges = np.arange(x.min(), x.max() + width, width)
    idx = np.digitize(x, edges)
    means = [ratio[idx == i].mean() for i in np.unique(idx) if np.count_nonzero(idx == i) >= 5]
    return float(100.0 * np.sqrt(np.mean(np.square(means)))) if means else math.nan
