"""Observing physics of the demo nights: seeing and slit transmission, air/vacuum, Doppler.

The simulator's own computations (it never imports the reduction pipeline):

* star images through a slit: a circular Moffat (1969) or Gaussian seeing
  profile, decentred across a slit whose width varies along its length, each
  slit row integrated exactly across the slit and numerically along the slit,
* the refractive index of standard air (Ciddor 1996) and vacuum <-> air
  wavelength conversion,
* the barycentric and heliocentric velocity correction of the observer
  (astropy, explicit site, builtin ephemeris, no download).

References
----------
Moffat, A.F.J. (1969), A&A 3, 455 (the profile; from memory).
Ciddor, P.E. (1996), Applied Optics 35, 1566 (standard-air dispersion formula, as
read in ../shared/reference/README.md, source key RII).
"""

import numpy as np
from scipy.special import beta as beta_function
from scipy.special import betainc, erf

__all__ = ["moffat_alpha", "slit_row_weights", "refractivity_ciddor1996", "vac_to_air",
           "air_to_vac", "velocity_corrections", "offline_earth_orientation",
           "doppler_air_wavelength"]

C_KM_S = 299792.458

# =============================================================================== seeing
_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(4)


def moffat_alpha(fwhm, beta):
    """Moffat core radius ``alpha`` of a profile ``(1 + r^2/alpha^2)^-beta`` of this FWHM."""
    return np.asarray(fwhm, float) / (2.0 * np.sqrt(2.0 ** (1.0 / beta) - 1.0))


def _moffat_strip(a, b, y, alpha, beta):
    """Integral over x in [a, b] of the normalised 2-D Moffat at height y (per unit y).

    ``I(x, y) = (beta - 1)/(pi alpha^2) (1 + (x^2 + y^2)/alpha^2)^-beta``. At fixed y,
    ``(1 + (x^2+y^2)/alpha^2)^-beta = (1 + y^2/alpha^2)^-beta (1 + x^2/c^2)^-beta`` with
    ``c^2 = alpha^2 + y^2``, and ``int_0^T (1+t^2)^-beta dt = B(1/2, beta-1/2)/2 *
    I_{T^2/(1+T^2)}(1/2, beta - 1/2)`` (substitution u = t^2/(1+t^2); regularised
    incomplete beta function).
    """
    c = np.sqrt(alpha ** 2 + y ** 2)
    half_b = 0.5 * beta_function(0.5, beta - 0.5)

    def g(t):
        return np.sign(t) * half_b * betainc(0.5, beta - 0.5, t * t / (1.0 + t * t))

    norm = (beta - 1.0) / (np.pi * alpha ** 2)
    return norm * (1.0 + (y / alpha) ** 2) ** -beta * c * (g(b / c) - g(a / c))


def _gauss_strip(a, b, y, sigma):
    """Integral over x in [a, b] of the normalised 2-D Gaussian at height y (per unit y)."""
    s2 = np.sqrt(2.0) * sigma
    return (0.5 * (erf(b / s2) - erf(a / s2))
            * np.exp(-0.5 * (y / sigma) ** 2) / (np.sqrt(2 * np.pi) * sigma))


def slit_row_weights(row_edges_arcsec, centre_arcsec, fwhm_arcsec, *, beta=None,
                     offset_arcsec=0.0, half_width_arcsec):
    """Fraction of a star's light entering the slit in each slit row.

    Parameters
    ----------
    row_edges_arcsec : ndarray, shape (n_rows + 1,)
        Edges of the slit rows along the slit (arcsec, increasing).
    centre_arcsec : float or ndarray, shape (m,)
        Position of the star along the slit (arcsec), one per column/wavelength.
    fwhm_arcsec : float or ndarray, shape (m,)
        Seeing FWHM (broadcast with ``centre_arcsec``).
    beta : float or None
        Moffat exponent (> 1); None = Gaussian profile.
    offset_arcsec : float
        Centre of the star across the slit, measured from the slit's mid-line.
    half_width_arcsec : callable
        ``half_width_arcsec(s)`` -> local half width of the slit (arcsec) at slit
        positions ``s`` (arcsec): the slit-width ripple.

    Returns
    -------
    ndarray, shape (n_rows, m)
        Fraction of the star's total light (above the atmosphere) that enters
        the slit within each row. Summed over rows: the slit transmission.

    Notes
    -----
    Across the slit the integral is exact (erf, or the incomplete beta function
    for the Moffat); along the slit a 4-point Gauss-Legendre rule per row (rows
    much narrower than the seeing FWHM: the rule is exact for polynomials of
    degree 7 across a row; tests compare with a 2-D adaptive quadrature).
    """
    edges = np.asarray(row_edges_arcsec, float)
    centre = np.atleast_1d(np.asarray(centre_arcsec, float))
    fwhm = np.broadcast_to(np.asarray(fwhm_arcsec, float), centre.shape)
    lo, hi = edges[:-1], edges[1:]
    half = 0.5 * (hi - lo)
    mid = 0.5 * (hi + lo)
    out = np.zeros((lo.size, centre.size))
    for node, wt in zip(_GL_NODES, _GL_WEIGHTS):
        s = mid + half * node                                    # (n_rows,)
        hw = np.asarray(half_width_arcsec(s), float)[:, None]
        a = -hw - offset_arcsec
        b = hw - offset_arcsec
        y = s[:, None] - centre[None, :]
        if beta is None:
            f = _gauss_strip(a, b, y, fwhm[None, :] / (2.0 * np.sqrt(2.0 * np.log(2.0))))
        else:
            f = _moffat_strip(a, b, y, moffat_alpha(fwhm, beta)[None, :], float(beta))
        out += wt * half[:, None] * f
    return out


