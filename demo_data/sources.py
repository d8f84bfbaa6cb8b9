"""Light sources, atmosphere and throughput of the invented demo night.

Everything here is the simulator's own physics; the pipeline never imports it.
Units: wavelengths in Angstrom (air), flux densities ``f_lambda`` in
erg s^-1 cm^-2 A^-1, photon rates in photons s^-1.

Contents
--------
* line tables copied from the project's shared reference data (``data/``),
* arc lamps (Hg I, Ar I, Ne I, He I lines) and the quartz-halogen flat lamp,
* the Tarn Ridge atmosphere: Rayleigh + aerosol power law + ozone
  extinction, O2 telluric bands,
* the throughput chain: telescope mirrors, spectrograph optics, blazed
  grating efficiency (scalar theory), order-blocking filter, CCD QE,
* the night sky (continuum + emission lines) and the invented targets.
"""

import csv
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy.special import erf

from .observing import C_KM_S, air_to_vac, doppler_air_wavelength, vac_to_air

__all__ = [
    "HC_ERG_ANGSTROM", "TELESCOPE_AREA_CM2", "DATA_DIR", "read_arc_lines", "read_sky_lines",
    "LAMP_SPECIES", "lamp_lines", "qth_photon_shape", "extinction_mag_per_airmass",
    "telluric_transmission", "throughput", "grating_efficiency", "sky_continuum",
    "Target", "EmissionLine", "TARGETS", "standard_star_flux", "RAYLEIGH_PER_ARCSEC2",
]

DATA_DIR = Path(__file__).resolve().parent / "data"

#: h*c in erg Angstrom (CODATA exact h and c).
HC_ERG_ANGSTROM = 6.62607015e-27 * 2.99792458e18
#: Tarn Ridge 1.8-m (invented): 1.80 m primary, 0.55 m central obstruction.
TELESCOPE_AREA_CM2 = 0.25 * np.pi * (180.0 ** 2 - 55.0 ** 2)
#: 1 rayleigh = 1e6/(4 pi) photons s^-1 cm^-2 sr^-1; 1 sr = (180/pi * 3600)^2 arcsec^2.
RAYLEIGH_PER_ARCSEC2 = 1.0e6 / (4.0 * np.pi) / (180.0 / np.pi * 3600.0) ** 2


# --------------------------------------------------------------------------- line tables
def _read_csv(path):
    with open(path, newline="") as fh:
        return list(csv.DictReader(line for line in fh if not line.startswith("#")))


def read_arc_lines():
    """The simulator's arc line table (``data/arc_lines_air.csv``) as a list of dicts."""
    rows = _read_csv(DATA_DIR / "arc_lines_air.csv")
    for r in rows:
        r["wavelength_air_angstrom"] = float(r["wavelength_air_angstrom"])
        r["relative_intensity"] = (float(r["relative_intensity"]) if r["relative_intensity"]
                                   else None)
    return rows


def read_sky_lines():
    """The simulator's night-sky line table (``data/sky_lines_air.csv``) as a list of dicts."""
    rows = _read_csv(DATA_DIR / "sky_lines_air.csv")
    for r in rows:
        r["wavelength_air_angstrom"] = float(r["wavelength_air_angstrom"])
        r["intensity_rayleigh"] = float(r["intensity_rayleigh"])
    return rows


# --------------------------------------------------------------------------- lamps
#: LAMPS header item -> species it emits (the simulator's own mapping).
LAMP_SPECIES = {"HgAr": ("Hg I", "Ar I"), "Ne": ("Ne I",), "He": ("He I",), "Ar": ("Ar I",),
                # the WREN calibration unit's names (demo_data/wren.py)
                "NEON": ("Ne I",), "KRYPTON": ("Kr I",), "XENON": ("Xe I",)}

#: Photon rate (photons/s entering the slit per unbinned slit pixel) per unit of the
#: source's relative intensity, per species. The scale between species is the
#: simulator's choice (the reference intensities rank lines within a species only);
#: it is set so that the strongest line of each species in a 10-s arc gives a
#: few 1e4 electrons in its peak binned pixel.
SPECIES_PHOTON_SCALE = {"Hg I": 14.0, "Ar I": 0.5, "Ne I": 0.12, "He I": 20.0, "Kr I": 1.2,
                        "Xe I": 0.9}
