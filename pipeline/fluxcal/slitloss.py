"""Slit losses: the fraction of a star's light that passes the slit.

The seeing disc is circularly symmetric on the sky: a Gaussian, or a Moffat (1969)
profile ``I(r) = (beta - 1) / (pi alpha^2) (1 + r^2 / alpha^2)^-beta`` whose extended
wings carry the light a Gaussian of the same FWHM does not have. A slit of width ``w``
(across, coordinate ``x``) with the star's centre at ``x = delta`` passes

* Gaussian: ``T = [erf((w/2 - delta) / (sqrt(2) sigma)) + erf((w/2 + delta) / (sqrt(2) sigma))] / 2``;
* Moffat: the profile integrated over ``y`` (along the slit) is a scaled Student t
  distribution with ``nu = 2 beta - 2`` degrees of freedom and scale ``alpha / sqrt(nu)``,
  so ``T = F_nu((w/2 - delta) sqrt(nu) / alpha) - F_nu((-w/2 - delta) sqrt(nu) / alpha)``
  exactly (:func:`moffat_slit_transmission`), with ``F_nu`` the t distribution's CDF;
  ``beta -> infinity`` at fixed FWHM is the Gaussian.

The centring across the slit cannot be measured from a slit spectrum: it is taken as
unknown with a Gaussian distribution of rms ``centring_rms_arcsec`` about the slit
centre (an instrument property), and the transmission is its mean over that
distribution, with the spread as its uncertainty (:func:`centred_average`).

:func:`gaussian_slit_fraction` is the centred Gaussian of the header FWHM
(:func:`profile_fwhm_arcsec`); :func:`source_kind` decides whether a spectrum is a
point source (divided by its own slit fraction) or extended (flux through the slit).
"""

import math

import numpy as np

from pipeline.core.checks import positive
from pipeline.core.headers import header_float

__all__ = ["gaussian_slit_fraction", "profile_fwhm_arcsec", "header_slit_fraction",
           "source_kind", "PIXEL_FWHM2", "moffat_alpha", "moffat_slit_transmission",
           "gaussian_slit_transmission", "moffat_along_slit", "centred_average",
           "SLIT_LOSS_MODELS"]

#: the slit-loss models an instrument file chooses from (flux_calibration.slit_loss_model)
SLIT_LOSS_MODELS = ("none", "gaussian", "moffat")
_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))


def moffat_alpha(fwhm_arcsec, beta):
    """Core radius ``alpha`` of a Moffat profile of this FWHM: ``FWHM / (2 sqrt(2^(1/beta) - 1))``.

    >>> round(float(moffat_alpha(1.0, 2.5)), 4)
    0.8846
    """
    return np.asarray(fwhm_arcsec, dtype=float) / (2.0 * np.sqrt(2.0 ** (1.0 / beta) - 1.0))


def moffat_slit_transmission(fwhm_arcsec, beta, slit_width_arcsec, offset_arcsec=0.0):
    """Fraction of a circular Moffat image that passes a slit (exact, Student t CDF).

    Parameters
    ----------
    fwhm_arcsec : float or ndarray, arcsec
        Image FWHM (may vary with wavelength: an array).
    beta : float
        Moffat exponent, > 1 (total flux finite); 2.5-4.5 for atmospheric seeing.
    slit_width_arcsec : float, arcsec
    offset_arcsec : float or ndarray, arcsec
        Distance of the image centre from the slit centre, across the slit.

    Examples
    --------
    >>> round(float(moffat_slit_transmission(1.0, 3.0, 1.0)), 4)
    0.6345
    """
    from scipy.stats import t as student_t

    beta = float(beta)
    if not beta > 1.0:
        raise ValueError(f"`beta` must be > 1 (finite total flux), got {beta!r}")
    half = 0.5 * positive(slit_width_arcsec, "slit_width_arcsec")
    nu = 2.0 * beta - 2.0
    scale = np.sqrt(nu) / moffat_alpha(fwhm_arcsec, beta)
    offset = np.asarray(offset_arcsec, dtype=float)
    return (student_t.cdf((half - offset) * scale, nu)
            - student_t.cdf((-half - offset) * scale, nu))


