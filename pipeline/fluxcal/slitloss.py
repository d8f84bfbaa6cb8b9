"""Slit losses: the fraction of a star's light that passes the slit.

:func:`gaussian_slit_fraction` is the centred Gaussian image through a slit;
:func:`profile_fwhm_arcsec` reads the width of an extracted profile from a spectrum's
header, and :func:`source_kind` decides whether a spectrum is a point source (divided
by its own slit fraction) or extended (flux through the slit).
"""

import math

import numpy as np

from pipeline.core.checks import positive
from pipeline.core.headers import header_float

__all__ = ["gaussian_slit_fraction", "profile_fwhm_arcsec", "header_slit_fraction",
           "source_kind", "PIXEL_FWHM2"]

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
