"""Flux calibration: the sensitivity from standard-star spectra, applied to science spectra.

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
out. A science spectrum is then calibrated as
``f_lambda = C / (t Delta lambda S 10^(-0.4 k X))``.

Layout of this module (house style): pure array functions
(:func:`pixel_edges`, :func:`table_flux_in_pixels`, :func:`measure_sensitivity`,
:func:`fit_sensitivity`, :func:`calibrate_spectrum`), small frozen result
classes, and two file adapters used by the workflow rules,
:func:`fit_sensitivity_file` and :func:`flux_calibrate_file`.

Products
--------
``flux/sensitivity_{setup}.fits``
    PRIMARY (no data): ``SETUP``, ``STATUS`` ('ok' or 'failed'), ``REASON``,
    the fit description (``SENSKIND``, ``SENSDEG``, ``WAVEMIN``, ``WAVEMAX``,
    ``RMSPCT``), the standards used (``STDnn``) and provenance.
    ``MODEL`` (image, float64): the fitted coefficients; header ``SENSKIND``,
    ``SENSDEG`` and, for splines, the knots in the ``KNOTS`` image, for
    Chebyshev series the domain (``DOMAIN0``, ``DOMAIN1``). ``COVAR`` (image,
    float64, n x n): covariance of the coefficients (mag^2). ``CURVE`` (HDU 1,
    table; empty for a failed fit): ``wavelength_angstrom``, ``sensitivity_mag``,
    ``sensitivity_mag_err``, ``sensitivity`` (e- cm2 / erg) on a grid. ``POINTS`` (table): every
    measured pixel with ``frame``, ``wavelength_angstrom``, ``sensitivity_mag``,
    ``sensitivity_mag_err``, ``used``, ``excluded``, ``rejected``.
    :func:`read_sensitivity` reads it back.
``spectra_fluxed/{frame}/<name>.fits``
    One per input spectrum, readable by ``specutils.Spectrum.read``: ``FLUX``
    (primary; erg/s/cm2/A, the input's spectral WCS and header keywords),
    ``VAR`` (variance from the counts' variance only, unless the header says
    ``SENSERR = 'included'``), ``MASK`` (uint8 bits, input mask kept),
    ``CALVAR`` (variance of the flux due to the sensitivity's fit error alone;
    correlated between pixels).
``spectra_fluxed/{frame}/fluxed_spectra.ecsv``
    Listing: ``object``, ``aperture``, ``input_file``, ``file``, ``status``
    ('calibrated' or 'uncalibrated'), ``reason``. When a setup has no usable
    sensitivity the listing names the extraction products, which stay the
    frame's (uncalibrated) spectra, with the reason.
"""

import logging
import math
import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from pipeline.core import maskbits
from pipeline.core.errors import (FluxCalibrationError, FluxCalibrationWarning, InputFileError,
                     PipelineError)
from pipeline.fluxcal.extinction import extinction_at, read_extinction_table, transmission
from pipeline.core.maskbits import MaskBit

__all__ = [
    "FluxTable", "SensitivityPoints", "SensitivityFit", "CalibratedSpectrum",
    "ExtractedSpectrum", "read_flux_table", "pixel_edges", "table_flux_in_pixels",
    "exclusion_mask", "gaussian_slit_fraction", "measure_sensitivity", "fit_with_rejection",
    "TelluricTemplate", "telluric_template",
    "fit_sensitivity", "calibrate_spectrum", "normalise_object_name", "read_spectrum",
    "read_spectra_directory", "spectrum_airmass", "write_sensitivity", "read_sensitivity",
    "write_fluxed_spectrum", "fit_sensitivity_file", "flux_calibrate_file", "FLUX_UNIT",
    "LISTING_NAME",
]

log = logging.getLogger(__name__)

#: FITS unit string of the calibrated flux density.
FLUX_UNIT = "erg / (s cm2 Angstrom)"
#: Name of the listing written in every spectra_fluxed/{frame}/ directory.
LISTING_NAME = "fluxed_spectra.ecsv"
#: 2.5 / ln(10): magnitudes per unit relative error.
_MAG_PER_REL = 2.5 / math.log(10.0)


# ----------------------------------------------------------------------------
# argument coercers
# ----------------------------------------------------------------------------

def _as_1d_float(value, name):
    arr = np.array(value, dtype=float)
    if arr.ndim != 1:
        raise ValueError(f"`{name}` must be 1-D, got shape {arr.shape}")
    return arr


def _same_shape(arr, ref, name, ref_name):
    if arr.shape != ref.shape:
        raise ValueError(f"`{name}` must have the shape of `{ref_name}` {ref.shape}, "
                         f"got {arr.shape}")
    return arr


def _positive(value, name):
    value = float(value)
    if not math.isfinite(value) or value <= 0:
        raise ValueError(f"`{name}` must be a finite number > 0, got {value!r}")
    return value


def _as_mask(mask, ref, name="mask"):
    if mask is None:
        return maskbits.empty_mask(ref.shape)
    arr = np.asarray(mask)
    if arr.dtype == bool:
        arr = np.where(arr, MaskBit.BAD_PIXEL, 0)
    arr = arr.astype(maskbits.MASK_DTYPE)
    return _same_shape(arr, ref, name, "wave_angstrom")


def _regions(regions, name="exclude_regions"):
    out = []
    for item in regions or ():
        if isinstance(item, dict):
            lo, hi = item.get("min_angstrom"), item.get("max_angstrom")
        else:
            lo, hi = item[0], item[1]
        lo, hi = float(lo), float(hi)
        if not (math.isfinite(lo) and math.isfinite(hi) and hi > lo):
            raise ValueError(f"`{name}` items must be [min, max] with max > min (Angstrom), "
                             f"got {item!r}")
        out.append((lo, hi))
    return out


# ----------------------------------------------------------------------------
# standard-star flux tables
# ----------------------------------------------------------------------------

@dataclass(frozen=True)
class FluxTable:
    """A standard star's tabulated flux density.

    Parameters
    ----------
    wave_angstrom : ndarray, shape (n,), Angstrom
        Strictly increasing wavelengths (air). With ``bin_width_angstrom``
        they are the centres of the bins.
    flux : ndarray, shape (n,), erg / s / cm2 / Angstrom
        Flux density at each wavelength (``bin_width_angstrom`` None: point
        samples of a function interpolated linearly between them) or mean over
        each bin (``bin_width_angstrom`` given).
    bin_width_angstrom : ndarray, shape (n,), Angstrom, or None
    name : str
        The star's name (from the table's meta data or the file name).
    source : str
        Where the table came from.
    """

    wave_angstrom: np.ndarray
    flux: np.ndarray
    bin_width_angstrom: np.ndarray = None
    name: str = ""
    source: str = ""

    def __post_init__(self):
        wave = _as_1d_float(self.wave_angstrom, "wave_angstrom")
        flux = _same_shape(_as_1d_float(self.flux, "flux"), wave, "flux", "wave_angstrom")
        if wave.size < 2:
            raise ValueError(f"a flux table needs at least 2 rows, got {wave.size}")
        if not (np.all(np.isfinite(wave)) and np.all(np.isfinite(flux))):
            raise ValueError("`wave_angstrom` and `flux` must be finite")
        if np.any(np.diff(wave) <= 0):
            raise ValueError("`wave_angstrom` must be strictly increasing")
        if np.any(flux <= 0):
            raise ValueError("`flux` must be > 0 everywhere")
        object.__setattr__(self, "wave_angstrom", wave)
        object.__setattr__(self, "flux", flux)
        if self.bin_width_angstrom is not None:
            width = _same_shape(_as_1d_float(self.bin_width_angstrom, "bin_width_angstrom"),
                                wave, "bin_width_angstrom", "wave_angstrom")
            if not np.all(width > 0):
                raise ValueError("`bin_width_angstrom` must be > 0 everywhere")
            lo, hi = wave - width / 2, wave + width / 2
            if np.any(lo[1:] < hi[:-1] - 1e-6 * width[1:]):
                raise ValueError("bins of the flux table overlap; expected bins "
                                 "[centre - width/2, centre + width/2] that do not overlap")
            object.__setattr__(self, "bin_width_angstrom", width)


_FLUX_COLUMNS = ("flux_erg_s_cm2_angstrom", "flux_erg_s_cm2_a", "flux_lambda", "flux")
_WIDTH_COLUMNS = ("bin_width_angstrom", "bandwidth_angstrom", "width_angstrom")


def read_flux_table(path):
    """Read a standard star's flux table (ECSV; or CSV with ``#`` comments).

    Columns: ``wavelength_angstrom`` (air), one flux column
    (``flux_erg_s_cm2_angstrom``, or ``flux`` with a unit convertible to
    erg/s/cm2/A), and optionally ``bin_width_angstrom`` (then each flux is the
    mean over its bin). The star's name is the table's ``name``/``object``
    meta item or the file stem.

    Raises
    ------
    InputFileError
        Naming the file and the column that is missing or wrong.
    """
    from astropy import units as u
    from astropy.table import Table

    path = Path(path)
    fmt = "ascii.csv" if path.suffix.lower() == ".csv" else "ascii.ecsv"
    try:
        table = (Table.read(path, format=fmt, comment="#") if fmt == "ascii.csv"
                 else Table.read(path, format=fmt))
    except (OSError, ValueError, TypeError) as exc:
        raise InputFileError(path, f"cannot be read as {fmt} ({exc}); expected a standard-star "
                             "flux table with columns wavelength_angstrom and "
                             "flux_erg_s_cm2_angstrom") from exc
    if "wavelength_angstrom" not in table.colnames:
        raise InputFileError(path, f"column wavelength_angstrom missing (found {table.colnames}); "
                             "expected air wavelengths in Angstrom")
    flux_col = next((c for c in _FLUX_COLUMNS if c in table.colnames), None)
    if flux_col is None:
        raise InputFileError(path, f"no flux column (found {table.colnames}); expected one of "
                             f"{list(_FLUX_COLUMNS)} in erg/s/cm2/A")
    wave = np.asarray(table["wavelength_angstrom"], dtype=float)
    column = table[flux_col]
    flux = np.asarray(column, dtype=float)
    if column.unit is not None:
        try:
            flux = (flux * column.unit).to_value(
                u.Unit(FLUX_UNIT), equivalencies=u.spectral_density(wave * u.AA))
        except u.UnitConversionError as exc:
            raise InputFileError(path, f"column {flux_col} has unit {column.unit}, expected a "
                                 f"flux density convertible to {FLUX_UNIT}") from exc
    width_col = next((c for c in _WIDTH_COLUMNS if c in table.colnames), None)
    width = None if width_col is None else np.asarray(table[width_col], dtype=float)
    order = np.argsort(wave)
    name = str(table.meta.get("name", table.meta.get("object", path.stem)))
    source = path.name
    if "source" in table.meta:
        source += f" ({table.meta['source']})"
    try:
        return FluxTable(wave[order], flux[order],
                         None if width is None else width[order], name=name, source=source)
    except ValueError as exc:
        raise InputFileError(path, f"{exc} (column {flux_col}"
                             + (f", {width_col}" if width_col else "") + ")") from exc