#: Intensity given to lines whose source lists none (simulator's choice).
BLANK_INTENSITY = {"Hg I": 40.0}


def lamp_lines(lamps):
    """Arc lines emitted by a lamp combination.

    Parameters
    ----------
    lamps : str
        Comma- or plus-separated LAMPS value, e.g. ``'HgAr,Ne'``.

    Returns
    -------
    wave_angstrom : ndarray, shape (n,)
    rate : ndarray, shape (n,)
        Photons/s per unbinned slit pixel entering the spectrograph.
    species : list of str
    """
    items = [s.strip() for s in lamps.replace("+", ",").split(",") if s.strip()]
    unknown = [s for s in items if s not in LAMP_SPECIES]
    if unknown:
        raise ValueError(f"`lamps`: unknown lamp(s) {unknown}; expected items of "
                         f"{sorted(LAMP_SPECIES)}")
    wanted = {sp for item in items for sp in LAMP_SPECIES[item]}
    waves, rates, species = [], [], []
    for row in read_arc_lines():
        sp = row["species"]
        if sp not in wanted:
            continue
        inten = row["relative_intensity"]
        if inten is None:
            inten = BLANK_INTENSITY.get(sp, 0.0)
        waves.append(row["wavelength_air_angstrom"])
        rates.append(inten * SPECIES_PHOTON_SCALE[sp])
        species.append(sp)
    return np.array(waves), np.array(rates), species


def _planck_photons(wave_angstrom, temperature_k):
    """Planck photon spectral radiance, arbitrary scale (photons per A)."""
    lam_cm = np.asarray(wave_angstrom, float) * 1e-8
    x = 1.4387769 / (lam_cm * temperature_k)  # h c / (lambda k T), c2 = 1.4387769 cm K
    return lam_cm ** -4 / np.expm1(x)


def qth_photon_shape(wave_angstrom, *, temperature_k=3100.0):
    """Quartz-halogen lamp photon spectrum normalised to 1 at 6000 A."""
    return _planck_photons(wave_angstrom, temperature_k) / _planck_photons(6000.0, temperature_k)


# --------------------------------------------------------------------------- atmosphere
@dataclass(frozen=True)
class SiteAtmosphere:
    """Physical extinction model of the invented Tarn Ridge site (2650 m).

    Rayleigh optical depth at sea level ``0.008569 l^-4 (1 + 0.0113 l^-2 + 0.00013 l^-4)``
    (l in micron; Hansen & Travis 1974, Space Sci. Rev. 16, 527; from memory),
    scaled by the pressure ratio ``exp(-h/H)``; aerosol ``tau_a (l/5500 A)^-alpha``;
    ozone: Chappuis band approximated by a Gaussian in wavelength and the Huggins
    band by an exponential rise below 3400 A (cross-sections from memory, rounded).
    """

    height_m: float = 2650.0
    scale_height_m: float = 7996.0
    aerosol_tau_5500: float = 0.035
    aerosol_alpha: float = 1.3
    ozone_column_du: float = 260.0

    def optical_depth(self, wave_angstrom):
        lam_um = np.asarray(wave_angstrom, float) * 1e-4
        tau_r = (0.008569 * lam_um ** -4 * (1 + 0.0113 * lam_um ** -2 + 0.00013 * lam_um ** -4)
                 * np.exp(-self.height_m / self.scale_height_m))
        tau_a = self.aerosol_tau_5500 * (np.asarray(wave_angstrom, float) / 5500.0) ** -self.aerosol_alpha
        lam = np.asarray(wave_angstrom, float)
        sigma_cm2 = (4.8e-21 * np.exp(-0.5 * ((lam - 6020.0) / 650.0) ** 2)
                     + 1.3e-19 * np.exp(-(lam - 3100.0) / 80.0))
        column = self.ozone_column_du * 2.6868e16  # molecules cm^-2 per Dobson unit
        tau_o = sigma_cm2 * column
        return tau_r + tau_a + tau_o