def gaussian_slit_transmission(fwhm_arcsec, slit_width_arcsec, offset_arcsec=0.0):
    """Fraction of a circular Gaussian image that passes a slit (erf).

    >>> round(float(gaussian_slit_transmission(1.0, 1.0)), 4)
    0.761
    """
    from scipy.special import erf

    half = 0.5 * positive(slit_width_arcsec, "slit_width_arcsec")
    root2_sigma = math.sqrt(2.0) * np.asarray(fwhm_arcsec, dtype=float) / _FWHM_PER_SIGMA
    offset = np.asarray(offset_arcsec, dtype=float)
    return 0.5 * (erf((half - offset) / root2_sigma) + erf((half + offset) / root2_sigma))


def moffat_along_slit(y_arcsec, fwhm_arcsec, beta, slit_width_arcsec, offset_arcsec=0.0):
    """The light of a circular Moffat image that passes the slit, per arcsec along it.

    ``p(y) = integral over the slit of I(x, y) dx``; its integral over ``y`` is
    :func:`moffat_slit_transmission`. At fixed ``y`` the Moffat in ``x`` is a Student t
    with ``nu = 2 beta - 1`` and scale ``A / sqrt(nu)``, ``A^2 = alpha^2 + y^2``.

    Examples
    --------
    >>> from scipy.integrate import quad
    >>> total = quad(lambda y: float(moffat_along_slit(y, 1.0, 3.0, 1.0)), -np.inf, np.inf)[0]
    >>> round(total, 4)
    0.6345
    """
    from scipy.special import beta as beta_function
    from scipy.stats import t as student_t

    beta = float(beta)
    half = 0.5 * positive(slit_width_arcsec, "slit_width_arcsec")
    alpha = moffat_alpha(fwhm_arcsec, beta)
    y = np.asarray(y_arcsec, dtype=float)
    a2 = alpha ** 2 + y ** 2
    nu = 2.0 * beta - 1.0
    scale = np.sqrt(nu / a2)
    offset = np.asarray(offset_arcsec, dtype=float)
    inside = (student_t.cdf((half - offset) * scale, nu)
              - student_t.cdf((-half - offset) * scale, nu))
    # I(x, y) = (beta-1)/(pi alpha^2) (a2/alpha^2)^-beta (1 + x^2/a2)^-beta, and
    # integral of (1 + x^2/a2)^-beta dx over the line = sqrt(a2) B(1/2, beta - 1/2)
    line = np.sqrt(a2) * beta_function(0.5, beta - 0.5)
    return (beta - 1.0) / (math.pi * alpha ** 2) * (a2 / alpha ** 2) ** -beta * line * inside


def centred_average(transmission, centring_rms_arcsec, *, n_nodes=9):
    """Mean and standard deviation of ``transmission(offset)`` over an unknown centring.

    The offset across the slit is taken as Gaussian with rms ``centring_rms_arcsec``
    about the slit centre (Gauss-Hermite quadrature with ``n_nodes`` nodes; 0 rms is
    the centred value with no spread).

    Parameters
    ----------
    transmission : callable
        ``transmission(offset_arcsec) -> ndarray`` (any shape, the same for every offset).
    centring_rms_arcsec : float, arcsec

    Returns
    -------
    mean, std : ndarray

    Examples
    --------
    >>> m, s = centred_average(lambda d: gaussian_slit_transmission(1.0, 1.0, d), 0.0)
    >>> round(float(m), 4), float(s)
    (0.761, 0.0)
    """
    rms = positive(centring_rms_arcsec, "centring_rms_arcsec", allow_zero=True)
    if rms == 0.0:
        value = np.asarray(transmission(0.0), dtype=float)
        return value, np.zeros_like(value)
    nodes, weights = np.polynomial.hermite_e.hermegauss(int(n_nodes))
    weights = weights / weights.sum()
    values = np.array([np.asarray(transmission(rms * z), dtype=float) for z in nodes])
    mean = np.tensordot(weights, values, axes=1)
    var = np.tensordot(weights, (values - mean) ** 2, axes=1)
    return mean, np.sqrt(np.maximum(var, 0.0))