def normalise_object_name(name):
    """Key used to match an OBJECT header value with a flux-table name.

    Upper case with spaces, underscores and hyphens removed, so 'TRS 17',
    'trs-17' and 'TRS_17' match.

    >>> normalise_object_name(' trs_17 ')
    'TRS17'
    """
    return re.sub(r"[\s_\-]+", "", str(name)).upper()


# ----------------------------------------------------------------------------
# pixels and bin-integrated interpolation
# ----------------------------------------------------------------------------

def pixel_edges(wave_angstrom):
    """Edges of the pixels whose centres are ``wave_angstrom``.

    Parameters
    ----------
    wave_angstrom : array_like, shape (n,), Angstrom
        Strictly increasing pixel centres, n >= 2.

    Returns
    -------
    ndarray, shape (n + 1,), Angstrom
        Midpoints between neighbouring centres; the outer edges lie half a
        neighbouring interval beyond the end centres. For a linear or smoothly
        varying dispersion the widths ``np.diff(edges)`` are the pixels'
        widths ``Delta lambda``.

    Examples
    --------
    >>> pixel_edges([10.0, 12.0, 14.0])
    array([ 9., 11., 13., 15.])
    """
    wave = _as_1d_float(wave_angstrom, "wave_angstrom")
    if wave.size < 2:
        raise ValueError(f"`wave_angstrom` needs at least 2 pixels, got {wave.size}")
    if not np.all(np.isfinite(wave)) or np.any(np.diff(wave) <= 0):
        raise ValueError("`wave_angstrom` must be finite and strictly increasing")
    mid = 0.5 * (wave[1:] + wave[:-1])
    first = wave[0] - 0.5 * (wave[1] - wave[0])
    last = wave[-1] + 0.5 * (wave[-1] - wave[-2])
    return np.concatenate([[first], mid, [last]])


def _cumulative_linear(x_nodes, f_nodes, q):
    """Integral from x_nodes[0] to q of the piecewise-linear interpolant (exact)."""
    seg = np.diff(x_nodes)
    cum = np.concatenate([[0.0], np.cumsum(0.5 * (f_nodes[1:] + f_nodes[:-1]) * seg)])
    i = np.clip(np.searchsorted(x_nodes, q, side="right") - 1, 0, x_nodes.size - 2)
    t = q - x_nodes[i]
    slope = (f_nodes[i + 1] - f_nodes[i]) / seg[i]
    return cum[i] + f_nodes[i] * t + 0.5 * slope * t * t


def _cumulative_step(lo, hi, f, q):
    """Integral of a step function (value f on [lo, hi), bins sorted and not overlapping)
    and the length covered by bins, from -inf up to each q."""
    width = hi - lo
    cum_int = np.concatenate([[0.0], np.cumsum(f * width)])
    cum_len = np.concatenate([[0.0], np.cumsum(width)])
    i = np.searchsorted(lo, q, side="right") - 1
    j = np.clip(i, 0, lo.size - 1)
    part = np.where(i >= 0, np.clip(q - lo[j], 0.0, width[j]), 0.0)
    base = np.where(i >= 0, j, 0)
    return cum_int[base] + f[j] * part, cum_len[base] + part


def table_flux_in_pixels(table, edges_angstrom):
    """Mean of a tabulated flux density over each pixel.

    Parameters
    ----------
    table : FluxTable
    edges_angstrom : array_like, shape (n + 1,), Angstrom
        Pixel edges (see :func:`pixel_edges`), increasing.

    Returns
    -------
    flux : ndarray, shape (n,), erg / s / cm2 / Angstrom
        ``(1 / Delta lambda) * integral of F over the pixel``; NaN where the
        pixel is not entirely covered by the table.

    Notes
    -----
    Point-sampled tables are integrated exactly as the piecewise-linear
    function through their points (a cumulative integral evaluated at the
    pixel edges, quadratic inside a table interval), so a pixel that spans
    several table points, or a fraction of one interval, gets the right
    mean - not the value at its centre. Binned tables are integrated as the
    step function they describe. In both cases the sum of ``flux * Delta
    lambda`` over pixels equals the table's integral over the same range.

    Examples
    --------
    >>> t = FluxTable([0.0, 10.0], [1.0, 11.0])
    >>> table_flux_in_pixels(t, [0.0, 2.0, 10.0])
    array([2., 7.])
    """
    edges = _as_1d_float(edges_angstrom, "edges_angstrom")
    if edges.size < 2 or np.any(np.diff(edges) <= 0):
        raise ValueError("`edges_angstrom` must be increasing with at least 2 values")
    width = np.diff(edges)
    if table.bin_width_angstrom is None:
        lo_tab, hi_tab = table.wave_angstrom[0], table.wave_angstrom[-1]
        cum = _cumulative_linear(table.wave_angstrom, table.flux, np.clip(edges, lo_tab, hi_tab))
        mean = np.diff(cum) / width
        inside = (edges[:-1] >= lo_tab - 1e-9) & (edges[1:] <= hi_tab + 1e-9)
    else:
        lo = table.wave_angstrom - table.bin_width_angstrom / 2
        hi = table.wave_angstrom + table.bin_width_angstrom / 2
        integral, covered = _cumulative_step(lo, hi, table.flux, edges)
        mean = np.diff(integral) / width
        inside = np.diff(covered) >= width * (1 - 1e-6)
    return np.where(inside, mean, np.nan)


def exclusion_mask(wave_angstrom, regions):
    """True where a wavelength lies inside any of the ``[min, max]`` regions (Angstrom).

    >>> exclusion_mask([4850.0, 4900.0], [[4840.0, 4880.0]])
    array([ True, False])
    """
    wave = np.asarray(wave_angstrom, dtype=float)
    out = np.zeros(wave.shape, dtype=bool)
    for lo, hi in _regions(regions):
        out |= (wave >= lo) & (wave <= hi)
    return out


def gaussian_slit_fraction(wave_angstrom, *, fwhm_arcsec, reference_wave_angstrom,
                           slit_width_arcsec, seeing_exponent=-0.2):
    """Fraction of a centred Gaussian star image that passes a slit.

    Parameters
    ----------
    wave_angstrom : array_like, Angstrom
    fwhm_arcsec : float, arcsec
        Image FWHM at ``reference_wave_angstrom`` (e.g. the spatial FWHM of the
        extracted profile along the slit).
    reference_wave_angstrom : float, Angstrom
    slit_width_arcsec : float, arcsec
    seeing_exponent : float
        FWHM scales as ``(lambda / lambda_ref) ** seeing_exponent``; -0.2 is
        the Kolmogorov value (common practice; from memory).

    Returns
    -------
    ndarray, same shape as ``wave_angstrom``
        ``erf(w / (2 sqrt(2) sigma(lambda)))``.

    Notes
    -----
    A model: real images have wings (Moffat-like), and a star off the slit
    centre loses more. Used only when ``slit_loss_correction`` is on.

    Examples
    --------
    >>> round(float(gaussian_slit_fraction(5000.0, fwhm_arcsec=1.0,
    ...     reference_wave_angstrom=5000.0, slit_width_arcsec=1.0)), 4)
    0.761
    """
    from scipy.special import erf

    fwhm = _positive(fwhm_arcsec, "fwhm_arcsec")
    ref = _positive(reference_wave_angstrom, "reference_wave_angstrom")
    width = _positive(slit_width_arcsec, "slit_width_arcsec")
    wave = np.asarray(wave_angstrom, dtype=float)
    sigma = fwhm * (wave / ref) ** float(seeing_exponent) / (2.0 * math.sqrt(2.0 * math.log(2.0)))
    return erf(width / (2.0 * math.sqrt(2.0) * sigma))