SITE = SiteAtmosphere()


def extinction_mag_per_airmass(wave_angstrom, *, site=SITE):
    """Mean extinction of the site (mag per airmass), no telluric bands."""
    return 2.5 / np.log(10.0) * site.optical_depth(wave_angstrom)


#: O2 bands (start, end, depth at airmass 1), Angstrom: B band and A band (rounded, from memory).
TELLURIC_BANDS = ((6867.0, 6930.0, 0.25), (7594.0, 7690.0, 0.55))


def telluric_transmission(wave_angstrom, airmass):
    """Transmission of the O2 B and A bands (not in the mean extinction table).

    Each band is a smooth-edged trough whose optical depth scales as ``airmass**0.6``
    (saturated-band behaviour, common practice).
    """
    lam = np.asarray(wave_angstrom, float)
    tau = np.zeros_like(lam)
    for lo, hi, depth in TELLURIC_BANDS:
        shape = 0.5 * (erf((lam - lo) / 4.0) - erf((lam - hi) / 12.0))
        tau += -np.log(1.0 - depth) * shape
    return np.exp(-tau * airmass ** 0.6)


# --------------------------------------------------------------------------- throughput
def grating_efficiency(wave_angstrom, optics, y_px=None, *, blaze_wavelength_angstrom=None,
                       peak=0.78):
    """Blazed-grating efficiency from scalar theory.

    ``eta = peak * sinc^2(pi d cos(theta_b) (sin(alpha - theta_b) + sin(beta - theta_b)) / lambda)``
    with the blaze angle from the Littrow blaze wavelength,
    ``sin(theta_b) = m lambda_B / (2 d)`` (scalar blaze theory, e.g. Schroeder; from memory).
    """
    lam = np.asarray(wave_angstrom, float)
    if blaze_wavelength_angstrom is None:
        blaze_wavelength_angstrom = getattr(optics, "blaze_wavelength_angstrom", 5500.0)
    y = optics.y_centre_px if y_px is None else y_px
    d = optics.groove_spacing_angstrom
    theta_b = np.arcsin(optics.order * blaze_wavelength_angstrom / (2 * d))
    beta = optics.beta_of_wavelength(lam, y)
    u = d * np.cos(theta_b) * (np.sin(optics.alpha_rad - theta_b) + np.sin(beta - theta_b)) / lam
    return peak * np.sinc(u) ** 2  # numpy sinc(u) = sin(pi u)/(pi u)


def ccd_qe(wave_angstrom):
    """Smooth CCD quantum efficiency (invented; broad-band coated, thinned)."""
    lam = np.asarray(wave_angstrom, float)
    return 0.92 * np.exp(-0.5 * ((lam - 6200.0) / 2900.0) ** 2) * (1 - np.exp(-(lam - 3000.0) / 500.0))


def filter_transmission(wave_angstrom, filter_name):
    """Order-blocking filter transmission: 'NONE'/'CLEAR' = 1; 'GG495', 'GG395', 'LP570' long-pass."""
    lam = np.asarray(wave_angstrom, float)
    name = (filter_name or "NONE").upper()
    if name in ("NONE", "CLEAR", ""):
        return np.ones_like(lam)
    cut = {"GG495": 4950.0, "GG395": 3950.0, "LP570": 5700.0}.get(name)
    if cut is None:
        raise ValueError(f"`filter_name`: unknown filter {filter_name!r}; expected NONE, CLEAR, "
                         "GG395, GG495 or LP570")
    return 0.91 / (1.0 + np.exp(-(lam - cut) / 35.0))


def spectrograph_throughput(wave_angstrom, optics, filter_name, y_px=None):
    """Spectrograph only (collimator, camera, grating, filter, CCD QE): lamps see this."""
    lam = np.asarray(wave_angstrom, float)
    optics_t = 0.82 * (1 - 0.25 * np.exp(-(lam - 3200.0) / 600.0))
    return optics_t * grating_efficiency(lam, optics, y_px) * filter_transmission(lam, filter_name) \
        * ccd_qe(lam)