# =============================================================================== air / vacuum
def refractivity_ciddor1996(wave_vacuum_angstrom):
    """``n - 1`` of standard air (dry, 15 C, 101.325 kPa, 450 ppm CO2), Ciddor (1996).

    ``n - 1 = 0.05792105/(238.0185 - s^2) + 0.00167917/(57.362 - s^2)``, ``s = 1e4/lambda_vac``
    in 1/um (Ciddor 1996, Applied Optics 35, 1566; formula as in
    ../shared/reference/README.md, source key RII).
    """
    s2 = (1.0e4 / np.asarray(wave_vacuum_angstrom, float)) ** 2
    return 0.05792105 / (238.0185 - s2) + 0.00167917 / (57.362 - s2)


def vac_to_air(wave_vacuum_angstrom):
    """Vacuum -> air wavelength (Angstrom), standard air of Ciddor (1996): ``lambda_vac / n``."""
    lam = np.asarray(wave_vacuum_angstrom, float)
    return lam / (1.0 + refractivity_ciddor1996(lam))


def air_to_vac(wave_air_angstrom):
    """Air -> vacuum wavelength (Angstrom): iterate ``lambda_vac = lambda_air n(lambda_vac)``.

    Four iterations converge to < 1e-9 A over 3000-11000 A.
    """
    air = np.asarray(wave_air_angstrom, float)
    vac = air.copy()
    for _ in range(4):
        vac = air * (1.0 + refractivity_ciddor1996(vac))
    return vac


# =============================================================================== Doppler
def velocity_corrections(ra_deg, dec_deg, time_utc_iso, site):
    """Barycentric and heliocentric radial-velocity corrections of an observer (km/s).

    astropy ``SkyCoord.radial_velocity_correction`` with an explicit
    ``EarthLocation`` (``site``: latitude_deg, longitude_deg, height_m) and the
    builtin ephemeris; Earth-orientation tables are never downloaded
    (:func:`offline_earth_orientation`: the bundled table is used whatever today's
    date is).

    Returns
    -------
    dict
        ``barycentric_km_s``, ``heliocentric_km_s`` (v_true = v_measured + v_corr,
        astropy's convention), ``iers_note``.
    """
    import astropy.units as u
    from astropy.coordinates import EarthLocation, SkyCoord
    from astropy.time import Time
    loc = EarthLocation.from_geodetic(site["longitude_deg"] * u.deg, site["latitude_deg"] * u.deg,
                                      site["height_m"] * u.m)
    coord = SkyCoord(ra_deg * u.deg, dec_deg * u.deg, frame="icrs")
    t = Time(time_utc_iso, scale="utc")
    offline_earth_orientation()
    vb = coord.radial_velocity_correction(kind="barycentric", obstime=t, location=loc)
    vh = coord.radial_velocity_correction(kind="heliocentric", obstime=t, location=loc)
    return {"barycentric_km_s": float(vb.to_value(u.km / u.s)),
            "heliocentric_km_s": float(vh.to_value(u.km / u.s)),
            "iers_note": _iers_note()}


def offline_earth_orientation():
    """Use astropy's bundled Earth-orientation (IERS) tables, never a download.

    Sets ``iers.conf.auto_download = False`` and ``iers.conf.auto_max_age = None``
    for the process (../shared/library-notes.md: otherwise dates past the bundled
    predictions, or a wall clock 30 days past them, raise). Set once: changing these
    settings makes astropy reload its tables (~1 s per change).
    """
    from astropy.utils import iers

    if iers.conf.auto_download or iers.conf.auto_max_age is not None:
        iers.conf.auto_download = False
        iers.conf.auto_max_age = None


def _iers_note():
    import astropy
    try:
        import astropy_iers_data
        version = astropy_iers_data.__version__
    except ImportError:  # older astropy bundles the tables itself
        version = "bundled with astropy"
    return (f"astropy {astropy.__version__}, builtin ephemeris, IERS tables astropy-iers-data "
            f"{version}, auto_download=False, auto_max_age=None")


def doppler_air_wavelength(wave_rest_vacuum_angstrom, redshift, v_corr_km_s):
    """Air wavelength at the telescope of a line at rest vacuum wavelength.

    ``lambda_bary = lambda_rest (1 + z)`` (z barycentric, vacuum);
    ``lambda_topo = lambda_bary / (1 + v_corr/c)`` (astropy's correction convention
    ``1 + v_bary/c = (1 + v_topo/c)(1 + v_corr/c)``); then vacuum -> air (Ciddor 1996).
    """
    lam = np.asarray(wave_rest_vacuum_angstrom, float) * (1.0 + redshift)
    return vac_to_air(lam / (1.0 + v_corr_km_s / C_KM_S))