#: FWHM^2 added by integrating a Gaussian over 1-px bins: (2 sqrt(2 ln 2))^2 / 12 px^2
PIXEL_FWHM2 = 8.0 * math.log(2.0) / 12.0


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
    centre loses more.

    Examples
    --------
    >>> round(float(gaussian_slit_fraction(5000.0, fwhm_arcsec=1.0,
    ...     reference_wave_angstrom=5000.0, slit_width_arcsec=1.0)), 4)
    0.761
    """
    from scipy.special import erf

    fwhm = positive(fwhm_arcsec, "fwhm_arcsec")
    ref = positive(reference_wave_angstrom, "reference_wave_angstrom")
    width = positive(slit_width_arcsec, "slit_width_arcsec")
    wave = np.asarray(wave_angstrom, dtype=float)
    sigma = fwhm * (wave / ref) ** float(seeing_exponent) / (2.0 * math.sqrt(2.0 * math.log(2.0)))
    return erf(width / (2.0 * math.sqrt(2.0) * sigma))


def profile_fwhm_arcsec(header, wave_angstrom, *, spatial_scale_arcsec_per_px, path="<header>"):
    """FWHM (arcsec) and reference wavelength (Angstrom) of an extracted profile.

    From the header: ``SPATFWHM`` rows with the pixel's own width removed in
    quadrature (a Gaussian integrated over 1-px bins has sigma^2 + 1/12 px^2),
    times ``BINSPAT`` (1 when absent) times the unbinned scale, at ``OBJREFWL``
    (the median wavelength when absent).

    Raises
    ------
    InputFileError
        When SPATFWHM is missing or not a number.

    Examples
    --------
    >>> from astropy.io import fits
    >>> h = fits.Header({"SPATFWHM": math.sqrt(2.5 ** 2 + PIXEL_FWHM2), "BINSPAT": 2})
    >>> fwhm, ref = profile_fwhm_arcsec(h, [4000.0, 6000.0], spatial_scale_arcsec_per_px=0.2)
    >>> round(fwhm, 6), ref
    (1.0, 5000.0)
    """
    fwhm_px = header_float(header, "SPATFWHM", path=path)
    fwhm_px = math.sqrt(max(fwhm_px ** 2 - PIXEL_FWHM2, 0.25 * fwhm_px ** 2))
    binning = header_float(header, "BINSPAT", path=path, default=1.0)
    binning = binning if binning > 0 else 1.0
    ref = header_float(header, "OBJREFWL", path=path, default=math.nan)
    if not math.isfinite(ref):
        ref = float(np.median(wave_angstrom))
    if spatial_scale_arcsec_per_px is None:
        raise ValueError("`spatial_scale_arcsec_per_px` is needed for the slit-loss correction")
    return fwhm_px * binning * float(spatial_scale_arcsec_per_px), ref


def header_slit_fraction(header, wave_angstrom, *, spatial_scale_arcsec_per_px, seeing_exponent,
                         path="<header>"):
    """Gaussian slit fraction of a spectrum from its header (SPATFWHM, SLITWID, ...).

    Returns
    -------
    fraction : ndarray, shape of ``wave_angstrom``
    fwhm_arcsec, reference_wave_angstrom : float
    """
    fwhm, ref = profile_fwhm_arcsec(header, wave_angstrom,
                                    spatial_scale_arcsec_per_px=spatial_scale_arcsec_per_px,
                                    path=path)
    width = header_float(header, "SLITWID", path=path)
    fraction = gaussian_slit_fraction(wave_angstrom, fwhm_arcsec=fwhm, reference_wave_angstrom=ref,
                                      slit_width_arcsec=width, seeing_exponent=seeing_exponent)
    return fraction, fwhm, ref


def source_kind(fwhm_arcsec, standard_fwhm_arcsec, *, extended_fwhm_ratio):
    """'point' when a profile is at most ``extended_fwhm_ratio`` x the standard's, else 'extended'.

    >>> source_kind(1.1, 1.0, extended_fwhm_ratio=1.5), source_kind(2.0, 1.0, extended_fwhm_ratio=1.5)
    ('point', 'extended')
    """
    return "point" if fwhm_arcsec <= extended_fwhm_ratio * standard_fwhm_arcsec else "extended"