def throughput(wave_angstrom, optics, filter_name, y_px=None):
    """Telescope (two aluminium mirrors, 0.89 each) times the spectrograph."""
    return 0.89 ** 2 * spectrograph_throughput(wave_angstrom, optics, filter_name, y_px)


# --------------------------------------------------------------------------- sky
def sky_continuum(wave_angstrom):
    """Dark-sky continuum surface brightness, erg/s/cm2/A/arcsec^2 (invented smooth model).

    About V = 21.8 mag/arcsec^2 at 5500 A, rising slowly to the red.
    """
    lam = np.asarray(wave_angstrom, float)
    return 6.5e-18 * (lam / 5500.0) ** 0.8 * (1 + 0.15 * np.exp(-0.5 * ((lam - 5900.0) / 300.0) ** 2))


# --------------------------------------------------------------------------- targets
@dataclass(frozen=True)
class EmissionLine:
    """An emission line of a target: rest VACUUM wavelength (A), flux through the slit (erg/s/cm2)."""

    name: str
    rest_wavelength_vacuum_angstrom: float
    flux_erg_s_cm2: float

    @property
    def rest_wavelength_angstrom(self):
        """Rest wavelength in standard air (Ciddor 1996), Angstrom."""
        return float(vac_to_air(self.rest_wavelength_vacuum_angstrom))


def _line(name, rest_air_angstrom, flux):
    """An :class:`EmissionLine` from a rest AIR wavelength (from memory), stored in vacuum."""
    return EmissionLine(name, float(air_to_vac(rest_air_angstrom)), flux)


#: emission lines of the invented galaxies: name, rest AIR wavelength (A, from memory)
_GALAXY_LINES_AIR = (("[O II] 3726", 3726.03), ("[O II] 3729", 3728.82), ("H beta", 4861.33),
                     ("[O III] 4959", 4958.91), ("[O III] 5007", 5006.84),
                     ("[N II] 6548", 6548.05), ("H alpha", 6562.80), ("[N II] 6583", 6583.45),
                     ("[S II] 6716", 6716.44), ("[S II] 6731", 6730.82))


def _galaxy_lines(fluxes_erg_s_cm2):
    """The galaxy line list with these fluxes (one per line of ``_GALAXY_LINES_AIR``)."""
    return tuple(_line(name, air, flux) for (name, air), flux in zip(_GALAXY_LINES_AIR, fluxes_erg_s_cm2))


def _blackbody_flambda(wave_angstrom, temperature_k):
    lam_cm = np.asarray(wave_angstrom, float) * 1e-8
    return lam_cm ** -5 / np.expm1(1.4387769 / (lam_cm * temperature_k))


#: Broad Balmer absorption lines of the invented standard: (centre A VACUUM, depth, FWHM A);
#: the centres are rest air wavelengths from memory converted with Ciddor (1996).
_BALMER = tuple((float(air_to_vac(c)), d, w) for c, d, w in
                ((6562.80, 0.45, 42.0), (4861.33, 0.52, 48.0), (4340.47, 0.50, 46.0),
                 (4101.74, 0.48, 44.0), (3970.07, 0.45, 40.0), (3889.05, 0.40, 34.0)))


def hot_star_flux(wave_angstrom, *, scale_5500, temperature_k, balmer_depth=1.0):
    """Blackbody f_lambda scaled at 5500 A with broad Balmer lines (vacuum wavelengths)."""
    lam = np.asarray(wave_angstrom, float)
    f = scale_5500 * _blackbody_flambda(lam, temperature_k) / _blackbody_flambda(5500.0, temperature_k)
    f = f * (1 - 0.35 * balmer_depth / (1 + np.exp((lam - 3680.0) / 25.0)))
    for centre, depth, fwhm in _BALMER:
        f = f * (1 - balmer_depth * depth / (1 + ((lam - centre) / (0.5 * fwhm)) ** 2))
    return f