# ----------------------------------------------------------------------------
# sensitivity: measurement and fit
# ----------------------------------------------------------------------------

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
        :func:`gaussian_slit_fraction`). Given, the sensitivity refers to light
        entering the slit; None (default), it includes the standard's slit loss.

    Returns
    -------
    SensitivityPoints

    Examples
    --------
    >>> t = FluxTable([4000.0, 6000.0], [1e-13, 1e-13])
    >>> w = np.linspace(4100.0, 5900.0, 10)
    >>> p = measure_sensitivity(w, np.full(10, 2e5), np.full(10, 2e5), exptime_s=1.0,
    ...                         airmass=1.0, flux_table=t)
    >>> round(float(p.sens_mag[3]), 3)
    40.0
    """
    wave = _as_1d_float(wave_angstrom, "wave_angstrom")
    counts = _same_shape(_as_1d_float(counts_e, "counts_e"), wave, "counts_e", "wave_angstrom")
    var = _same_shape(_as_1d_float(variance_e2, "variance_e2"), wave, "variance_e2",
                      "wave_angstrom")
    mask = _as_mask(mask, wave)
    exptime_s = _positive(exptime_s, "exptime_s")
    airmass = float(airmass)
    if not math.isfinite(airmass) or airmass < 1.0 - 1e-6:
        raise ValueError(f"`airmass` must be a finite number >= 1, got {airmass!r}")
    edges = pixel_edges(wave)
    dwave = np.diff(edges)
    table_flux = table_flux_in_pixels(flux_table, edges)
    k = (np.zeros_like(wave) if extinction is None
         else extinction_at(extinction, wave, outside="hold"))
    trans = transmission(k, airmass)
    with np.errstate(invalid="ignore", divide="ignore"):
        rate = counts / (exptime_s * dwave)
        if slit_fraction is not None:
            trans = trans * _same_shape(np.asarray(slit_fraction, dtype=float), wave,
                                        "slit_fraction", "wave_angstrom")
        sens = rate / (table_flux * trans)
        usable = (np.isfinite(sens) & (sens > 0) & (mask == 0) & np.isfinite(var) & (var > 0)
                  & np.isfinite(table_flux))
        sens_mag = np.where(usable, 2.5 * np.log10(np.where(usable, sens, 1.0)), np.nan)
        rel = np.sqrt(np.where(usable, var, np.nan)) / np.where(usable, counts, np.nan)
    sens_err = np.hypot(_MAG_PER_REL * rel, float(error_floor_mag))
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
    knot_spacing_angstrom = _positive(knot_spacing_angstrom, "knot_spacing_angstrom")
    clip_sigma = _positive(clip_sigma, "clip_sigma")

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


# ----------------------------------------------------------------------------
# telluric bands from the standard
# ----------------------------------------------------------------------------

@dataclass(frozen=True)
class TelluricTemplate:
    """Transmission of the telluric bands at airmass 1, measured on standard stars.

    Parameters
    ----------
    wave_angstrom : ndarray, shape (n,), Angstrom
        Wavelengths inside the bands (increasing).
    ln_transmission : ndarray, shape (n,)
        ``ln t`` at airmass 1 (0 = no absorption).
    sigma_ln : ndarray, shape (n,)
        1-sigma error of ``ln_transmission`` (noise of the standards).
    bands : list of (min, max), Angstrom
        Outside them the transmission is 1.
    airmass_exponent : float
        ``ln t(X) = ln t(1) * X**airmass_exponent``; saturated molecular bands
        grow more slowly than linearly with airmass (about 0.55-0.6 for O2 and
        H2O; common practice, from memory).
    info : dict
    """

    wave_angstrom: np.ndarray
    ln_transmission: np.ndarray
    sigma_ln: np.ndarray
    bands: list
    airmass_exponent: float = 0.6
    info: dict = field(default_factory=dict)

    def transmission(self, wave_angstrom, airmass):
        """Transmission and its ln-error at ``airmass`` (1 and 0 outside the bands).

        Returns
        -------
        transmission, sigma_ln : ndarray, same shape as ``wave_angstrom``
        """
        wave = np.asarray(wave_angstrom, dtype=float)
        scale = float(airmass) ** self.airmass_exponent
        inside = exclusion_mask(wave, self.bands) & (wave >= self.wave_angstrom[0]) & (
            wave <= self.wave_angstrom[-1])
        ln_t = np.where(inside, np.interp(wave, self.wave_angstrom, self.ln_transmission), 0.0)
        sig = np.where(inside, np.interp(wave, self.wave_angstrom, self.sigma_ln), 0.0)
        return np.exp(ln_t * scale), sig * scale


def telluric_template(points, fit, bands, *, airmass_exponent=0.6):
    """Telluric transmission from the standards' pixels in the bands.

    Parameters
    ----------
    points : sequence of SensitivityPoints
        The standards' measured sensitivity; inside the bands it is the true
        sensitivity times the telluric transmission at the standard's airmass.
    fit : SensitivityFit
        Fitted with the bands excluded: the continuum under the bands.
    bands : sequence of [min, max], Angstrom
    airmass_exponent : float

    Returns
    -------
    TelluricTemplate or None
        None when no standard pixel falls in a band.

    Notes
    -----
    ``ln t_1 = 0.4 ln(10) (m_obs - m_fit) / X**b`` per pixel; several
    standards are averaged with inverse-variance weights on the grid of the
    first one that covers a pixel. Masked pixels inside a band are
    interpolated from their neighbours.
    """
    bands = _regions(bands, "bands")
    if not bands:
        return None
    grids, lns, sigs = [], [], []
    for p in points:
        in_band = exclusion_mask(p.wave_angstrom, bands) & fit.inside(p.wave_angstrom)
        if not in_band.any():
            continue
        scale = float(p.info.get("airmass", 1.0)) ** airmass_exponent
        ln_t = 0.4 * math.log(10.0) * (p.sens_mag - fit.mag(p.wave_angstrom)) / scale
        sig = p.sens_mag_err / _MAG_PER_REL / scale
        ok = in_band & p.usable & np.isfinite(ln_t)
        if ok.sum() < 2:
            continue
        grids.append(p.wave_angstrom[in_band])
        lns.append(np.interp(p.wave_angstrom[in_band], p.wave_angstrom[ok], ln_t[ok]))
        sigs.append(np.interp(p.wave_angstrom[in_band], p.wave_angstrom[ok], sig[ok]))
    if not grids:
        return None
    grid = np.unique(np.concatenate(grids))
    num = np.zeros(grid.size)
    den = np.zeros(grid.size)
    for g, ln_t, sig in zip(grids, lns, sigs):
        covered = (grid >= g[0]) & (grid <= g[-1])
        w = 1.0 / np.interp(grid[covered], g, sig) ** 2
        num[covered] += w * np.interp(grid[covered], g, ln_t)
        den[covered] += w
    good = den > 0
    return TelluricTemplate(grid[good], num[good] / den[good], 1.0 / np.sqrt(den[good]),
                            [list(b) for b in bands], float(airmass_exponent),
                            {"n_standards": len(grids)})


# ----------------------------------------------------------------------------
# calibration of a spectrum
# ----------------------------------------------------------------------------

@dataclass(frozen=True)
class CalibratedSpectrum:
    """A flux-calibrated 1-D spectrum.

    Parameters
    ----------
    wave_angstrom : ndarray, shape (n,), Angstrom
    flux : ndarray, shape (n,), erg / s / cm2 / Angstrom
        NaN outside the sensitivity's range (those pixels carry NO_COVERAGE).
    variance : ndarray, shape (n,), (erg / s / cm2 / Angstrom)^2
        From the counts' variance; plus the sensitivity's when
        ``info['sensitivity_error_included']``.
    mask : ndarray of uint8, shape (n,)
        The input mask, with NO_COVERAGE where no sensitivity exists and
        NONFINITE where the input was not finite.
    calibration_variance : ndarray, shape (n,), (erg / s / cm2 / Angstrom)^2
        Variance due to the sensitivity's fit error alone (fully correlated
        over neighbouring pixels, since it comes from a few coefficients).
    info : dict
        ``airmass``, ``exptime_s``, ``sensitivity_error_included`` ...
    """

    wave_angstrom: np.ndarray
    flux: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    calibration_variance: np.ndarray
    info: dict = field(default_factory=dict)


def calibrate_spectrum(wave_angstrom, counts_e, variance_e2, mask=None, *, exptime_s, airmass,
                       sensitivity, extinction=None, include_sensitivity_error=False,
                       slit_fraction=None, telluric=None):
    """Turn extracted electrons into flux density above the atmosphere.

    Parameters
    ----------
    wave_angstrom : array_like, shape (n,), Angstrom
        Pixel centres (air), strictly increasing.
    counts_e : array_like, shape (n,), electron
        Electrons per spectral pixel in the exposure.
    variance_e2 : array_like, shape (n,), electron^2
    mask : array_like of uint8, shape (n,), optional
    exptime_s : float, seconds
    airmass : float
    sensitivity : SensitivityFit
    extinction : ExtinctionCurve or None
        None applies no extinction correction.
    include_sensitivity_error : bool
        Add the sensitivity's fit variance to ``variance`` (it is always
        available separately as ``calibration_variance``).
    slit_fraction : array_like, shape (n,), optional
        Fraction of a point source's light that entered the slit; given, the
        flux is divided by it (total flux of the point source). Leave None for
        extended sources (flux through the slit) or when the sensitivity
        includes the standard's slit loss.
    telluric : TelluricTemplate, optional
        Divide by the telluric transmission at ``airmass``; its error joins
        ``calibration_variance``.

    Returns
    -------
    CalibratedSpectrum
        ``flux = C / (t * Delta lambda * S * 10**(-0.4 k X))``,
        ``variance = var(C) / (t * Delta lambda * S * 10**(-0.4 k X))**2``.

    Examples
    --------
    >>> fit = SensitivityFit('chebyshev', 1, np.array([40.0, 0.0]), np.zeros((2, 2)),
    ...                      np.array([4000.0, 6000.0]), 4000.0, 6000.0)
    >>> w = np.linspace(4100.0, 5900.0, 10)
    >>> s = calibrate_spectrum(w, np.full(10, 4e6), np.full(10, 4e6), exptime_s=1.0,
    ...                        airmass=1.0, sensitivity=fit)
    >>> float(s.flux[0])
    2e-12
    """
    wave = _as_1d_float(wave_angstrom, "wave_angstrom")
    counts = _same_shape(_as_1d_float(counts_e, "counts_e"), wave, "counts_e", "wave_angstrom")
    var = _same_shape(_as_1d_float(variance_e2, "variance_e2"), wave, "variance_e2",
                      "wave_angstrom")
    mask = _as_mask(mask, wave).copy()
    exptime_s = _positive(exptime_s, "exptime_s")
    airmass = float(airmass)
    if not math.isfinite(airmass) or airmass < 1.0 - 1e-6:
        raise ValueError(f"`airmass` must be a finite number >= 1, got {airmass!r}")
    dwave = np.diff(pixel_edges(wave))
    sens = sensitivity.sensitivity(wave)
    sens_rel_err = sensitivity.mag_error(wave) / _MAG_PER_REL
    k = (np.zeros_like(wave) if extinction is None
         else extinction_at(extinction, wave, outside="hold"))
    conversion = exptime_s * dwave * sens * transmission(k, airmass)
    if slit_fraction is not None:
        conversion = conversion * _same_shape(np.asarray(slit_fraction, dtype=float), wave,
                                              "slit_fraction", "wave_angstrom")
    tell_sig = np.zeros_like(wave)
    if telluric is not None:
        tell, tell_sig = telluric.transmission(wave, airmass)
        conversion = conversion * tell
    covered = np.isfinite(conversion) & (conversion > 0)
    finite = np.isfinite(counts) & np.isfinite(var)
    mask[~covered] |= maskbits.MASK_DTYPE(MaskBit.NO_COVERAGE)
    mask[~finite] |= maskbits.MASK_DTYPE(MaskBit.NONFINITE)
    good = covered & finite
    flux = np.full(wave.shape, np.nan)
    fvar = np.full(wave.shape, np.nan)
    cvar = np.full(wave.shape, np.nan)
    flux[good] = counts[good] / conversion[good]
    fvar[good] = var[good] / conversion[good] ** 2
    cvar[good] = flux[good] ** 2 * (sens_rel_err[good] ** 2 + tell_sig[good] ** 2)
    if include_sensitivity_error:
        fvar = fvar + cvar
    beyond = covered & ((wave < sensitivity.wave_min) | (wave > sensitivity.wave_max))
    info = dict(exptime_s=exptime_s, airmass=airmass, n_extrapolated=int(beyond.sum()),
                extinction=(extinction.source if extinction is not None else "none"),
                sensitivity_error_included=bool(include_sensitivity_error),
                telluric_corrected=telluric is not None,
                n_no_coverage=int((~covered).sum()))
    return CalibratedSpectrum(wave, flux, fvar, mask, cvar, info)


# ----------------------------------------------------------------------------
# 1-D spectra on disk (read with specutils; written in its wcs1d layout)
# ----------------------------------------------------------------------------

@dataclass(frozen=True)
class ExtractedSpectrum:
    """A 1-D spectrum as read from an extraction (or calibration) product.

    Parameters
    ----------
    wave_angstrom : ndarray, shape (n,), Angstrom (air)
    values : ndarray, shape (n,)
        Electrons per pixel (extraction products) in ``unit``.
    variance : ndarray, shape (n,), ``unit`` squared
    mask : ndarray of uint8, shape (n,)
    header : astropy.io.fits.Header
        The header of the flux HDU (OBJECT, EXPTIME, AIRMASS, ... and the WCS).
    path : str
    unit : str
    """

    wave_angstrom: np.ndarray
    values: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    header: object
    path: str
    unit: str = "electron"


#: uncertainty HDU names in specutils' order of preference, with the power giving variance
_UNCERT_HDUS = (("STD", 2), ("ERR", 2), ("UNCERT", 2), ("VAR", 1), ("IVAR", -1))


def _read_wcs1d_direct(path, expected_unit):
    """Read a one-spectrum-per-HDU FITS file with astropy only, the way specutils'
    ``wcs1d-fits`` reader does (flux HDU FLUX/SCI/DATA/PRIMARY, uncertainty from
    VAR/STD/ERR/UNCERT/IVAR, mask from MASK/DQ/QUALITY). Returns None when the file does not
    look like that, so that the caller falls back to specutils (slow to import: ~1 s)."""
    from astropy import units as u
    from astropy.io import fits
    from astropy.wcs import WCS, FITSFixedWarning

    try:
        with fits.open(path, memmap=False) as hdul:
            names = [h.name for h in hdul]
            flux_hdu = next((hdul[n] for n in ("FLUX", "SCI", "DATA", "PRIMARY")
                             if n in names and hdul[n].data is not None
                             and isinstance(hdul[n], (fits.PrimaryHDU, fits.ImageHDU))), None)
            if flux_hdu is None or flux_hdu.data.ndim != 1:
                return None
            header = flux_hdu.header.copy()
            if int(header.get("WCSAXES", 1)) != 1 or "CTYPE1" not in header:
                return None
            values = np.asarray(flux_hdu.data, dtype=float)
            unc = next(((hdul[n].data, power) for n, power in _UNCERT_HDUS
                        if n in names and hdul[n].data is not None), None)
            mask_name = next((n for n in ("MASK", "DQ", "QUALITY")
                              if n in names and hdul[n].data is not None), None)
            mask = None
            if mask_name is not None:
                mask = np.asarray(hdul[mask_name].data)
                if hdul[mask_name].header.get("BFORM", "B") in ("L", "X"):
                    mask = mask.astype(bool)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", FITSFixedWarning)
            wcs = WCS(header)
        if wcs.naxis != 1:
            return None
        world = wcs.all_pix2world(np.arange(values.size), 0)[0]
        cunit = u.Unit(wcs.wcs.cunit[0] or "Angstrom")
        wave = (world * cunit).to_value(u.AA, equivalencies=u.spectral())
        unit = u.Unit(header.get("BUNIT", ""))
    except (OSError, ValueError, TypeError, u.UnitsError):
        return None
    if unc is None:
        raise InputFileError(path, "no uncertainty HDU (VAR, STD or IVAR) found; expected the "
                             "variance of every pixel")
    data, power = unc
    data = np.asarray(data, dtype=float)
    with np.errstate(divide="ignore"):
        var = data if power == 1 else (data ** 2 if power == 2 else 1.0 / data)
    return wave, values, var, mask, header, unit


def read_spectrum(path, *, expected_unit="electron"):
    """Read a 1-D spectrum as ``specutils.Spectrum.read`` does.

    Parameters
    ----------
    path : str or Path
    expected_unit : str or None
        Flux unit the spectrum must be convertible to (None: any).

    Returns
    -------
    ExtractedSpectrum
        Wavelengths converted to Angstrom and sorted increasing; the
        uncertainty converted to variance (a missing uncertainty raises);
        a boolean mask becomes BAD_PIXEL.

    Raises
    ------
    InputFileError
        When specutils cannot read the file, the flux unit is wrong or the
        uncertainty is missing.
    """
    from astropy import units as u
    from astropy.io import fits

    path = Path(path)
    direct = _read_wcs1d_direct(path, expected_unit)
    if direct is not None:
        wave, values, var, mask, header, unit = direct
    else:
        wave, values, var, mask, header, unit = _read_with_specutils(path)
    scale = 1.0
    if expected_unit is not None:
        try:
            scale = (1.0 * unit).to_value(u.Unit(expected_unit))
        except u.UnitConversionError as exc:
            raise InputFileError(path, f"flux unit (BUNIT) is '{unit}', expected "
                                 f"'{expected_unit}'") from exc
        unit = u.Unit(expected_unit)
    values = values * scale
    var = var * scale ** 2
    if mask is None:
        mask = maskbits.empty_mask(values.shape)
    else:
        mask = np.asarray(mask)
        mask = (np.where(mask, MaskBit.BAD_PIXEL, 0) if mask.dtype == bool else mask).astype(
            maskbits.MASK_DTYPE)
    header = header.copy() if isinstance(header, fits.Header) else fits.Header()
    order = np.argsort(wave)
    if not np.all(order == np.arange(wave.size)):
        wave, values, var, mask = wave[order], values[order], var[order], mask[order]
    return ExtractedSpectrum(wave, values, var, mask, header, str(path), unit.to_string())


def _read_with_specutils(path):
    from astropy import units as u
    from astropy.nddata import VarianceUncertainty
    from specutils import Spectrum

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", category=Warning)
            spec = Spectrum.read(str(path))
    except Exception as exc:  # noqa: BLE001 - specutils raises many types
        raise InputFileError(path, f"cannot be read by specutils.Spectrum.read ({exc}); expected "
                             "a 1-D spectrum with a FITS spectral WCS") from exc
    if spec.flux.ndim != 1:
        raise InputFileError(path, f"flux has shape {spec.flux.shape}, expected one 1-D spectrum")
    try:
        wave = spec.spectral_axis.to_value(u.AA, equivalencies=u.spectral())
    except u.UnitConversionError as exc:
        raise InputFileError(path, f"spectral axis in {spec.spectral_axis.unit}, expected a "
                             "wavelength") from exc
    if spec.uncertainty is None:
        raise InputFileError(path, "no uncertainty HDU (VAR, STD or IVAR) found; expected the "
                             "variance of every pixel")
    var = np.asarray(spec.uncertainty.represent_as(VarianceUncertainty).array, dtype=float)
    return (wave, np.asarray(spec.flux.value, dtype=float), var, spec.mask,
            spec.meta.get("header"), spec.flux.unit)


def read_spectra_directory(directory):
    """The spectra of one frame: every FITS file listed in the directory.

    The extraction step writes an ECSV listing beside its spectra; when one
    with a ``file`` column is present, its files are used in its order (and
    its other columns returned), otherwise every ``*.fits`` in the directory.

    Returns
    -------
    list of (Path, dict)
        The spectrum files and the listing's row for each (empty without one).
    """
    from astropy.table import Table

    directory = Path(directory)
    if not directory.is_dir():
        raise InputFileError(directory, "is not a directory; expected the extraction step's "
                             "folder of 1-D spectra of one frame")
    for listing in sorted(directory.glob("*.ecsv")):
        try:
            table = Table.read(listing, format="ascii.ecsv")
        except (OSError, ValueError) as exc:
            warnings.warn(f"{listing}: cannot be read as ECSV ({exc}); listing ignored",
                          FluxCalibrationWarning, stacklevel=2)
            continue
        if "file" not in table.colnames:
            continue
        out = []
        for row in table:
            name = Path(str(row["file"])).name
            out.append((directory / name, {c: row[c] for c in table.colnames}))
        return out
    return [(p, {}) for p in sorted(directory.glob("*.fits"))]


def _header_float(header, key, path, *, required=True):
    value = header.get(key)
    try:
        value = float(value)
    except (TypeError, ValueError):
        value = math.nan
    if required and not math.isfinite(value):
        raise InputFileError(path, f"header keyword {key} is {header.get(key)!r}; expected a "
                             "finite number")
    return value


def spectrum_airmass(spectrum, *, site=None):
    """Airmass of a spectrum: header AIRMASS, or computed from RA, DEC, DATE-OBS, EXPTIME.

    Parameters
    ----------
    spectrum : ExtractedSpectrum
    site : dict or None
        ``latitude_deg``, ``longitude_deg``, ``height_m``; needed only when
        AIRMASS is missing.

    Returns
    -------
    airmass : float
    how : str
        'header' or 'computed'.
    """
    from pipeline.fluxcal.extinction import effective_airmass

    header, path = spectrum.header, spectrum.path
    airmass = _header_float(header, "AIRMASS", path, required=False)
    if math.isfinite(airmass) and airmass >= 1.0 - 1e-6:
        return airmass, "header"
    if not site:
        raise InputFileError(path, f"header keyword AIRMASS is {header.get('AIRMASS')!r}; "
                             "expected a number >= 1 (or a site to compute it from RA, DEC and "
                             "DATE-OBS)")
    try:
        value = effective_airmass(
            _header_float(header, "RA", path), _header_float(header, "DEC", path),
            str(header["DATE-OBS"]), _header_float(header, "EXPTIME", path),
            latitude_deg=site["latitude_deg"], longitude_deg=site["longitude_deg"],
            height_m=site["height_m"])
    except (KeyError, ValueError) as exc:
        raise InputFileError(path, f"header keyword AIRMASS is {header.get('AIRMASS')!r} and it "
                             f"cannot be computed from RA, DEC, DATE-OBS ({exc}); expected "
                             "AIRMASS >= 1") from exc
    warnings.warn(f"{path}: AIRMASS {header.get('AIRMASS')!r} unusable; computed {value:.4f} "
                  "from RA, DEC, DATE-OBS and EXPTIME at the site", FluxCalibrationWarning,
                  stacklevel=2)
    return value, "computed"


def _linear_wcs_cards(wave_angstrom):
    """WCS cards for wavelengths linear in pixels ('AWAV') or in log ('AWAV-LOG'), else None.

    Tolerance: 1e-6 of a pixel's width.
    """
    pix = np.arange(wave_angstrom.size)
    tol = 1e-6 * float(np.min(np.diff(wave_angstrom)))
    slope, start = np.polyfit(pix, wave_angstrom, 1)
    if np.max(np.abs(wave_angstrom - (start + slope * pix))) <= tol:
        return {"CTYPE1": "AWAV", "CUNIT1": "Angstrom", "CRPIX1": 1.0, "CRVAL1": start,
                "CDELT1": slope}
    log_slope, log_start = np.polyfit(pix, np.log(wave_angstrom), 1)
    if np.max(np.abs(wave_angstrom - np.exp(log_start + log_slope * pix))) <= tol:
        # Greisen et al. 2006: -LOG axis, w = w0 exp(CDELT (p - CRPIX) / w0)
        w0 = math.exp(log_start)
        return {"CTYPE1": "AWAV-LOG", "CUNIT1": "Angstrom", "CRPIX1": 1.0, "CRVAL1": w0,
                "CDELT1": w0 * log_slope}
    return None


def _wcs_matches(header, wave_angstrom):
    from astropy import units as u
    from astropy.wcs import WCS, FITSFixedWarning

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", FITSFixedWarning)
            wcs = WCS(header)
            if wcs.naxis != 1:
                return False
            world = wcs.all_pix2world(np.arange(wave_angstrom.size), 0)[0]
            unit = u.Unit(wcs.wcs.cunit[0] or "Angstrom")
        world = (world * unit).to_value(u.AA)
    except Exception:  # noqa: BLE001 - any WCS problem means "does not match"
        return False
    return bool(np.allclose(world, wave_angstrom, rtol=0, atol=1e-6 * np.min(np.diff(wave_angstrom))))


def _set_cards(header, cards):
    """Set keywords from a mapping of value or (value, comment); a comment that would not
    fit on the card is dropped (long string values continue on CONTINUE cards)."""
    for key, value in (cards or {}).items():
        comment = None
        if isinstance(value, tuple):
            value, comment = value
        header[key] = value
        if comment and len(str(header.cards[key])) + len(comment) + 3 <= 80:
            header.comments[key] = comment


_WCS_KEYS = re.compile(r"^(CTYPE|CUNIT|CRPIX|CRVAL|CDELT|CD\d_|PC\d_|PV\d_|PS\d_|WCSAXES|"
                       r"SPECSYS|SSYSOBS|RESTWAV|RESTFRQ|CNAME|CSYER|CRDER|WCSNAME)")


def write_fluxed_spectrum(path, spectrum, calibrated, *, header_extra=None, calibrations=()):
    """Write a calibrated spectrum so that ``specutils.Spectrum.read(path)`` opens it.

    Parameters
    ----------
    path : str or Path
    spectrum : ExtractedSpectrum
        The input; its header (with its spectral WCS) is carried over.
    calibrated : CalibratedSpectrum
    header_extra : mapping, optional
        Keywords added to the primary header (values or (value, comment)).
    calibrations : sequence of str
        Files used to calibrate (sensitivity, extinction table): ``CALIBnn``.

    Notes
    -----
    Layout: ``FLUX`` (primary, float64, BUNIT erg/s/cm2/A), ``VAR`` (float64),
    ``MASK`` (uint8), ``CALVAR`` (float64, the sensitivity's share of the
    variance); checksums in every HDU. The input's WCS is kept when it
    reproduces the wavelengths; otherwise a linear (or log-linear) 'AWAV' WCS
    is written, and a wavelength array that is neither raises
    :class:`~pipeline.core.errors.FluxCalibrationError`.
    """
    from astropy.io import fits

    from pipeline.core import provenance

    path = Path(path)
    header = spectrum.header.copy()
    for key in ("BSCALE", "BZERO", "BLANK", "CHECKSUM", "DATASUM", "EXTNAME"):
        header.remove(key, ignore_missing=True, remove_all=True)
    if not _wcs_matches(header, calibrated.wave_angstrom):
        cards = _linear_wcs_cards(calibrated.wave_angstrom)
        if cards is None:
            raise FluxCalibrationError(
                f"{spectrum.path}: wavelengths are neither linear nor log-linear in pixels and "
                "the header's WCS does not reproduce them; cannot write a 1-D FITS WCS")
        for key in list(header):
            if _WCS_KEYS.match(key):
                del header[key]
        header.update(cards)
    header["BUNIT"] = (FLUX_UNIT, "flux density above the atmosphere")
    _set_cards(header, header_extra)
    provenance.stamp(header, inputs=[spectrum.path], calibrations=list(calibrations))
    primary = fits.PrimaryHDU(np.asarray(calibrated.flux, dtype=np.float64), header=header)
    primary.name = "FLUX"
    var = fits.ImageHDU(np.asarray(calibrated.variance, dtype=np.float64), name="VAR")
    var.header["BUNIT"] = f"({FLUX_UNIT})2"
    mask_hdu = fits.ImageHDU(np.asarray(calibrated.mask, dtype=maskbits.MASK_DTYPE), name="MASK")
    for card in maskbits.header_cards():
        mask_hdu.header.append(card)
    calvar = fits.ImageHDU(np.asarray(calibrated.calibration_variance, dtype=np.float64),
                           name="CALVAR")
    calvar.header["BUNIT"] = f"({FLUX_UNIT})2"
    calvar.header["COMMENT"] = ("variance from the sensitivity fit alone; correlated between "
                                "pixels")
    path.parent.mkdir(parents=True, exist_ok=True)
    fits.HDUList([primary, var, mask_hdu, calvar]).writeto(path, overwrite=True, checksum=True)
    return path


# ----------------------------------------------------------------------------
# the sensitivity product
# ----------------------------------------------------------------------------

def write_sensitivity(path, fit, points=(), *, setup="", standards=(), status="ok", reason="",
                      header_extra=None, inputs=(), calibrations=(), telluric=None):
    """Write a sensitivity product (layout in the module docstring).

    Parameters
    ----------
    path : str or Path
    fit : SensitivityFit or None
        None writes a product with ``STATUS = 'failed'`` and ``REASON``, so
        that the calibration of science spectra can say why it was skipped.
    points : sequence of SensitivityPoints
    setup : str
    standards : sequence of str
        Names of the standard stars (one per points entry).
    status, reason : str
    telluric : TelluricTemplate, optional
        Written as the ``TELLURIC`` table (``wavelength_angstrom``,
        ``ln_transmission`` and ``sigma_ln`` at airmass 1; header ``AIRMEXP``
        and the bands ``BANDnnLO``/``BANDnnHI``).
    """
    from astropy.io import fits
    from astropy.table import Table

    from pipeline.core import provenance

    path = Path(path)
    primary = fits.PrimaryHDU()
    h = primary.header
    h["SETUP"] = (setup, "instrument setup id")
    h["STATUS"] = (status if fit is not None else "failed", "ok or failed")
    h["REASON"] = str(reason)  # long strings continue on CONTINUE cards
    for i, name in enumerate(standards, start=1):
        h[f"STD{i:02d}"] = (str(name), "standard star used")
    _set_cards(h, header_extra)
    hdus = [primary]
    # HDU 1: the curve on a grid (empty for a failed fit), for tools that read a table
    if fit is not None:
        grid = np.linspace(fit.wave_min - fit.max_extrapolation_angstrom,
                           fit.wave_max + fit.max_extrapolation_angstrom, 200)
        curve = Table({"wavelength_angstrom": grid, "sensitivity_mag": fit.mag(grid),
                       "sensitivity_mag_err": fit.mag_error(grid),
                       "sensitivity": fit.sensitivity(grid)})
    else:
        curve = Table(names=("wavelength_angstrom", "sensitivity_mag", "sensitivity_mag_err",
                             "sensitivity"), dtype=[float] * 4)
    curve["sensitivity"].description = "S in electron cm2 / erg (see SENSUNIT)"
    curve["wavelength_angstrom"].unit = "Angstrom"
    curve["sensitivity_mag"].unit = "mag"
    curve["sensitivity_mag_err"].unit = "mag"
    hdus.append(fits.table_to_hdu(curve))
    hdus[-1].name = "CURVE"
    if fit is not None:
        h["SENSKIND"] = (fit.kind, "fit of 2.5 log10 S: spline or chebyshev")
        h["SENSDEG"] = (fit.degree, "spline degree or Chebyshev order")
        h["SENSUNIT"] = ("electron cm2 / erg", "unit of S")
        h["WAVEMIN"] = (fit.wave_min, "[Angstrom] shortest fitted wavelength")
        h["WAVEMAX"] = (fit.wave_max, "[Angstrom] longest fitted wavelength")
        h["RMSPCT"] = (fit.info["rms_percent"], "[%] rms of the fit residuals, per pixel")
        h["RMSBPCT"] = (fit.info["rms_binned_percent"], "[%] rms of residuals in bins")
        h["CHI2RED"] = (fit.info["chi2_reduced"], "reduced chi-square of the fit")
        h["NUSED"] = (fit.info["n_used"], "pixels used in the fit")
        h["NREJ"] = (fit.info["n_rejected"], "pixels rejected by clipping")
        model = fits.ImageHDU(np.asarray(fit.coeffs, dtype=np.float64), name="MODEL")
        model.header["SENSKIND"] = fit.kind
        model.header["SENSDEG"] = fit.degree
        model.header["WAVEMIN"] = fit.wave_min
        model.header["WAVEMAX"] = fit.wave_max
        model.header["EXTRAPOL"] = (fit.max_extrapolation_angstrom,
                                    "[Angstrom] allowed linear extrapolation")
        hdus.append(model)
        hdus.append(fits.ImageHDU(np.asarray(fit.knots, dtype=np.float64), name="KNOTS"))
        hdus.append(fits.ImageHDU(np.asarray(fit.covariance, dtype=np.float64), name="COVAR"))
        rows = []
        for i, p in enumerate(points):
            rejected = (fit.info["rejected"][i] if i < len(fit.info.get("rejected", ()))
                        else np.zeros(p.wave_angstrom.shape, bool))
            rows.append(Table({
                "frame": np.full(p.wave_angstrom.size, str(p.info.get("frame", "")))
                .astype("U64"),
                "wavelength_angstrom": p.wave_angstrom, "sensitivity_mag": p.sens_mag,
                "sensitivity_mag_err": p.sens_mag_err, "used": p.for_fit & ~rejected,
                "excluded": p.usable & p.excluded, "rejected": rejected}))
        if rows:
            from astropy.table import vstack
            hdus.append(fits.table_to_hdu(vstack(rows)))
            hdus[-1].name = "POINTS"
    h["TELLCOR"] = (telluric is not None, "telluric template stored (HDU TELLURIC)")
    if telluric is not None:
        tt = Table({"wavelength_angstrom": telluric.wave_angstrom,
                    "ln_transmission": telluric.ln_transmission,
                    "sigma_ln": telluric.sigma_ln})
        tt["wavelength_angstrom"].unit = "Angstrom"
        hdu = fits.table_to_hdu(tt)
        hdu.name = "TELLURIC"
        hdu.header["AIRMEXP"] = (telluric.airmass_exponent, "ln t(X) = ln t(1) X**AIRMEXP")
        for i, (lo, hi) in enumerate(telluric.bands, start=1):
            hdu.header[f"BAND{i:02d}LO"] = (lo, "[Angstrom] telluric band start")
            hdu.header[f"BAND{i:02d}HI"] = (hi, "[Angstrom] telluric band end")
        hdus.append(hdu)
    provenance.stamp(h, inputs=list(inputs), calibrations=list(calibrations))
    path.parent.mkdir(parents=True, exist_ok=True)
    fits.HDUList(hdus).writeto(path, overwrite=True, checksum=True)
    return path


def read_sensitivity(path):
    """Read a sensitivity product written by :func:`write_sensitivity`.

    Returns
    -------
    fit : SensitivityFit or None
        None when the product records a failed fit.
    header : astropy.io.fits.Header
        The primary header (``STATUS``, ``REASON``, ``SETUP``, ``STDnn`` ...).

    Raises
    ------
    InputFileError
        When the file is not a sensitivity product.
    """
    from astropy.io import fits

    path = Path(path)
    try:
        with fits.open(path, memmap=False) as hdul:
            header = hdul[0].header.copy()
            if "STATUS" not in header:
                raise InputFileError(path, "keyword STATUS missing in the primary header; "
                                     "expected a sensitivity product of fit_sensitivity")
            if header["STATUS"] != "ok":
                return None, header
            names = [h.name for h in hdul]
            for ext in ("MODEL", "KNOTS", "COVAR"):
                if ext not in names:
                    raise InputFileError(path, f"extension {ext} missing (found {names}); "
                                         "expected a sensitivity product of fit_sensitivity")
            mh = hdul["MODEL"].header
            fit = SensitivityFit(
                kind=str(mh["SENSKIND"]), degree=int(mh["SENSDEG"]),
                coeffs=np.array(hdul["MODEL"].data, dtype=float),
                covariance=np.array(hdul["COVAR"].data, dtype=float),
                knots=np.array(hdul["KNOTS"].data, dtype=float),
                wave_min=float(mh["WAVEMIN"]), wave_max=float(mh["WAVEMAX"]),
                max_extrapolation_angstrom=float(mh.get("EXTRAPOL", 0.0)),
                info={"rms_percent": header.get("RMSPCT"), "path": str(path)})
            if "TELLURIC" in names:
                th = hdul["TELLURIC"].header
                data = hdul["TELLURIC"].data
                bands = [[float(th[f"BAND{i:02d}LO"]), float(th[f"BAND{i:02d}HI"])]
                         for i in range(1, 100) if f"BAND{i:02d}LO" in th]
                fit.info["telluric"] = TelluricTemplate(
                    np.array(data["wavelength_angstrom"], dtype=float),
                    np.array(data["ln_transmission"], dtype=float),
                    np.array(data["sigma_ln"], dtype=float), bands, float(th["AIRMEXP"]))
    except OSError as exc:
        raise InputFileError(path, f"cannot be read as FITS ({exc})") from exc
    return fit, header


# ----------------------------------------------------------------------------
# adapters called by the workflow rules
# ----------------------------------------------------------------------------

def _as_path_list(value):
    if value is None:
        return []
    if isinstance(value, (str, Path)):
        return [] if str(value) == "" else [str(value)]
    return [str(v) for v in value]


def _load_extinction(extinction_table):
    paths = _as_path_list(extinction_table)
    if not paths:
        warnings.warn("no extinction table configured (instrument.site.extinction_table is "
                      "null): spectra are NOT corrected for atmospheric extinction",
                      FluxCalibrationWarning, stacklevel=3)
        return None
    return read_extinction_table(paths[0])


def _signal_to_noise(spec):
    good = (spec.mask == 0) & np.isfinite(spec.values) & (spec.variance > 0)
    if not good.any():
        return 0.0
    return float(np.median(spec.values[good] / np.sqrt(spec.variance[good])))


#: FWHM^2 added by integrating a Gaussian over 1-px bins: (2 sqrt(2 ln 2))^2 / 12 px^2
_PIXEL_FWHM2 = 8.0 * math.log(2.0) / 12.0


def _profile_fwhm_arcsec(spec, spatial_scale_arcsec_per_px):
    """(FWHM in arcsec, reference wavelength) of the image of an extracted profile from its
    header: APFWHMPX rows with the pixel's own width removed in quadrature (a Gaussian
    integrated over 1-px bins has sigma^2 + 1/12 px^2), x BINSPAT x the unbinned scale, at
    APREFWL. Raises InputFileError when a keyword is missing."""
    header, path = spec.header, spec.path
    fwhm_px = _header_float(header, "APFWHMPX", path)
    fwhm_px = math.sqrt(max(fwhm_px ** 2 - _PIXEL_FWHM2, 0.25 * fwhm_px ** 2))
    binning = _header_float(header, "BINSPAT", path, required=False)
    binning = binning if math.isfinite(binning) and binning > 0 else 1.0
    ref = _header_float(header, "APREFWL", path, required=False)
    if not math.isfinite(ref):
        ref = float(np.median(spec.wave_angstrom))
    if spatial_scale_arcsec_per_px is None:
        raise ValueError("`spatial_scale_arcsec_per_px` is needed for the slit-loss correction")
    return fwhm_px * binning * float(spatial_scale_arcsec_per_px), ref


def _slit_fraction_of(spec, *, spatial_scale_arcsec_per_px, seeing_exponent):
    fwhm, ref = _profile_fwhm_arcsec(spec, spatial_scale_arcsec_per_px)
    width = _header_float(spec.header, "SLITWID", spec.path)
    frac = gaussian_slit_fraction(spec.wave_angstrom, fwhm_arcsec=fwhm,
                                  reference_wave_angstrom=ref, slit_width_arcsec=width,
                                  seeing_exponent=seeing_exponent)
    return frac, fwhm, ref


def _qa_table(rows, meta):
    from astropy.table import Table

    names = ("setup", "frame", "object", "flux_table", "airmass", "airmass_from", "exptime_s",
             "wave_min_angstrom", "wave_max_angstrom", "n_points", "n_used", "n_rejected",
             "rms_percent", "offset_percent", "fit_rms_percent", "fit_rms_binned_percent",
             "status", "reason")
    dtypes = (str, str, str, str, float, str, float, float, float, int, int, int, float, float,
              float, float, str, str)
    # empty strings would come back from ECSV as masked values: write "none" instead
    table = Table(rows=[[(r.get(n) or "none") if t is str else
                         r.get(n, 0 if t is int else math.nan)
                         for n, t in zip(names, dtypes)] for r in rows] or None,
                  names=names, dtype=dtypes)
    for col in ("wave_min_angstrom", "wave_max_angstrom"):
        table[col].unit = "Angstrom"
    table["exptime_s"].unit = "s"
    table.meta.update(meta)
    return table


def fit_sensitivity_file(*, spectra, flux_tables, sensitivity, qa_table, qa_plot,
                         extinction_table=None, setup="", fit_kind="spline",
                         knot_spacing_angstrom=250.0, degree=3, clip_sigma=3.0,
                         max_iterations=5, exclude_regions=(), error_floor_mag=0.002,
                         max_extrapolation_angstrom=150.0, slit_loss_correction=False,
                         spatial_scale_arcsec_per_px=None, seeing_exponent=-0.2,
                         telluric_bands=(), telluric_correction=False,
                         telluric_airmass_exponent=0.6, site=None):
    """Adapter of rule ``fit_sensitivity``: one sensitivity per setup.

    Parameters
    ----------
    spectra : list of str
        The extraction step's spectra directories of the setup's standard frames.
    flux_tables : list of str
        The flux table of each standard (same order as ``spectra``).
    sensitivity, qa_table, qa_plot : str
        Outputs: the sensitivity product (FITS), the QA table (ECSV: one row
        per standard with the rms of the fit in %, the wavelength range and
        the table used) and the QA figure (PNG).
    extinction_table : str or None
        Site extinction table; None means no extinction correction (warned).
    setup : str
    fit_kind, knot_spacing_angstrom, degree, clip_sigma, max_iterations, max_extrapolation_angstrom
        See :func:`fit_sensitivity`.
    exclude_regions, error_floor_mag
        See :func:`measure_sensitivity`.
    slit_loss_correction : bool
        Divide the standard's counts by its modelled slit fraction
        (:func:`gaussian_slit_fraction` from the header's APFWHMPX, BINSPAT,
        APREFWL and SLITWID), so that the sensitivity refers to light entering
        the slit; recorded as ``SLITCORR``/``STDFWHM`` for the science step.
    spatial_scale_arcsec_per_px : float, arcsec
        Unbinned pixel scale along the slit (for the slit-loss correction).
    seeing_exponent : float
        FWHM proportional to lambda**seeing_exponent.
    telluric_bands : sequence of [min, max], Angstrom
        Left out of the fit like ``exclude_regions``; with
        ``telluric_correction`` the standards' absorption there is stored as a
        :class:`TelluricTemplate` (see :func:`telluric_template`) that the
        science calibration divides out, scaled to each frame's airmass with
        ``telluric_airmass_exponent``.
    telluric_correction : bool
    telluric_airmass_exponent : float
    site : dict, optional
        ``latitude_deg``, ``longitude_deg``, ``height_m`` for spectra without AIRMASS.

    Notes
    -----
    A setup whose standards cannot be used still gets all three outputs: the
    sensitivity product says ``STATUS = 'failed'`` with the ``REASON``, which
    :func:`flux_calibrate_file` reports for the science spectra. The night
    goes on.
    """
    from pipeline.fluxcal import qa as qa_flux

    dirs = _as_path_list(spectra)
    tables = _as_path_list(flux_tables)
    if len(tables) == 1 and len(dirs) > 1:
        tables = tables * len(dirs)
    if len(tables) != len(dirs):
        raise ValueError(f"`flux_tables` must name one table per standard spectra directory: "
                         f"{len(dirs)} directories, {len(tables)} tables")
    bands = _regions(telluric_bands, "telluric_bands")
    regions = _regions(exclude_regions) + bands
    points, rows, used_names, inputs, problems, fwhms = [], [], [], [], [], []
    calibrations = list(dict.fromkeys(tables)) + _as_path_list(extinction_table)
    try:
        extinction = _load_extinction(extinction_table)
    except InputFileError as exc:
        extinction, dirs = None, []
        problems.append(f"extinction table unusable: {exc}")
    for directory, table_path in zip(dirs, tables):
        frame = Path(directory).name
        row = dict(setup=setup, frame=frame, flux_table=Path(table_path).name)
        try:
            table = read_flux_table(table_path)
            files = read_spectra_directory(directory)
            candidates = []
            for path, _ in files:
                try:
                    candidates.append(read_spectrum(path))
                except InputFileError as exc:
                    warnings.warn(str(exc), FluxCalibrationWarning, stacklevel=2)
            if not candidates:
                raise FluxCalibrationError(f"{directory}: no readable standard-star spectrum "
                                           "(the extraction found no object?)")
            spec = max(candidates, key=_signal_to_noise)
            obj = str(spec.header.get("OBJECT", ""))
            row["object"] = obj
            if normalise_object_name(obj) != normalise_object_name(table.name):
                warnings.warn(f"{spec.path}: OBJECT {obj!r} differs from the flux table's star "
                              f"{table.name!r} ({table_path}); the table is used as configured",
                              FluxCalibrationWarning, stacklevel=2)
            airmass, how = spectrum_airmass(spec, site=site)
            exptime = _header_float(spec.header, "EXPTIME", spec.path)
            frac, details = None, {}
            if slit_loss_correction:
                frac, fwhm, ref = _slit_fraction_of(
                    spec, spatial_scale_arcsec_per_px=spatial_scale_arcsec_per_px,
                    seeing_exponent=seeing_exponent)
                details = {"fwhm_arcsec": fwhm, "fwhm_reference_angstrom": ref,
                           "slit_fraction_at_reference": float(np.interp(
                               ref, spec.wave_angstrom, frac))}
                fwhms.append(fwhm)
            p = measure_sensitivity(
                spec.wave_angstrom, spec.values, spec.variance, spec.mask, exptime_s=exptime,
                airmass=airmass, flux_table=table, extinction=extinction,
                exclude_regions=regions, error_floor_mag=error_floor_mag, slit_fraction=frac,
                info={"frame": frame, "object": obj, "path": spec.path, **details})
            if p.for_fit.sum() == 0:
                raise FluxCalibrationError(f"{spec.path}: no pixel of the spectrum is usable and "
                                           f"covered by the flux table {table.source}")
            points.append(p)
            used_names.append(obj or table.name)
            inputs.append(spec.path)
            row.update(airmass=airmass, airmass_from=how, exptime_s=exptime,
                       wave_min_angstrom=float(np.min(p.wave_angstrom[p.for_fit])),
                       wave_max_angstrom=float(np.max(p.wave_angstrom[p.for_fit])),
                       status="used")
        except (PipelineError, ValueError) as exc:
            problems.append(f"{frame}: {exc}")
            warnings.warn(f"standard {frame} not used for the sensitivity of setup {setup}: "
                          f"{exc}", FluxCalibrationWarning, stacklevel=2)
            row.update(status="not used", reason=str(exc))
        rows.append(row)

    fit, reason = None, ""
    if points:
        try:
            fit = fit_sensitivity(points, kind=fit_kind,
                                  knot_spacing_angstrom=knot_spacing_angstrom, degree=degree,
                                  clip_sigma=clip_sigma, max_iterations=max_iterations,
                                  max_extrapolation_angstrom=max_extrapolation_angstrom)
        except FluxCalibrationError as exc:
            reason = str(exc)
    else:
        reason = ("no usable standard-star spectrum: " + "; ".join(problems)) if problems else \
            "no standard-star spectrum given"
    meta = dict(setup=setup, fit_kind=fit_kind, degree=int(degree),
                slit_loss_correction=bool(slit_loss_correction),
                telluric_bands_angstrom=[list(b) for b in bands],
                knot_spacing_angstrom=float(knot_spacing_angstrom), clip_sigma=float(clip_sigma),
                exclude_regions_angstrom=[list(r) for r in regions],
                extinction_table=(extinction.source if extinction is not None else "none"),
                sensitivity_definition="2.5 log10 S, S in electron cm2 / erg "
                                       "(counts/s/A above the atmosphere per unit f_lambda)")
    if fit is None:
        log.warning("setup %s: no sensitivity (%s); its science spectra stay uncalibrated",
                    setup, reason)
        warnings.warn(f"setup {setup}: no sensitivity ({reason}); its science spectra stay "
                      "uncalibrated", FluxCalibrationWarning, stacklevel=2)
        write_sensitivity(sensitivity, None, setup=setup, status="failed", reason=reason,
                          inputs=inputs, calibrations=calibrations)
        meta.update(status="failed", reason=reason)
        _qa_table(rows, meta).write(qa_table, format="ascii.ecsv", overwrite=True)
        qa_flux.plot_message(qa_plot, f"no sensitivity for setup {setup}:\n{reason}",
                             title=f"sensitivity {setup}")
        return None
    per = {d["frame"]: d for d in fit.info["per_standard"]}
    for row in rows:
        d = per.get(row["frame"])
        if d and row.get("status") == "used":
            row.update(n_points=d["n_used"] + d["n_rejected"], n_used=d["n_used"],
                       n_rejected=d["n_rejected"], rms_percent=d["rms_percent"],
                       offset_percent=d["offset_percent"])
        row.update(fit_rms_percent=fit.info["rms_percent"],
                   fit_rms_binned_percent=fit.info["rms_binned_percent"])
    meta.update(status="ok", reason="", rms_percent=fit.info["rms_percent"],
                rms_binned_percent=fit.info["rms_binned_percent"],
                chi2_reduced=fit.info["chi2_reduced"], wave_min_angstrom=fit.wave_min,
                wave_max_angstrom=fit.wave_max, standards=used_names)
    telluric = (telluric_template(points, fit, bands,
                                  airmass_exponent=telluric_airmass_exponent)
                if telluric_correction and bands else None)
    meta.update(telluric_correction=telluric is not None)
    write_sensitivity(sensitivity, fit, points, setup=setup, standards=used_names,
                      inputs=inputs, calibrations=calibrations, telluric=telluric,
                      header_extra={"EXTTAB": ((extinction.source if extinction else "none"),
                                               "extinction table"),
                                    "SLITCORR": (bool(slit_loss_correction),
                                                 "sensitivity corrected for slit loss"),
                                    **({"STDFWHM": (float(np.mean(fwhms)),
                                                    "[arcsec] standard's profile FWHM")}
                                       if fwhms else {})})
    _qa_table(rows, meta).write(qa_table, format="ascii.ecsv", overwrite=True)
    qa_flux.plot_sensitivity(fit, points, qa_plot, exclude_regions=regions,
                             title=f"sensitivity {setup} from {', '.join(used_names)}")
    log.info("setup %s: sensitivity from %s, %.1f-%.1f A, rms %.2f %% per pixel "
             "(%.2f %% binned), %d of %d pixels rejected", setup, ", ".join(used_names),
             fit.wave_min, fit.wave_max, fit.info["rms_percent"],
             fit.info["rms_binned_percent"], fit.info["n_rejected"], fit.info["n_points"])
    return fit


def _write_listing(path, rows, meta):
    from astropy.table import Table

    names = ("object", "aperture", "input_file", "file", "status", "reason")
    # empty strings would come back from ECSV as masked values: write "none" instead
    table = Table(rows=[[str(r.get(n) or "none") for n in names] for r in rows] or None,
                  names=names, dtype=[str] * len(names))
    if any("table_ratio_median" in r for r in rows):
        for col in ("table_ratio_median", "table_ratio_rms_percent"):
            table[col] = [float(r.get(col, math.nan)) for r in rows]
    table.meta.update(meta)
    table.write(path, format="ascii.ecsv", overwrite=True)


def flux_calibrate_file(*, spectra, fluxed, qa_plot=None, sensitivity=None,
                        extinction_table=None, setup="", uncalibrated_reason="",
                        include_sensitivity_error=False, spatial_scale_arcsec_per_px=None,
                        seeing_exponent=-0.2, extended_fwhm_ratio=1.5, flux_table=None,
                        exclude_regions=(), site=None):
    """Adapter of rule ``flux_calibrate``: calibrate every spectrum of one frame.

    Parameters
    ----------
    spectra : str
        The extraction step's spectra directory of the frame.
    fluxed : str
        Output directory: one calibrated FITS per input spectrum (same file
        name) and the listing ``fluxed_spectra.ecsv``.
    qa_plot : str, optional
        PNG of the calibrated spectra.
    sensitivity : str or empty list
        The setup's sensitivity product; empty when the setup has none.
    extinction_table : str or None
    setup : str
    uncalibrated_reason : str
        Why there is no sensitivity (set by the rule when the setup has no
        usable standard); used when ``sensitivity`` is empty.
    include_sensitivity_error : bool
        Add the sensitivity's fit variance to each pixel's variance (it is
        always written separately in the CALVAR HDU).
    spatial_scale_arcsec_per_px, seeing_exponent : float
        For the slit-loss correction, applied only when the sensitivity was
        corrected (``SLITCORR``): a spectrum whose profile FWHM is at most
        ``extended_fwhm_ratio`` times the standard's is taken as a point
        source and divided by its modelled slit fraction (total flux); a wider
        one as extended (flux through the slit, no correction).
    extended_fwhm_ratio : float
    flux_table : str or empty list, optional
        For a standard-star frame: its flux table. The calibrated spectrum is
        then compared with it (columns ``table_ratio_median`` and
        ``table_ratio_rms_percent`` of the listing, outside ``exclude_regions``,
        and the table drawn in the QA figure): an end-to-end check.
    exclude_regions : sequence of [min, max], Angstrom
    site : dict, optional

    Notes
    -----
    Never fails for a missing sensitivity: the listing then names the
    extraction products with status 'uncalibrated' and the reason, and a
    :class:`~pipeline.core.errors.FluxCalibrationWarning` goes to the log.
    """
    from pipeline.fluxcal import qa as qa_flux

    out_dir = Path(fluxed)
    out_dir.mkdir(parents=True, exist_ok=True)
    frame = Path(spectra).name
    sens_paths = _as_path_list(sensitivity)
    fit, reason, sens_header = None, str(uncalibrated_reason or ""), None
    if sens_paths:
        fit, sens_header = read_sensitivity(sens_paths[0])
        if fit is None:
            reason = (f"sensitivity of setup {setup} failed: "
                      f"{sens_header.get('REASON', 'no reason recorded')}")
    elif not reason:
        reason = f"no sensitivity for setup {setup}"
    extinction = None
    if fit is not None:
        try:
            extinction = _load_extinction(extinction_table)
        except InputFileError as exc:
            fit, reason = None, f"extinction table unusable: {exc}"
            warnings.warn(reason, FluxCalibrationWarning, stacklevel=2)
    files = read_spectra_directory(spectra)
    reference = None
    table_paths = _as_path_list(flux_table)
    if table_paths and fit is not None:
        try:
            reference = read_flux_table(table_paths[0])
        except InputFileError as exc:
            warnings.warn(f"no comparison with the standard's table: {exc}",
                          FluxCalibrationWarning, stacklevel=2)
    rows, plotted = [], []
    for path, listed in files:
        row = dict(object=listed.get("object", ""), aperture=listed.get("aperture", ""),
                   input_file=str(path), file=str(path), status="uncalibrated", reason=reason)
        if fit is not None:
            try:
                spec = read_spectrum(path)
                row["object"] = row["object"] or spec.header.get("OBJECT", "")
                spec_setup = str(spec.header.get("SETUP", setup))
                if setup and spec_setup != setup:
                    warnings.warn(f"{path}: SETUP {spec_setup!r} differs from the rule's setup "
                                  f"{setup!r}; calibrated with the sensitivity of {setup!r}",
                                  FluxCalibrationWarning, stacklevel=2)
                airmass, how = spectrum_airmass(spec, site=site)
                exptime = _header_float(spec.header, "EXPTIME", spec.path)
                frac, slit_note = None, ("none", "sensitivity includes the standard's slit loss")
                if sens_header.get("SLITCORR", False):
                    f_obj, fwhm, ref = _slit_fraction_of(
                        spec, spatial_scale_arcsec_per_px=spatial_scale_arcsec_per_px,
                        seeing_exponent=seeing_exponent)
                    if fwhm <= extended_fwhm_ratio * float(sens_header["STDFWHM"]):
                        frac = f_obj
                        slit_note = ("point", f"total flux: slit fraction "
                                     f"{float(np.interp(ref, spec.wave_angstrom, f_obj)):.3f}")
                    else:
                        slit_note = ("extended", f"flux through the slit (FWHM {fwhm:.2f} "
                                     "arcsec)")
                cal = calibrate_spectrum(spec.wave_angstrom, spec.values, spec.variance,
                                         spec.mask, exptime_s=exptime, airmass=airmass,
                                         sensitivity=fit, extinction=extinction,
                                         include_sensitivity_error=include_sensitivity_error,
                                         slit_fraction=frac, telluric=fit.info.get("telluric"))
                target = out_dir / Path(path).name
                extra = {
                    "FLUXCAL": (True, "flux calibrated"),
                    "SENSFILE": (Path(sens_paths[0]).name, "sensitivity product used"),
                    "AIRMUSED": (airmass, f"airmass used ({how})"),
                    "NEXTRAP": (cal.info["n_extrapolated"], "pixels with extrapolated sensitivity"),
                    "SLITLOSS": (slit_note[0], slit_note[1]),
                    "TELLCOR": (cal.info["telluric_corrected"],
                                "telluric bands divided by the standard's template"),
                    "EXTTAB": ((extinction.source if extinction else "none"),
                               "extinction table"),
                    "SENSERR": ("included" if include_sensitivity_error else "not in VAR",
                                "sensitivity error; always in HDU CALVAR"),
                }
                for i, key in enumerate(k for k in sens_header if k.startswith("STD")):
                    extra[f"FCSTD{i + 1:02d}"] = (sens_header[key], "standard of the sensitivity")
                write_fluxed_spectrum(target, spec, cal, header_extra=extra,
                                      calibrations=sens_paths[:1] + _as_path_list(
                                          extinction_table))
                row.update(file=str(target), status="calibrated", reason="")
                notes = []
                if cal.info["n_extrapolated"]:
                    notes.append(f"{cal.info['n_extrapolated']} pixels use the sensitivity "
                                 "extrapolated beyond the standard's fitted range")
                if cal.info["n_no_coverage"]:
                    notes.append(f"{cal.info['n_no_coverage']} pixels outside the "
                                 "sensitivity's range (NaN, NO_COVERAGE)")
                row["reason"] = "; ".join(notes)
                plotted.append((f"{row['object']} {row['aperture']}".strip(), cal))
                if reference is not None:
                    ref_flux = table_flux_in_pixels(reference, pixel_edges(cal.wave_angstrom))
                    ok = ((cal.mask == 0) & np.isfinite(ref_flux) & np.isfinite(cal.flux)
                          & ~exclusion_mask(cal.wave_angstrom, exclude_regions))
                    if ok.sum() > 10:
                        ratio = cal.flux[ok] / ref_flux[ok]
                        row["table_ratio_median"] = float(np.median(ratio))
                        row["table_ratio_rms_percent"] = float(
                            100.0 * np.sqrt(np.mean((ratio - 1.0) ** 2)))
                        log.info("%s: calibrated standard / its table: median %.4f, rms %.2f %%",
                                 target.name, row["table_ratio_median"],
                                 row["table_ratio_rms_percent"])
            except (PipelineError, ValueError) as exc:
                row.update(status="uncalibrated", reason=str(exc))
                warnings.warn(f"{path}: left uncalibrated: {exc}", FluxCalibrationWarning,
                              stacklevel=2)
        rows.append(row)
    if fit is None:
        warnings.warn(f"frame {frame}: spectra left uncalibrated ({reason}); the extraction "
                      "products are its spectra", FluxCalibrationWarning, stacklevel=2)
    if not files:
        log.info("frame %s: the extraction wrote no spectrum; nothing to calibrate", frame)
    _write_listing(out_dir / LISTING_NAME, rows,
                   dict(frame=frame, setup=setup, calibrated=fit is not None,
                        reason="" if fit is not None else reason,
                        sensitivity=(Path(sens_paths[0]).name if sens_paths else ""),
                        flux_unit=FLUX_UNIT,
                        sensitivity_error=("included in VAR" if include_sensitivity_error
                                           else "not in VAR; see HDU CALVAR")))
    if qa_plot:
        if plotted:
            qa_flux.plot_fluxed_spectra(plotted, qa_plot, title=f"{frame} ({setup})",
                                        reference=reference)
        else:
            qa_flux.plot_message(qa_plot, f"{frame}: no calibrated spectrum\n"
                                 f"{reason or 'no spectrum extracted'}", title=frame)
    return rows