def standard_star_flux(wave_angstrom):
    """Intrinsic f_lambda (erg/s/cm2/A) of the invented standard TRS-17 at VACUUM wavelengths.

    A 16000-K blackbody scaled to 4.0e-13 at 5500 A, with broad Lorentzian Balmer
    absorption lines (rest air wavelengths from memory, converted to vacuum) and a
    mild Balmer jump. The star is at rest in the barycentric frame.
    """
    lam = np.asarray(wave_angstrom, float)
    f = 4.0e-13 * _blackbody_flambda(lam, 16000.0) / _blackbody_flambda(5500.0, 16000.0)
    f = f * (1 - 0.35 / (1 + np.exp((lam - 3680.0) / 25.0)))
    for centre, depth, fwhm in _BALMER:
        f = f * (1 - depth / (1 + ((lam - centre) / (0.5 * fwhm)) ** 2))
    return f


def _star_flux(scale_5500, temperature_k):
    def flux(wave_angstrom):
        lam = np.asarray(wave_angstrom, float)
        return scale_5500 * _blackbody_flambda(lam, temperature_k) / _blackbody_flambda(5500.0, temperature_k)
    return flux


def _galaxy_continuum_of(scale_5000, redshift):
    def continuum(wave_angstrom):
        """Barycentric-frame continuum of a galaxy (vacuum wavelengths): red population, 4000-A break."""
        rest = np.asarray(wave_angstrom, float) / (1 + redshift)
        return scale_5000 * (rest / 5000.0) ** 0.6 * (1 - 0.45 / (1 + np.exp((rest - 4000.0) / 40.0)))
    return continuum


_galaxy_continuum = _galaxy_continuum_of(4.5e-17, 0.08231)


@dataclass(frozen=True)
class Target:
    """An invented target.

    ``kind`` is 'point' (a star: seeing profile, slit losses applied) or
    'extended' (a galaxy: ``continuum``/lines are the flux that enters the slit,
    spread along the slit by a profile; no further slit loss).

    ``continuum(wave)`` is f_lambda in the BARYCENTRIC frame at VACUUM wavelengths
    (redshift included); line rest wavelengths are vacuum, ``redshift`` barycentric.
    :meth:`f_lambda_at_telescope` gives what arrives above the atmosphere at air
    wavelengths for an observer whose velocity correction is ``v_corr``.
    """

    name: str
    kind: str
    ra_deg: float
    dec_deg: float
    continuum: object  # callable: wave_angstrom -> f_lambda, erg/s/cm2/A
    redshift: float = 0.0
    lines: tuple = ()
    #: extended sources: exponential scale length of the continuum along the slit (arcsec)
    scale_length_arcsec: float = 0.0
    #: extended sources: line-emitting components (offset arcsec, sigma arcsec, weight)
    line_components: tuple = ()
    #: projected rotation: v(s) = v_max * tanh(s / r_turn) (km/s, arcsec)
    rotation_vmax_km_s: float = 0.0
    rotation_rturn_arcsec: float = 1.0
    velocity_dispersion_km_s: float = 0.0
    info: dict = field(default_factory=dict)

    def f_lambda_at_telescope(self, wave_air_angstrom, v_corr_km_s=0.0):
        """f_lambda (erg/s/cm2/A) above the atmosphere at AIR wavelengths, topocentric.

        ``lambda_vac = air_to_vac(lambda_air)`` (Ciddor 1996); the barycentric
        wavelength is ``lambda_vac (1 + v_corr/c)``, with astropy's correction
        convention ``1 + v_bary/c = (1 + v_topo/c)(1 + v_corr/c)``. Terms of order
        v/c ~ 1e-4 and n - 1 ~ 3e-4 in the amplitude of f_lambda (photon energy,
        arrival rate, d lambda_vac / d lambda_air) are neglected.
        """
        lam_vac = air_to_vac(wave_air_angstrom)
        return self.continuum(lam_vac * (1.0 + v_corr_km_s / C_KM_S))

    def line_air_wavelengths(self, v_corr_km_s=0.0):
        """Air wavelengths at the telescope of the emission lines (rest vacuum x (1+z), Doppler)."""
        rest = np.array([ln.rest_wavelength_vacuum_angstrom for ln in self.lines], float)
        return doppler_air_wavelength(rest, self.redshift, v_corr_km_s)


TARGETS = {
    "TRS-17": Target("TRS-17", "point", 168.4400, -31.6120, standard_star_flux,
                     info={"role": "spectrophotometric standard",
                           "table": "demo_data/standards/TRS-17.ecsv"}),
    "TRV-9": Target("TRV-9", "point", 176.5830, -14.1380, _star_flux(2.5e-16, 5600.0),
                    info={"role": "faint continuum star (5600 K blackbody)"}),
    "TRB-2": Target("TRB-2", "point", 155.0110, -5.9050, _star_flux(5.0e-12, 9500.0),
                    info={"role": "bright star that saturates the detector (9500 K blackbody)"}),
    "TRG-511": Target(
        "TRG-511", "extended", 171.9150, -6.4470, _galaxy_continuum, redshift=0.08231,
        lines=_galaxy_lines((0.55e-15, 0.72e-15, 0.60e-15, 0.40e-15, 1.20e-15, 0.24e-15, 2.00e-15,
                             0.72e-15, 0.40e-15, 0.30e-15)),
        scale_length_arcsec=2.0,
        line_components=((0.0, 0.8, 0.5), (-3.2, 0.9, 0.3), (4.0, 1.1, 0.2)),
        rotation_vmax_km_s=110.0, rotation_rturn_arcsec=2.5, velocity_dispersion_km_s=55.0,
        info={"role": "emission-line galaxy (rest wavelengths of its lines: air values from memory, stored in vacuum via Ciddor 1996); redshift barycentric, vacuum"}),
}


def _wren_standard_flux(wave_angstrom):
    """Intrinsic f_lambda of the invented WREN standard FHV-S4 (13500-K blackbody, Balmer lines)."""
    return hot_star_flux(wave_angstrom, scale_5500=1.5e-12, temperature_k=13500.0, balmer_depth=0.8)


#: Targets of the second invented instrument's night (WREN at Fellhaven Observatory,
#: demo_data/wren.py). Coordinates chosen for the night of 2026-10-07 (see wren.py).
WREN_TARGETS = {
    "FHV-S4": Target("FHV-S4", "point", 345.1200, 31.4400, _wren_standard_flux,
                     info={"role": "spectrophotometric standard (13500 K blackbody, Balmer lines)",
                           "table": "demo_data/standards/FHV-S4.ecsv"}),
    "FHV-F9": Target("FHV-F9", "point", 352.6100, 27.0500, _star_flux(1.2e-16, 4800.0),
                     info={"role": "faint star (4800 K blackbody)"}),
    "FHV-F2": Target("FHV-F2", "point", 6.4523, 11.1528, _star_flux(6.0e-16, 6500.0),
                     info={"role": "field star on the slit of the galaxy frames (6500 K blackbody)"}),
    "FHV-G27": Target(
        "FHV-G27", "extended", 6.4485, 11.1514, _galaxy_continuum_of(3.2e-18, 0.1240),
        redshift=0.1240,
        lines=_galaxy_lines((0.9e-16, 1.1e-16, 0.8e-16, 0.5e-16, 1.5e-16, 0.35e-16, 2.6e-16,
                             1.0e-16, 0.55e-16, 0.42e-16)),
        scale_length_arcsec=2.5,
        line_components=((0.0, 1.0, 0.6), (2.7, 0.8, 0.4)),
        rotation_vmax_km_s=140.0, rotation_rturn_arcsec=2.0, velocity_dispersion_km_s=70.0,
        info={"role": "faint extended emission-line galaxy (continuum ~1 e- per pixel per row "
                      "in 1800 s); rest wavelengths as for TRG-511; redshift barycentric, vacuum"}),
}

#: target catalogues by instrument (``Instrument.catalogue``)
CATALOGUES = {"rls": TARGETS, "wren": WREN_TARGETS}
