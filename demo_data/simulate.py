"""Simulate raw frames of the invented RLS spectrograph, with their truth.

Command line::

    python -m demo_data.simulate --out DIR [--size small|full] [--seed N]

writes the night's raw FITS frames into ``DIR`` and the truth into
``DIR/truth/`` (format in demo_data/README.md).

Python::

    import demo_data.simulate as sim
    inst = sim.make_instrument()                       # true instrument, small (2x2 binned)
    arc = sim.make_arc(inst, 8.93, lamps="HgAr,Ne")    # SimFrame: raw, header, truth
    wave = arc.truth.wavelength_map()                  # (256, 1024) canonical, Angstrom
    night = sim.make_night("/tmp/night")               # the whole demo night

The simulator never imports the reduction pipeline: it is the independent
truth the pipeline is tested against.
"""

import argparse
import datetime as _dt
import json
import sys
import time
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
from astropy.io import fits
from scipy.special import ndtr

from . import sources as src
from .detector import Detector, raw_to_canonical
from .observing import air_to_vac, offline_earth_orientation, slit_row_weights, velocity_corrections
from .optics import GratingOptics
from .render import Grid, gaussian_row_weights, render_continuum, render_lines, wavelength_edges

__all__ = [
    "DEFAULT_SEED", "Instrument", "make_instrument", "SimFrame", "FrameTruth", "FrameSpec",
    "make_bias", "make_flat", "make_arc", "make_science", "make_frame", "night_plan",
    "make_night", "write_frame", "write_truth", "airmass_at", "main",
]

DEFAULT_SEED = 314
SITE = {"name": "Tarn Ridge Observatory", "latitude_deg": -27.81, "longitude_deg": -69.44,
        "height_m": 2650.0}
TELESCOPE = "Tarn Ridge 1.8-m"
INSTRUMENT_NAME = "RLS"
NIGHT_DATE = "2026-05-28"  # local date of the evening


# =============================================================================== instrument
@dataclass(frozen=True)
class Instrument:
    """The TRUE instrument (what nature does), as opposed to the observer's nominal config.

    Parameters
    ----------
    detector : Detector
    tilt_error_deg : float
        True tilt minus header GRTILT, for every setup (encoder zero point).
    tilt_error_by_setup : dict, optional
        Per nominal tilt (rounded to 0.01 deg, as str) override of ``tilt_error_deg``.
    focal_length_error : float
        Fractional error of the nominal 250-mm camera focal length.
    detector_offset_px : float
        Camera axis minus detector centre along X (unbinned px).
    distortion_a3_px : float
        Cubic distortion amplitude at the detector ends (unbinned px).
    line_tilt_px_per_px : float
        dX/dY of monochromatic lines (unbinned px per unbinned px).
    psf_sigma_px : float
        Gaussian sigma of the camera image (unbinned px).
    slit_width_arcsec, spatial_scale_arcsec : float
        Slit width and scale along the slit (arcsec per unbinned px).
    slit_rows : (int, int)
        First and last illuminated unbinned slit rows.
    slit_ripple : tuple of (amplitude, period_px, phase_rad)
        Relative slit-width variation along the slit (:meth:`slit_width_ripple`);
        ``()`` = a perfectly straight slit.
    name : str
        Instrument ('RLS' or 'WREN'): selects the header conventions.
    blaze_wavelength_angstrom, telescope_area_cm2 : float
    atmosphere : sources.SiteAtmosphere
        The site's extinction model.
    site : dict
        name, latitude_deg, longitude_deg (east positive), height_m.
    catalogue : str
        Key of ``sources.CATALOGUES``: the targets of the night.
    header_airmass_at : {'mid', 'start'}
        Which airmass the night's headers carry.
    """

    detector: Detector = field(default_factory=Detector)
    tilt_error_deg: float = 0.18
    tilt_error_by_setup: dict = field(default_factory=dict)
    focal_length_error: float = 0.0072
    nominal_focal_length_mm: float = 250.0
    groove_density_per_mm: float = 600.0
    camera_collimator_angle_deg: float = 30.0
    detector_offset_px: float = 1.6
    distortion_a3_px: float = 0.8
    line_tilt_px_per_px: float = 0.0045
    psf_sigma_px: float = 1.0
    slit_width_arcsec: float = 1.2
    spatial_scale_arcsec: float = 0.2
    slit_rows: tuple = (10, 501)
    slit_ripple: tuple = ((0.012, 173.0, 0.7), (0.006, 41.0, 0.0))
    size: str = "small"
    name: str = "RLS"
    blaze_wavelength_angstrom: float = 5500.0
    telescope_area_cm2: float = src.TELESCOPE_AREA_CM2
    atmosphere: object = src.SITE
    site: dict = field(default_factory=lambda: dict(SITE))
    catalogue: str = "rls"
    header_airmass_at: str = "mid"

    @property
    def targets(self):
        """Targets of this instrument's night (name -> sources.Target)."""
        return src.CATALOGUES[self.catalogue]

    @property
    def grid(self):
        d = self.detector
        return Grid(d.nx_phys, d.ny_phys, d.bin_x, d.bin_y)

    @property
    def focal_length_mm(self):
        return self.nominal_focal_length_mm * (1.0 + self.focal_length_error)

    def true_tilt_deg(self, grtilt_deg):
        key = f"{grtilt_deg:.2f}"
        return float(grtilt_deg) + float(self.tilt_error_by_setup.get(key, self.tilt_error_deg))

    def optics(self, grtilt_deg):
        """True optics for a header tilt ``grtilt_deg``."""
        d = self.detector
        return GratingOptics(
            tilt_deg=self.true_tilt_deg(grtilt_deg),
            groove_density_per_mm=self.groove_density_per_mm, order=1,
            camera_collimator_angle_deg=self.camera_collimator_angle_deg,
            camera_focal_length_mm=self.focal_length_mm, pixel_size_mm=d.pixel_size_mm,
            nx_phys=d.nx_phys, ny_phys=d.ny_phys, detector_offset_px=self.detector_offset_px,
            distortion_a3_px=self.distortion_a3_px, line_tilt_px_per_px=self.line_tilt_px_per_px,
            blaze_wavelength_angstrom=self.blaze_wavelength_angstrom)

    def slit_width_px(self):
        """Slit width in unbinned px along the slit direction (before the anamorphic factor)."""
        return self.slit_width_arcsec / self.spatial_scale_arcsec

    def slit_width_ripple(self, y_phys):
        """Relative slit width at unbinned slit position(s) ``y_phys`` (continuous; mean ~1).

        ``1 + sum_k a_k sin(2 pi y / P_k + phi_k)`` over ``slit_ripple`` = ((a, P, phi), ...):
        the slit jaws' irregularities. Light filling the slit (lamps, sky) scales with it;
        a star's image is cut by the local width (:func:`observing.slit_row_weights`).
        """
        y = np.asarray(y_phys, float)
        out = np.ones_like(y)
        for amp, period, phase in self.slit_ripple:
            out = out + amp * np.sin(2 * np.pi * y / period + phase)
        return out

    def slit_ends_and_vignetting(self, *, lamp=False):
        """Relative illumination of each unbinned slit row without the width ripple.

        Soft-edged slit ends, a mild vignetting and, for the flat lamp only, a 3 %
        gradient along the slit (calibration-unit illumination).
        """
        ny = self.detector.ny_phys
        y = np.arange(ny, dtype=float)
        lo, hi = self.slit_rows
        edges = ndtr((y - lo + 0.5) / 1.2) * ndtr((hi + 0.5 - y) / 1.2)
        t = (y - 0.5 * (ny - 1)) / (0.5 * ny)
        illum = edges * (1.0 - 0.05 * t ** 2)
        if lamp:
            illum = illum * (1.0 + 0.03 * t)
        return illum

    def slit_illumination(self, *, lamp=False):
        """Relative illumination of each unbinned slit row (sky/arc light; ``lamp=True``: flat lamp).

        :meth:`slit_ends_and_vignetting` times the slit-width ripple
        (:meth:`slit_width_ripple`, ~1 %), which affects every source filling the slit.
        """
        y = np.arange(self.detector.ny_phys, dtype=float)
        return self.slit_ends_and_vignetting(lamp=lamp) * self.slit_width_ripple(y)

    def to_dict(self):
        return {
            "name": self.name, "size": self.size, "detector": self.detector.to_dict(),
            "blaze_wavelength_angstrom": self.blaze_wavelength_angstrom,
            "telescope_area_cm2": self.telescope_area_cm2,
            "tilt_error_deg": self.tilt_error_deg,
            "tilt_error_by_setup": dict(self.tilt_error_by_setup),
            "focal_length_error": self.focal_length_error,
            "nominal_focal_length_mm": self.nominal_focal_length_mm,
            "true_focal_length_mm": self.focal_length_mm,
            "groove_density_per_mm": self.groove_density_per_mm,
            "camera_collimator_angle_deg": self.camera_collimator_angle_deg,
            "detector_offset_px": self.detector_offset_px,
            "distortion_a3_px": self.distortion_a3_px,
            "line_tilt_px_per_px": self.line_tilt_px_per_px,
            "psf_sigma_px": self.psf_sigma_px,
            "slit_width_arcsec": self.slit_width_arcsec,
            "spatial_scale_arcsec_per_phys_px": self.spatial_scale_arcsec,
            "slit_rows_phys": list(self.slit_rows),
            "slit_width_ripple": {
                "terms_amplitude_period_phys_px_phase_rad": [list(t) for t in self.slit_ripple],
                "formula": "width(Y) = slit_width * (1 + sum a sin(2 pi Y / P + phi)), Y unbinned "
                           "canonical slit coordinate; sky, lamps and stars all see it"},
        }


def make_instrument(size="small", instrument="rls", **changes):
    """The true instrument of the demo night.

    Parameters
    ----------
    size : {'small', 'full'}
        'small': 2048 x 512 unbinned pixels read out 2x2 binned (CCDSUM '2 2');
        'full': 4096 x 2048 unbinned (CCDSUM '1 1').
    instrument : {'rls', 'wren'}
        'wren': the second invented instrument (:mod:`demo_data.wren`; small only).
    **changes
        Any :class:`Instrument` field (e.g. ``tilt_error_deg=0.3``,
        ``focal_length_error=-0.01``) or :class:`Detector` field
        (e.g. ``read_noise_e=3.0``, ``gain_e_per_adu=2.0``).
    """
    if instrument == "wren":
        from . import wren   # wren builds on this module (imported here, not at the top)
        if size != "small":
            raise ValueError(f"`size`: the WREN instrument exists in size 'small' only, got {size!r}")
        return wren.make_wren_instrument(**changes)
    if instrument != "rls":
        raise ValueError(f"`instrument` must be 'rls' or 'wren', got {instrument!r}")
    det_fields = set(Detector.__dataclass_fields__)
    det_changes = {k: changes.pop(k) for k in list(changes) if k in det_fields}
    if size == "small":
        det = Detector(**det_changes)
    elif size == "full":
        base = dict(nx_phys=4096, ny_phys=2048, bin_x=1, bin_y=1, n_overscan=64,
                    dead_columns=(563,), hot_columns=(1509,), low_column=(917, 2600, 0.55))
        base.update(det_changes)
        det = Detector(**base)
        changes.setdefault("slit_rows", (40, 2005))
    else:
        raise ValueError(f"`size` must be 'small' or 'full', got {size!r}")
    unknown = set(changes) - set(Instrument.__dataclass_fields__)
    if unknown:
        raise TypeError(f"make_instrument: unknown parameter(s) {sorted(unknown)}")
    return Instrument(detector=det, size=size, **changes)


# =============================================================================== truth
@dataclass(frozen=True)
class FrameTruth:
    """What really happened in one simulated frame (binned canonical coordinates).

    Attributes
    ----------
    frame_type : str
        'bias', 'flat', 'arc', 'standard', 'science', 'focus'.
    exptime_s : float
    optics : GratingOptics or None
        True optics (None for biases).
    flexure_x_px : float
        Shift of the light pattern along the dispersion, binned canonical px
        (positive = towards longer x). The wavelength at a pixel is
        ``optics.wavelength_of(X - flexure, Y)``.
    illumination_e : ndarray (nyb, nxb)
        Expected electrons arriving per binned pixel, before the pixel response.
    expected_e : ndarray (nyb, nxb)
        ``illumination_e * pixel_response`` (+ dark of the hot columns): the
        noise-free detected signal.
    components : dict of str -> ndarray (nyb, nxb)
        Parts of ``illumination_e`` ('lamp', 'sky', 'object', ...).
    cosmic_e : ndarray (nyb, nxb)
        Electrons deposited by cosmic rays.
    info : dict
        Everything else (airmass, lines, trace table, seeing, ...).
    """

    frame_type: str
    exptime_s: float
    optics: object
    flexure_x_px: float
    illumination_e: np.ndarray
    expected_e: np.ndarray
    components: dict
    cosmic_e: np.ndarray
    info: dict
    instrument: Instrument

    def wavelength_map(self):
        """Exact air wavelength (A) at every binned canonical pixel centre, shape (nyb, nxb)."""
        if self.optics is None:
            raise ValueError("a bias frame has no wavelength map")
        return wavelength_map(self.instrument, self.optics, flexure_x_px=self.flexure_x_px)

    def line_x_px(self, wave_angstrom, y_px=None):
        """Binned canonical x of wavelength(s) at binned canonical row(s) ``y_px`` (default: all rows)."""
        grid = self.instrument.grid
        yb = np.arange(grid.nyb) if y_px is None else np.asarray(y_px, float)
        y_phys = grid.by * yb + 0.5 * (grid.by - 1)
        x_phys = self.optics.x_of_wavelength(np.asarray(wave_angstrom, float)[..., None] if y_px is None
                                             else wave_angstrom, y_phys,
                                             flexure_x_px=self.flexure_x_px * grid.bx)
        return (x_phys - 0.5 * (grid.bx - 1)) / grid.bx


def wavelength_map(instrument, optics, *, flexure_x_px=0.0):
    """Air wavelength (A) at the binned canonical pixel centres; ``flexure_x_px`` in binned px."""
    grid = instrument.grid
    return optics.wavelength_of(grid.x_centres[None, :], grid.y_centres[:, None],
                                flexure_x_px=flexure_x_px * grid.bx)


@dataclass(frozen=True)
class SimFrame:
    """A simulated raw frame: uint16 pixels in the raw layout, its header and its truth."""

    raw: np.ndarray
    header: fits.Header
    truth: FrameTruth

    def canonical_adu(self):
        """Raw data section turned to the canonical orientation (ADU, float, bias not removed)."""
        return self.truth.instrument.detector.to_canonical(self.raw).astype(float)

    def electrons(self):
        """The frame as a perfect CCD calibration would give it: canonical electrons.

        ``(raw - true bias) * true gain`` on the data section, turned to the
        canonical orientation: signal + photon noise + read noise + cosmic rays
        (+ dark of hot columns); the pixel response is NOT divided out. Saturated
        pixels keep their clipped value.
        """
        det = self.truth.instrument.detector
        adu = self.raw.astype(float) - self.truth.info["bias_adu"]
        return det.to_canonical(adu) * det.gain_e_per_adu

    def variance(self):
        """Variance (electron^2) of :meth:`electrons`: expected signal + read noise^2 (no CRs)."""
        det = self.truth.instrument.detector
        return self.truth.expected_e.astype(float) + det.read_noise_e ** 2

    def write(self, path):
        return write_frame(self, path)


def write_frame(frame, path, *, data=None):
    """Write a :class:`SimFrame`: RLS a single HDU; WREN an empty primary + IMAGE ``RAWPIX``.

    Pixels uint16 (BZERO = 32768), or ``data`` instead of ``frame.raw`` (any dtype).
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    pixels = frame.raw if data is None else data
    if frame.truth.instrument.name == "WREN":
        from . import wren
        prim, ext = wren.split_header(frame.header)
        hdul = fits.HDUList([fits.PrimaryHDU(header=prim), fits.ImageHDU(pixels, header=ext)])
    else:
        hdul = fits.HDUList([fits.PrimaryHDU(pixels, header=frame.header)])
    hdul.writeto(path, overwrite=True, output_verify="exception")
    return path


# =============================================================================== helpers
def _rng(seed, *keys):
    return np.random.default_rng([int(seed), *[int(k) for k in keys]])


def _binned_x_to_phys(inst, x_b):
    g = inst.grid
    return g.bx * np.asarray(x_b, float) + 0.5 * (g.bx - 1)


def _phys_y_to_binned(inst, y):
    g = inst.grid
    return (np.asarray(y, float) - 0.5 * (g.by - 1)) / g.by


def airmass_at(ra_deg, dec_deg, date_obs, *, latitude_deg=SITE["latitude_deg"],
               longitude_deg=SITE["longitude_deg"], height_m=SITE["height_m"]):
    """Airmass of a target at UTC time(s) at a site (default Tarn Ridge).

    Geometric (unrefracted) altitude from astropy (ICRS -> AltAz with pressure 0,
    bundled Earth-orientation tables, never downloaded), airmass from Young &
    Irvine (1967) ``X = sec z (1 - 0.0012 (sec^2 z - 1))`` (from memory).
    ``date_obs``: an ISO string (returns a float) or a list of them (an array).
    """
    import astropy.units as u
    from astropy.coordinates import AltAz, EarthLocation, SkyCoord
    from astropy.time import Time

    offline_earth_orientation()
    scalar = isinstance(date_obs, str)
    times = Time([date_obs] if scalar else list(date_obs), scale="utc")
    loc = EarthLocation.from_geodetic(longitude_deg * u.deg, latitude_deg * u.deg, height_m * u.m)
    alt = SkyCoord(ra_deg * u.deg, dec_deg * u.deg, frame="icrs").transform_to(
        AltAz(obstime=times, location=loc, pressure=0 * u.hPa)).alt.to_value(u.rad)
    sin_alt = np.sin(alt)
    if np.any(sin_alt <= 0.05):
        raise ValueError(f"target at RA {ra_deg}, Dec {dec_deg} is below the horizon at {date_obs}")
    sec_z = 1.0 / sin_alt
    x = sec_z * (1.0 - 0.0012 * (sec_z ** 2 - 1.0))
    return float(x[0]) if scalar else x


def _base_header(inst, frame_type, *, exptime_s, date_obs, grtilt_deg, filter_name, lamps,
                 object_name, ra_deg=None, dec_deg=None, airmass=None, seed=0):
    if inst.name == "WREN":
        from . import wren
        return wren.wren_header(inst, frame_type, exptime_s=exptime_s, date_obs=date_obs,
                                grtilt_deg=grtilt_deg, filter_name=filter_name, lamps=lamps,
                                object_name=object_name, ra_deg=ra_deg, dec_deg=dec_deg,
                                airmass=airmass, seed=seed)
    det = inst.detector
    h = fits.Header()
    h["IMAGETYP"] = (frame_type, "frame type")
    h["OBJECT"] = (object_name, "object name")
    if exptime_s is not None:
        h["EXPTIME"] = (float(exptime_s), "[s] exposure time")
    h["DATE-OBS"] = (date_obs, "UTC start of exposure (ISO 8601)")
    t = _dt.datetime.fromisoformat(date_obs).replace(tzinfo=_dt.timezone.utc)
    mjd = (t - _dt.datetime(1858, 11, 17, tzinfo=_dt.timezone.utc)).total_seconds() / 86400.0
    h["MJD-OBS"] = (round(mjd, 6), "[d] MJD at start of exposure")
    if ra_deg is not None:
        h["RA"] = (float(ra_deg), "[deg] right ascension (ICRS)")
        h["DEC"] = (float(dec_deg), "[deg] declination (ICRS)")
        h["EQUINOX"] = (2000.0, "equinox of RA/DEC")
    if airmass is not None:
        h["AIRMASS"] = (round(float(airmass), 4), "airmass at mid-exposure")
    h["TELESCOP"] = (TELESCOPE, "telescope (invented)")
    h["INSTRUME"] = (INSTRUMENT_NAME, "Ridgeline Long-Slit Spectrograph (invented)")
    h["OBSERVAT"] = (SITE["name"], "observatory (invented)")
    h["SITELAT"] = (SITE["latitude_deg"], "[deg] site latitude")
    h["SITELONG"] = (SITE["longitude_deg"], "[deg] site longitude (east positive)")
    h["SITEELEV"] = (SITE["height_m"], "[m] site elevation")
    h["OBSERVER"] = ("night team", "observer")
    h["GRATING"] = ("G600", "grating (600 grooves/mm)")
    h["GRTILT"] = (round(float(grtilt_deg), 2), "[deg] grating tilt (encoder reading)")
    h["SLITWID"] = (inst.slit_width_arcsec, "[arcsec] slit width")
    h["FILTER"] = (filter_name, "order-blocking filter")
    h["LAMPS"] = (lamps, "calibration lamps on")
    h["CCDSUM"] = (det.ccdsum, "binning along FITS axis 1 and 2")
    h["DETECTOR"] = ("RLS-CCD1", "2048x512 15um CCD" if inst.size == "small" else "4096x2048 15um CCD")
    h["GAIN"] = (det.gain_nominal, "[e-/ADU] nominal gain")
    h["RDNOISE"] = (det.read_noise_nominal, "[e-] nominal read noise")
    h["SATURATE"] = (65000, "[ADU] saturation level")
    h["DATASEC"] = (det.datasec, "data section")
    h["BIASSEC"] = (det.biassec, "serial overscan section")
    h["CCDTEMP"] = (-110.0, "[C] detector temperature")
    h["SIMULATD"] = (True, "simulated by demo_data.simulate")
    h["SIMSEED"] = (int(seed), "simulator seed of this frame")
    return h


def _finish(inst, frame_type, exptime_s, optics, flexure_b, components, header, rng, info,
            *, poisson=True, read_noise=True, cosmic_rays=True):
    det = inst.detector
    grid = inst.grid
    illum = np.zeros((grid.nyb, grid.nxb))
    for comp in components.values():
        illum = illum + comp
    expected = illum * det.pixel_response()
    raw, rinfo = det.read_out(expected, exptime_s, rng, poisson=poisson, read_noise=read_noise,
                              cosmic_rays=cosmic_rays)
    info = dict(info)
    info.update(n_cosmic=rinfo["n_cosmic"], n_saturated=rinfo["n_saturated"],
                bias_row_level_adu=rinfo["bias_row_level_adu"], bias_adu=rinfo["bias_adu"])
    truth = FrameTruth(frame_type, float(exptime_s), optics, float(flexure_b),
                       illum.astype(np.float32), (expected + det.dark_e_per_s() * exptime_s).astype(np.float32),
                       {k: v.astype(np.float32) for k, v in components.items()},
                       rinfo["cosmic_e"].astype(np.float32), info, inst)
    return SimFrame(raw, header, truth)


# =============================================================================== frames
def make_bias(inst, *, seed=DEFAULT_SEED, date_obs="2026-05-28T20:10:00", grtilt_deg=8.93,
              filter_name="NONE", poisson=True, read_noise=True, cosmic_rays=True, frame_key=0):
    """A bias (zero-second) frame. Returns :class:`SimFrame`."""
    rng = _rng(seed, 1, frame_key)
    h = _base_header(inst, "BIAS", exptime_s=0.0, date_obs=date_obs, grtilt_deg=grtilt_deg,
                     filter_name=filter_name, lamps="NONE", object_name="bias", seed=seed)
    return _finish(inst, "bias", 0.0, None, 0.0, {}, h, rng, {}, poisson=poisson,
                   read_noise=read_noise, cosmic_rays=cosmic_rays)


#: Flat-lamp photon rate (photons/s/A per unbinned slit row at 6000 A) entering the slit.
QTH_RATE_6000 = 3600.0


def make_flat(inst, grtilt_deg=8.93, *, filter_name="NONE", exptime_s=6.0, seed=DEFAULT_SEED,
              date_obs="2026-05-28T20:30:00", lamp_scale=1.0, poisson=True, read_noise=True,
              cosmic_rays=True, frame_key=0):
    """A quartz-halogen lamp flat through the spectrograph.

    The lamp spectrum (3100-K Planck) times the spectrograph throughput (blazed
    grating, optics, filter, CCD QE) along the dispersion, the lamp's slit
    illumination along the slit, times the pixel response.
    """
    rng = _rng(seed, 2, frame_key)
    optics = inst.optics(grtilt_deg)
    grid = inst.grid

    def spectrum(lam):
        return (QTH_RATE_6000 * lamp_scale * exptime_s * src.qth_photon_shape(lam)
                * src.spectrograph_throughput(lam, optics, filter_name))

    img, _ = render_continuum(optics, grid, spectrum, inst.slit_illumination(lamp=True))
    h = _base_header(inst, "FLAT", exptime_s=exptime_s, date_obs=date_obs, grtilt_deg=grtilt_deg,
                     filter_name=filter_name, lamps="HALOGEN" if inst.name == "WREN" else "QTH",
                     object_name="flat", seed=seed)
    return _finish(inst, "flat", exptime_s, optics, 0.0, {"lamp": img}, h, rng,
                   {"slit_illumination_lamp": inst.slit_illumination(lamp=True)},
                   poisson=poisson, read_noise=read_noise, cosmic_rays=cosmic_rays)


def _slit_image_width_px(inst, optics, wave):
    """Slit-image width along X (unbinned px): slit width x anamorphic factor."""
    return inst.slit_width_px() * optics.anamorphic_factor(wave)


def make_arc(inst, grtilt_deg=8.93, *, lamps="HgAr,Ne", filter_name="NONE", exptime_s=10.0,
             flexure_x_px=0.0, seed=DEFAULT_SEED, date_obs="2026-05-28T23:40:00",
             psf_sigma_px=None, frame_type="ARC", object_name=None, lamp_scale=1.0,
             poisson=True, read_noise=True, cosmic_rays=True, frame_key=0):
    """An arc-lamp frame.

    Parameters
    ----------
    inst : Instrument
    grtilt_deg : float
        Header (nominal) grating tilt; the true tilt adds ``inst.tilt_error_deg``.
    lamps : str
        LAMPS value, items of ``sources.LAMP_SPECIES`` ('HgAr', 'Ne', 'He', 'Ar').
    flexure_x_px : float
        Flexure shift along the dispersion (binned canonical px).
    psf_sigma_px : float, optional
        Camera PSF sigma (unbinned px); default ``inst.psf_sigma_px`` (a FOCUS
        frame uses a larger one).

    Returns
    -------
    SimFrame
        ``truth.info['lines']`` lists every rendered line: species, wavelength,
        expected electrons over the slit, and its binned x at every binned row
        (``truth.line_x_px`` computes the same for any wavelength).
    """
    rng = _rng(seed, 3, frame_key)
    optics = inst.optics(grtilt_deg)
    grid = inst.grid
    waves, rates, species = src.lamp_lines(lamps)
    x_mid = optics.x_of_wavelength(waves, optics.y_centre_px)
    on = np.isfinite(x_mid) & (x_mid > -30) & (x_mid < grid.nx_phys + 30)
    waves, rates = waves[on], rates[on]
    species = [s for s, k in zip(species, on) if k]
    illum = inst.slit_illumination()
    eff = src.spectrograph_throughput(waves, optics, filter_name)
    per_row = (rates * eff * exptime_s * lamp_scale)[:, None] * illum[None, :]
    sigma = inst.psf_sigma_px if psf_sigma_px is None else psf_sigma_px
    width = _slit_image_width_px(inst, optics, waves)
    flex_phys = flexure_x_px * grid.bx
    img, centres = render_lines(optics, grid, waves, per_row, width, np.full(len(waves), sigma),
                                flexure_x_px=flex_phys)
    # binned x of each line at every binned row centre
    x_b = (optics.x_of_wavelength(waves[:, None], grid.y_centres[None, :], flexure_x_px=flex_phys)
           - 0.5 * (grid.bx - 1)) / grid.bx
    lines = {"species": species, "wavelength_air_angstrom": waves,
             "electrons_total": per_row.sum(axis=1), "x_px_per_row": x_b,
             "slit_image_width_phys_px": width, "psf_sigma_phys_px": sigma}
    h = _base_header(inst, frame_type, exptime_s=exptime_s, date_obs=date_obs,
                     grtilt_deg=grtilt_deg, filter_name=filter_name, lamps=lamps,
                     object_name=object_name or f"arc {lamps}", seed=seed)
    return _finish(inst, frame_type.lower(), exptime_s, optics, flexure_x_px, {"lamp": img}, h, rng,
                   {"lines": lines, "lamps": lamps}, poisson=poisson, read_noise=read_noise,
                   cosmic_rays=cosmic_rays)


def _photons_per_angstrom(f_lambda, lam, area_cm2=src.TELESCOPE_AREA_CM2):
    """f_lambda (erg/s/cm2/A) at AIR wavelength ``lam`` -> photons/s/A collected by the telescope.

    The photon energy is h c / lambda_vacuum (Ciddor 1996 conversion).
    """
    return f_lambda * area_cm2 * air_to_vac(lam) / src.HC_ERG_ANGSTROM


#: binned columns between two exact evaluations of a star's slit weights (linear in between)
SLIT_WEIGHT_COLUMN_STEP = 16


def point_source_weights(inst, grid, trace_phys, fwhm_arcsec, *, beta=None, offset_arcsec=0.0):
    """Fraction of a star's light entering the slit per unbinned row and binned column.

    Parameters
    ----------
    trace_phys : ndarray, shape (nxb,)
        Star centre along the slit (unbinned canonical px) in each binned column.
    fwhm_arcsec : ndarray, shape (nxb,)
        Seeing FWHM at each column's wavelength.
    beta : float or None
        Moffat exponent; None = Gaussian.
    offset_arcsec : float
        Centring error across the slit.

    Returns
    -------
    ndarray, shape (ny_phys, nxb)
        Exact per-row slit transmission (:func:`observing.slit_row_weights`, the local
        slit width including the ripple), evaluated every ``SLIT_WEIGHT_COLUMN_STEP``
        columns and interpolated linearly between them (the trace and FWHM change by
        < 0.05 px and < 0.1 % over that step). Summed over rows: the slit fraction.
    """
    scale = inst.spatial_scale_arcsec
    nxb = grid.nxb
    cols = np.unique(np.concatenate([np.arange(0, nxb, SLIT_WEIGHT_COLUMN_STEP), [nxb - 1]]))
    edges = (np.arange(grid.ny_phys + 1) - 0.5) * scale

    def half_width(s_arcsec):
        return 0.5 * inst.slit_width_arcsec * inst.slit_width_ripple(s_arcsec / scale)

    w = slit_row_weights(edges, trace_phys[cols] * scale, fwhm_arcsec[cols], beta=beta,
                         offset_arcsec=offset_arcsec, half_width_arcsec=half_width)
    x = np.arange(nxb)
    out = np.empty((grid.ny_phys, nxb))
    for i in range(grid.ny_phys):
        out[i] = np.interp(x, cols, w[i])
    return out


def _render_point(inst, optics, grid, tgt, trace_phys, wave_trace, *, exptime_s, filter_name,
                  atmosphere, seeing_fwhm_arcsec, moffat_beta, offset_arcsec, v_corr_km_s, disp,
                  wave_edges):
    """A star through the slit: image, slit fraction per column, truth columns."""
    scale = inst.spatial_scale_arcsec

    def spectrum(lam):
        return (exptime_s * _photons_per_angstrom(tgt.f_lambda_at_telescope(lam, v_corr_km_s), lam,
                                                  inst.telescope_area_cm2)
                * src.throughput(lam, optics, filter_name) * atmosphere(lam))

    fwhm_col = seeing_fwhm_arcsec * (wave_trace / 5000.0) ** -0.2
    slit_w = point_source_weights(inst, grid, trace_phys, fwhm_col, beta=moffat_beta,
                                  offset_arcsec=offset_arcsec)
    slit_frac = slit_w.sum(axis=0)
    illum = inst.slit_ends_and_vignetting()
    weights = slit_w * illum[:, None]
    sig_px = fwhm_col / 2.3548 / scale
    # spectral resolution for a star: the slit-truncated seeing image
    sig_x = np.sqrt(inst.psf_sigma_px ** 2 + min(np.median(sig_px),
                                                 inst.slit_width_px() / np.sqrt(12)) ** 2)
    lsf = float(np.median(disp) * sig_x * optics.anamorphic_factor(np.median(wave_trace)))
    img, _ = render_continuum(optics, grid, spectrum, weights, lsf_sigma_angstrom=lsf,
                              wave_edges=wave_edges)
    f_total = tgt.f_lambda_at_telescope(wave_trace, v_corr_km_s)
    extra = {"flux_total_erg_s_cm2_angstrom": f_total,
             "flux_in_slit_erg_s_cm2_angstrom": f_total * slit_frac,
             "illumination_at_trace": np.interp(trace_phys, np.arange(grid.ny_phys), illum)}
    return img, slit_frac, extra


def make_science(inst, grtilt_deg=8.93, *, target="TRG-511", filter_name="NONE", exptime_s=1200.0,
                 airmass=1.2, flexure_x_px=0.25, seeing_fwhm_arcsec=1.1, moffat_beta=None,
                 trace_y_px=None, trace_drift_px=(1.6, 0.8), slit_offset_arcsec=0.0, sky=True,
                 sky_scale=1.0, object_scale=1.0, v_corr_km_s=0.0, header_airmass=None,
                 companions=(), frame_type="OBJECT", seed=DEFAULT_SEED, date_obs="2026-05-29T00:30:00",
                 poisson=True, read_noise=True, cosmic_rays=True, frame_key=0):
    """A science or standard-star frame: target + night sky through the atmosphere.

    Parameters
    ----------
    target : str or sources.Target or None
        A name in ``sources.TARGETS`` ('TRS-17', 'TRV-9', 'TRB-2', 'TRG-511'),
        a Target, or None for sky only.
    airmass : float
        Airmass of the extinction and telluric bands (the night uses the
        exposure-averaged airmass).
    header_airmass : float, optional
        AIRMASS written to the header (default ``airmass``; the night writes the
        mid-exposure value).
    flexure_x_px : float
        Flexure shift along the dispersion (binned canonical px).
    seeing_fwhm_arcsec : float
        Seeing FWHM at 5000 A; it scales as ``lambda**-0.2``.
    moffat_beta : float or None
        Stars: Moffat exponent of the seeing profile (extended wings); None = Gaussian.
    trace_y_px : float, optional
        Binned canonical slit position of the object at the detector centre
        (default: a target-dependent value near the slit centre).
    trace_drift_px : (float, float)
        Linear and quadratic drift of the trace along the dispersion, binned px:
        ``y(x) = y0 + c1 t + c2 t**2`` with ``t = (X - X_c) / (nx/2)``.
    slit_offset_arcsec : float
        Centring error of a point source across the slit (slit losses).
    sky, sky_scale : bool, float
        Include the night sky and scale it.
    v_corr_km_s : float
        Barycentric velocity correction of the observer (astropy convention,
        v_bary = v_topo + v_corr): the target's barycentric spectrum is seen at
        ``lambda_vac / (1 + v_corr/c)``, then in air. 0 = observer at rest.
    companions : sequence of (target, trace_y_px)
        Further stars on the slit (binned canonical slit position at the detector
        centre), rendered like a point target (components 'star1', ...; truth in
        ``info['companions']``).

    Returns
    -------
    SimFrame
        ``truth.components`` has 'object' and 'sky'; ``truth.info['trace']`` is a
        table (dict of arrays, one row per binned column x): x_px,
        wavelength_angstrom (at the trace), trace_y_px, object_electrons (summed
        along the slit), sky_electrons_per_pixel (at the trace row), slit_fraction,
        throughput, extinction_mag, telluric_transmission, dispersion, and for
        stars f_lambda above the atmosphere and entering the slit.
    """
    rng = _rng(seed, 4, frame_key)
    optics = inst.optics(grtilt_deg)
    grid = inst.grid
    nxb = grid.nxb
    tgt = inst.targets[target] if isinstance(target, str) else target
    flex_phys = flexure_x_px * grid.bx
    wave_edges = wavelength_edges(optics, grid, flexure_x_px=flex_phys)
    scale = inst.spatial_scale_arcsec
    if trace_y_px is None:
        trace_y_px = {"TRS-17": 128.0, "TRV-9": 140.0, "TRB-2": 118.0, "TRG-511": 104.0}.get(
            getattr(tgt, "name", ""), 128.0) * (grid.nyb / 256.0)
    t = (grid.x_centres - optics.x_centre_px) / (0.5 * grid.nx_phys)
    trace_b = trace_y_px + trace_drift_px[0] * t + trace_drift_px[1] * t ** 2
    trace_phys = grid.by * trace_b + 0.5 * (grid.by - 1)
    # wavelength at the trace centre of each binned column
    wave_trace = optics.wavelength_of(grid.x_centres, trace_phys, flexure_x_px=flex_phys)
    disp = np.abs(np.gradient(wave_trace)) / grid.bx  # A per unbinned px
    k_mag = src.extinction_mag_per_airmass(wave_trace, site=inst.atmosphere)

    def atmosphere(lam):
        return 10 ** (-0.4 * src.extinction_mag_per_airmass(lam, site=inst.atmosphere) * airmass) \
            * src.telluric_transmission(lam, airmass)

    def seeing_sigma_arcsec(lam):
        return seeing_fwhm_arcsec * (np.asarray(lam, float) / 5000.0) ** -0.2 / 2.3548

    components = {}
    info = {"airmass": float(airmass), "seeing_fwhm_arcsec_5000": float(seeing_fwhm_arcsec),
            "moffat_beta": None if moffat_beta is None else float(moffat_beta),
            "seeing_profile": "gaussian" if moffat_beta is None else "moffat",
            "target": getattr(tgt, "name", None), "trace_drift_px": tuple(trace_drift_px),
            "trace_y_px_centre": float(trace_y_px),
            "slit_offset_arcsec": float(slit_offset_arcsec), "v_corr_km_s": float(v_corr_km_s)}
    obj_img = np.zeros((grid.nyb, nxb))
    slit_frac = np.ones(nxb)
    extra = {}
    point_kw = dict(exptime_s=exptime_s * object_scale, filter_name=filter_name, atmosphere=atmosphere,
                    seeing_fwhm_arcsec=seeing_fwhm_arcsec, moffat_beta=moffat_beta,
                    v_corr_km_s=v_corr_km_s, disp=disp, wave_edges=wave_edges)
    if tgt is not None:
        if tgt.kind == "point":
            obj_img, slit_frac, extra = _render_point(inst, optics, grid, tgt, trace_phys, wave_trace,
                                                      offset_arcsec=slit_offset_arcsec, **point_kw)
        else:
            obj_img = _render_galaxy(inst, optics, grid, tgt, exptime_s * object_scale, filter_name,
                                     atmosphere, seeing_sigma_arcsec, trace_phys, wave_edges,
                                     flex_phys, info, v_corr_km_s)
        components["object"] = obj_img
    # other stars on the slit (a field star beside the galaxy): same seeing, own position
    comp_rows = []
    for k, (cname, cy) in enumerate(companions):
        ctgt = inst.targets[cname] if isinstance(cname, str) else cname
        cb = cy + trace_drift_px[0] * t + trace_drift_px[1] * t ** 2
        cphys = grid.by * cb + 0.5 * (grid.by - 1)
        cwave = optics.wavelength_of(grid.x_centres, cphys, flexure_x_px=flex_phys)
        c_off = slit_offset_arcsec + 0.04 * (k + 1)       # its own centring across the slit
        cimg, cfrac, cextra = _render_point(inst, optics, grid, ctgt, cphys, cwave,
                                            offset_arcsec=c_off, **point_kw)
        components[f"star{k + 1}"] = cimg
        comp_rows.append({"target": ctgt.name, "trace_y_px_centre": float(cy),
                          "slit_offset_arcsec": float(c_off),
                          "trace": dict({"x_px": np.arange(nxb, dtype=float),
                                         "wavelength_angstrom": cwave, "trace_y_px": cb,
                                         "object_electrons": cimg.sum(axis=0),
                                         "slit_fraction": cfrac}, **cextra)})
    info["companions"] = comp_rows
    if sky:
        components["sky"] = _render_sky(inst, optics, grid, exptime_s * sky_scale, filter_name,
                                        wave_edges, flex_phys)
    obj_col = obj_img.sum(axis=0)
    ti = np.clip(np.round(trace_b).astype(int), 0, grid.nyb - 1)
    sky_at = components["sky"][ti, np.arange(nxb)] if sky else np.zeros(nxb)
    info["trace"] = {
        "x_px": np.arange(nxb, dtype=float), "wavelength_angstrom": wave_trace,
        "trace_y_px": trace_b, "object_electrons": obj_col, "sky_electrons_per_pixel": sky_at,
        "slit_fraction": slit_frac, "throughput": src.throughput(wave_trace, optics, filter_name),
        "extinction_mag": k_mag * airmass,
        "telluric_transmission": src.telluric_transmission(wave_trace, airmass),
        "dispersion_angstrom_per_px": disp * grid.bx,
    }
    info["trace"].update(extra)
    tgt_name = getattr(tgt, "name", "sky")
    h = _base_header(inst, frame_type, exptime_s=exptime_s, date_obs=date_obs,
                     grtilt_deg=grtilt_deg, filter_name=filter_name, lamps="NONE",
                     object_name=tgt_name, ra_deg=getattr(tgt, "ra_deg", 150.0),
                     dec_deg=getattr(tgt, "dec_deg", -20.0),
                     airmass=airmass if header_airmass is None else header_airmass, seed=seed)
    h["SEEFWHM" if inst.name == "WREN" else "SEEING"] = (round(seeing_fwhm_arcsec, 2),
                                                         "[arcsec] DIMM seeing FWHM (5000 A)")
    kind = "standard" if frame_type.upper() == "STANDARD" else "science"
    return _finish(inst, kind, exptime_s, optics, flexure_x_px, components, h, rng, info,
                   poisson=poisson, read_noise=read_noise, cosmic_rays=cosmic_rays)


def _render_sky(inst, optics, grid, exptime_s, filter_name, wave_edges, flex_phys):
    """Night sky filling the slit: continuum + emission lines (no extinction)."""
    area_per_row = inst.slit_width_arcsec * inst.spatial_scale_arcsec  # arcsec^2 per unbinned row
    illum = inst.slit_illumination()

    def spectrum(lam):
        return (exptime_s * _photons_per_angstrom(src.sky_continuum(lam), lam, inst.telescope_area_cm2)
                * area_per_row
                * src.throughput(lam, optics, filter_name))

    img, _ = render_continuum(optics, grid, spectrum, illum, wave_edges=wave_edges)
    rows = src.read_sky_lines()
    waves = np.array([r["wavelength_air_angstrom"] for r in rows])
    ray = np.array([r["intensity_rayleigh"] for r in rows])
    x_mid = optics.x_of_wavelength(waves, optics.y_centre_px)
    on = np.isfinite(x_mid) & (x_mid > -30) & (x_mid < grid.nx_phys + 30)
    waves, ray = waves[on], ray[on]
    if len(waves):
        photons = (ray * src.RAYLEIGH_PER_ARCSEC2 * inst.telescope_area_cm2 * area_per_row
                   * src.throughput(waves, optics, filter_name) * exptime_s)
        per_row = photons[:, None] * illum[None, :]
        limg, _ = render_lines(optics, grid, waves, per_row, _slit_image_width_px(inst, optics, waves),
                               np.full(len(waves), inst.psf_sigma_px), flexure_x_px=flex_phys)
        img = img + limg
    return img


def _render_galaxy(inst, optics, grid, tgt, exptime_s, filter_name, atmosphere, seeing_sigma,
                   trace_phys, wave_edges, flex_phys, info, v_corr_km_s=0.0):
    """Extended emission-line galaxy: exponential continuum + clumpy rotating line emission.

    Continuum and lines are defined in the barycentric frame at vacuum wavelengths
    (``sources.Target``); the observer's motion ``v_corr_km_s`` and the air
    conversion put them at the telescope's air wavelengths.
    """
    scale = inst.spatial_scale_arcsec
    y = grid.y_phys
    # continuum profile: exponential (scale length h) convolved with the seeing (5500 A), numerically
    h_px = tgt.scale_length_arcsec / scale
    sig_px = seeing_sigma(5500.0) / scale
    s = np.arange(-400.0, 400.0 + 0.05, 0.05)
    prof = np.exp(-np.abs(s) / h_px)
    k = np.exp(-0.5 * (np.arange(-6 * sig_px, 6 * sig_px + 0.05, 0.05) / sig_px) ** 2)
    prof = np.convolve(prof, k / k.sum(), mode="same")
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (prof[1:] + prof[:-1]))])
    cdf /= cdf[-1]
    rel = y[:, None] - trace_phys[None, :]
    weights = np.interp(rel + 0.5, s, cdf) - np.interp(rel - 0.5, s, cdf)

    def spectrum(lam):
        return (exptime_s * _photons_per_angstrom(tgt.f_lambda_at_telescope(lam, v_corr_km_s), lam,
                                                  inst.telescope_area_cm2)
                * src.throughput(lam, optics, filter_name) * atmosphere(lam))

    disp0 = float(np.median(np.abs(np.diff(wave_edges[len(y) // 2]))) / grid.bx)
    lsf = disp0 * inst.psf_sigma_px
    img, _ = render_continuum(optics, grid, spectrum, weights, lsf_sigma_angstrom=lsf,
                              wave_edges=wave_edges)
    # emission lines
    z = tgt.redshift
    rest = np.array([ln.rest_wavelength_angstrom for ln in tgt.lines])
    rest_vac = np.array([ln.rest_wavelength_vacuum_angstrom for ln in tgt.lines])
    flux = np.array([ln.flux_erg_s_cm2 for ln in tgt.lines])
    obs = tgt.line_air_wavelengths(v_corr_km_s)
    xc = optics.x_of_wavelength(obs, optics.y_centre_px)
    on = np.isfinite(xc) & (xc > -30) & (xc < grid.nx_phys + 30)
    line_rows = []
    if np.any(on):
        rest, rest_vac, flux, obs = rest[on], rest_vac[on], flux[on], obs[on]
        names = [ln.name for ln, k_ in zip(tgt.lines, on) if k_]
        # trace centre at each line's column
        centre = np.interp(xc[on], grid.x_centres, trace_phys)
        sig_see = seeing_sigma(obs) / scale
        w_rows = np.zeros((len(obs), len(y)))
        for off, sig, wt in tgt.line_components:
            tot = np.sqrt((sig / scale) ** 2 + sig_see ** 2)
            w_rows += wt * gaussian_row_weights((centre + off / scale)[:, None], tot[:, None], y[None, :])
        vel = tgt.rotation_vmax_km_s * np.tanh((y[None, :] - centre[:, None]) * scale
                                               / tgt.rotation_rturn_arcsec)
        wave_rows = obs[:, None] * (1 + vel / src.C_KM_S)
        electrons = (exptime_s * flux * inst.telescope_area_cm2 * air_to_vac(obs) / src.HC_ERG_ANGSTROM
                     * src.throughput(obs, optics, filter_name) * atmosphere(obs))
        disp = np.array([optics.dispersion_angstrom_per_px(w) for w in obs])
        sig_v_px = obs * tgt.velocity_dispersion_km_s / src.C_KM_S / disp
        sigma = np.sqrt(inst.psf_sigma_px ** 2 + sig_v_px ** 2)
        limg, _ = render_lines(optics, grid, wave_rows, electrons[:, None] * w_rows,
                               _slit_image_width_px(inst, optics, obs), sigma, flexure_x_px=flex_phys)
        img = img + limg
        for i in range(len(obs)):
            line_rows.append({"name": names[i], "rest_wavelength_angstrom": float(rest[i]),
                              "rest_wavelength_vacuum_angstrom": float(rest_vac[i]),
                              "barycentric_wavelength_vacuum_angstrom": float(rest_vac[i] * (1 + z)),
                              "observed_wavelength_angstrom": float(obs[i]),
                              "flux_erg_s_cm2": float(flux[i]),
                              "electrons_in_frame": float(electrons[i] * w_rows[i].sum())})
    info["galaxy_lines"] = line_rows
    info["redshift"] = z
    info["redshift_topocentric"] = float((1 + z) / (1 + v_corr_km_s / src.C_KM_S) - 1)
    return img


# =============================================================================== night plan
@dataclass(frozen=True)
class FrameSpec:
    """One planned exposure of the night (``kind`` selects the maker)."""

    frame_id: str
    kind: str            # bias | flat | arc | focus | standard | science
    grtilt_deg: float = 8.93
    filter_name: str = "NONE"
    exptime_s: float = 0.0
    date_obs: str = "2026-05-28T20:00:00"
    lamps: str = "NONE"
    target: str = ""
    flexure_x_px: float = 0.0
    seeing_fwhm_arcsec: float = 1.1
    moffat_beta: float = None        # stars: Moffat exponent (None = Gaussian seeing)
    slit_offset_arcsec: float = 0.05  # stars: centring error across the slit
    defect: str = ""     # '' | 'truncated' | 'no_exptime' | 'not_fits'
    options: tuple = ()  # extra keyword arguments for the maker, as (key, value) pairs


SETUP_A = (8.93, "NONE")
SETUP_B = (11.83, "GG495")


def _t(base, minutes):
    return (base + _dt.timedelta(minutes=minutes)).strftime("%Y-%m-%dT%H:%M:%S")


def night_plan(size="small", instrument="rls"):
    """The planned frames of the demo night, in observing order (list of :class:`FrameSpec`).

    ``instrument='wren'``: the second instrument's night (:func:`demo_data.wren.wren_plan`).
    """
    if instrument.lower() == "wren":
        from . import wren
        return wren.wren_plan(size)
    day = _dt.datetime(2026, 5, 28, 20, 0, 0)      # UTC, afternoon calibrations
    night = _dt.datetime(2026, 5, 28, 23, 45, 0)   # UTC, end of astronomical twilight
    plan = []
    n = [0]

    def add(kind, minutes, base, **kw):
        n[0] += 1
        plan.append(FrameSpec(frame_id=f"rls_{n[0]:04d}", kind=kind, date_obs=_t(base, minutes), **kw))

    reps = 1 if size == "small" else 4
    nbias = 5 if size == "small" else 11
    for i in range(nbias):
        add("bias", 1.0 * i, day)
    m = 15.0
    for tilt, filt in (SETUP_A, SETUP_B):
        for _ in range(3 if size == "small" else 7):
            add("flat", m, day, grtilt_deg=tilt, filter_name=filt, exptime_s=6.0 if filt == "NONE" else 5.0)
            m += 1.0
        m += 3.0
    add("focus", m + 5, day, grtilt_deg=SETUP_A[0], filter_name="NONE", exptime_s=10.0,
        lamps="HgAr,Ne", options=(("psf_sigma_px", 2.6),))
    # night, setup A. Seeing: Moffat profiles (FWHM at 5000 A, beta) and centring errors
    # across the slit differ frame by frame (simulator's choice: FWHM 1.0-1.4", beta 2.5-4,
    # offsets ~0.1" rms).
    tm = 0.0
    # the nod: 15" along the slit in binned px (0.4"/binned px small, 0.2" full), from TRV-9's
    # default position (binned y 140 of 256 small, 1120 of 2048 full)
    nod = 37.5 if size == "small" else 75.0
    trv9_y = 140.0 if size == "small" else 1120.0
    for r in range(reps):
        add("arc", tm, night, grtilt_deg=8.93, lamps="HgAr,Ne", exptime_s=10.0, flexure_x_px=0.0 + 0.03 * r)
        tm += 3
        add("standard", tm, night, grtilt_deg=8.93, target="TRS-17", exptime_s=60.0,
            flexure_x_px=0.18 + 0.02 * r, seeing_fwhm_arcsec=1.05, moffat_beta=3.2,
            slit_offset_arcsec=0.08)
        tm += 4
        add("science", tm, night, grtilt_deg=8.93, target="TRG-511", exptime_s=1200.0,
            flexure_x_px=0.27 + 0.02 * r, seeing_fwhm_arcsec=1.12, moffat_beta=3.0)
        tm += 22
        if r == 0:
            add("science", tm, night, grtilt_deg=8.93, target="TRG-511", exptime_s=1200.0,
                flexure_x_px=0.30, seeing_fwhm_arcsec=1.25, moffat_beta=2.7)
            tm += 22
        add("science", tm, night, grtilt_deg=8.93, target="TRV-9", exptime_s=900.0,
            flexure_x_px=0.34 - 0.03 * r, seeing_fwhm_arcsec=1.2, moffat_beta=2.6,
            slit_offset_arcsec=-0.11)
        tm += 17
        if r == 0:
            # repeated exposures of TRV-9 (same setup and exposure time); the third nodded
            # 15" along the slit
            add("science", tm, night, grtilt_deg=8.93, target="TRV-9", exptime_s=900.0,
                flexure_x_px=0.37, seeing_fwhm_arcsec=1.38, moffat_beta=3.6,
                slit_offset_arcsec=0.14)
            tm += 17
            add("science", tm, night, grtilt_deg=8.93, target="TRV-9", exptime_s=900.0,
                flexure_x_px=0.39, seeing_fwhm_arcsec=1.02, moffat_beta=2.9,
                slit_offset_arcsec=0.03, options=(("trace_y_px", trv9_y - nod), ("nod_arcsec", -15.0)))
            tm += 17
            add("science", tm, night, grtilt_deg=8.93, target="TRV-9", exptime_s=None,
                flexure_x_px=0.35, defect="no_exptime", moffat_beta=3.0,
                options=(("exptime_for_signal", 300.0),))
            tm += 7
            add("science", tm, night, grtilt_deg=8.93, target="TRB-2", exptime_s=30.0,
                flexure_x_px=0.30, seeing_fwhm_arcsec=1.15, moffat_beta=3.4,
                slit_offset_arcsec=-0.06)
            tm += 2
        add("arc", tm, night, grtilt_deg=8.93, lamps="HgAr,Ne", exptime_s=10.0, flexure_x_px=0.15 + 0.02 * r)
        tm += 3
    # setup B
    for r in range(reps):
        add("arc", tm, night, grtilt_deg=11.83, filter_name="GG495", lamps="Ne,He,Ar", exptime_s=8.0,
            flexure_x_px=-0.05 + 0.02 * r)
        tm += 3
        add("standard", tm, night, grtilt_deg=11.83, filter_name="GG495", target="TRS-17",
            exptime_s=60.0, flexure_x_px=-0.21, seeing_fwhm_arcsec=1.0, moffat_beta=3.8,
            slit_offset_arcsec=-0.09)
        tm += 4
        add("science", tm, night, grtilt_deg=11.83, filter_name="GG495", target="TRG-511",
            exptime_s=1200.0, flexure_x_px=-0.31 + 0.03 * r, seeing_fwhm_arcsec=1.08,
            moffat_beta=3.1)
        tm += 22
        if r == 0:
            add("science", tm, night, grtilt_deg=11.83, filter_name="GG495", target="TRG-511",
                exptime_s=1200.0, flexure_x_px=-0.27, seeing_fwhm_arcsec=1.31, moffat_beta=2.8)
            tm += 22
            add("science", tm, night, grtilt_deg=11.83, filter_name="GG495", target="TRG-511",
                exptime_s=1200.0, flexure_x_px=-0.3, defect="truncated", moffat_beta=2.8)
            tm += 22
        if size == "full":
            add("arc", tm, night, grtilt_deg=11.83, filter_name="GG495", lamps="Ne,He,Ar",
                exptime_s=8.0, flexure_x_px=-0.2)
            tm += 3
    # a corrupt file with a .fits name (observer's notes saved with the wrong extension)
    add("notes", tm + 1, night, defect="not_fits")
    if size == "full":
        # more biases and flats at the end of the night to reach about 80 frames
        for i in range(12):
            add("bias", tm + 10 + i, night)
    return plan


def _iso(t):
    return t.strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3]


def exposure_conditions(target, date_obs, exptime_s, *, site=None, targets=None, n_samples=41):
    """Times, airmass and velocity corrections of an exposure of a target.

    Returns a dict: ``mid_exposure_utc``, ``airmass_start``, ``airmass_mid_exposure``,
    ``airmass_exposure_mean`` (mean over ``n_samples`` equally spaced instants,
    Simpson's rule), ``v_bary_km_s``/``v_helio_km_s`` at mid-exposure
    (:func:`observing.velocity_corrections`, astropy) and the IERS note.
    """
    site = SITE if site is None else site
    tgt = (targets or src.TARGETS)[target] if isinstance(target, str) else target
    start = _dt.datetime.fromisoformat(date_obs)
    exp = float(exptime_s or 0.0)
    times = [start + _dt.timedelta(seconds=exp * k / (n_samples - 1)) for k in range(n_samples)]
    am = airmass_at(tgt.ra_deg, tgt.dec_deg, [_iso(t) for t in times],
                    latitude_deg=site["latitude_deg"], longitude_deg=site["longitude_deg"],
                    height_m=site["height_m"])
    from scipy.integrate import simpson
    mean = float(simpson(am, dx=1.0) / (n_samples - 1)) if exp > 0 else float(am[0])
    mid = start + _dt.timedelta(seconds=0.5 * exp)
    vel = velocity_corrections(tgt.ra_deg, tgt.dec_deg, _iso(mid), site)
    return {"mid_exposure_utc": _iso(mid), "airmass_start": float(am[0]),
            "airmass_mid_exposure": float(am[(n_samples - 1) // 2]),
            "airmass_exposure_mean": mean,
            "v_bary_km_s": vel["barycentric_km_s"], "v_helio_km_s": vel["heliocentric_km_s"],
            "velocity_note": vel["iers_note"]}


def make_frame(inst, spec, *, seed=DEFAULT_SEED, frame_key=0, **overrides):
    """Make the :class:`SimFrame` of one :class:`FrameSpec` (or None for a non-FITS file)."""
    opts = dict(spec.options)
    opts.update(overrides)
    reading = opts.pop("tilt_reading_deg", None)
    frame = _make_frame(inst, spec, opts, seed=seed, frame_key=frame_key)
    if frame is not None and reading is not None:
        # the encoder reading in the header jitters; the grating sits at the setup's angle
        key = "GRATPOS" if inst.name == "WREN" else "GRTILT"
        frame.header[key] = (round(float(reading), 5), frame.header.comments[key])
        frame.truth.info["tilt_reading_deg"] = float(round(float(reading), 5))
    return frame


def _make_frame(inst, spec, opts, *, seed, frame_key):
    common = dict(seed=seed, frame_key=frame_key, date_obs=spec.date_obs)
    if spec.kind == "bias":
        return make_bias(inst, grtilt_deg=spec.grtilt_deg, filter_name=spec.filter_name, **common, **opts)
    if spec.kind == "flat":
        return make_flat(inst, spec.grtilt_deg, filter_name=spec.filter_name,
                         exptime_s=spec.exptime_s, **common, **opts)
    if spec.kind in ("arc", "focus"):
        return make_arc(inst, spec.grtilt_deg, lamps=spec.lamps, filter_name=spec.filter_name,
                        exptime_s=spec.exptime_s, flexure_x_px=spec.flexure_x_px,
                        frame_type="FOCUS" if spec.kind == "focus" else "ARC",
                        object_name="focus HgAr,Ne" if spec.kind == "focus" else None,
                        **common, **opts)
    if spec.kind in ("standard", "science"):
        exptime = spec.exptime_s if spec.exptime_s is not None else opts.pop("exptime_for_signal")
        opts.pop("exptime_for_signal", None)
        nod = opts.pop("nod_arcsec", 0.0)
        cond = exposure_conditions(spec.target, spec.date_obs, exptime, site=inst.site,
                                   targets=inst.targets)
        frame = make_science(inst, spec.grtilt_deg, target=spec.target, filter_name=spec.filter_name,
                             exptime_s=exptime, airmass=cond["airmass_exposure_mean"],
                             header_airmass=cond["airmass_start" if inst.header_airmass_at == "start"
                                                 else "airmass_mid_exposure"],
                             v_corr_km_s=cond["v_bary_km_s"], moffat_beta=spec.moffat_beta,
                             slit_offset_arcsec=spec.slit_offset_arcsec,
                             flexure_x_px=spec.flexure_x_px, seeing_fwhm_arcsec=spec.seeing_fwhm_arcsec,
                             frame_type="STANDARD" if spec.kind == "standard" else "OBJECT",
                             **common, **opts)
        frame.truth.info.update(cond, nod_arcsec=float(nod))
        if spec.exptime_s is None:
            frame.header.remove("SHUTTIME" if inst.name == "WREN" else "EXPTIME")
        return frame
    if spec.kind == "notes":
        return None
    raise ValueError(f"FrameSpec {spec.frame_id}: unknown kind {spec.kind!r}")


def setup_name(grtilt_deg, filter_name, inst=None):
    """Simulator's label of a setup (not the pipeline's setup id)."""
    if inst is not None and inst.name == "WREN":
        from . import wren
        return wren.setup_label(grtilt_deg, filter_name)
    return f"G600_t{grtilt_deg:05.2f}_{filter_name}"


@dataclass
class NightTruth:
    """The simulated night: instrument, plan and per-frame truth (in memory)."""

    instrument: Instrument
    seed: int
    plan: list
    frames: dict          # frame_id -> SimFrame (None for the non-FITS file)
    paths: dict = field(default_factory=dict)

    def setups(self):
        return sorted({(s.grtilt_deg, s.filter_name) for s in self.plan
                       if s.kind not in ("bias", "notes")})


def make_night(out_dir=None, *, size="small", seed=DEFAULT_SEED, frames=None, instrument=None,
               write_truth_files=True, progress=False, **instrument_changes):
    """Simulate the demo night.

    Parameters
    ----------
    out_dir : str or Path, optional
        Where to write the raw FITS files (and ``truth/``); None keeps it in memory.
    size : {'small', 'full'}
    seed : int
        Master seed; each frame gets its own stream ``(seed, kind, index)`` so a
        subset of frames is identical to the same frames of the whole night.
    frames : iterable of str, optional
        Frame ids of :func:`night_plan` to make (default: all).
    instrument : Instrument or {'rls', 'wren'}, optional
        Default :func:`make_instrument(size, **instrument_changes)` (the RLS); a name
        makes that instrument's night.
    write_truth_files : bool
        Write ``truth/`` beside the raw frames.

    Returns
    -------
    NightTruth
    """
    if instrument is None or isinstance(instrument, str):
        inst = make_instrument(size, instrument or "rls", **instrument_changes)
    else:
        inst = instrument
    plan = night_plan(size, inst.name.lower())
    if frames is not None:
        wanted = set(frames)
        unknown = wanted - {s.frame_id for s in plan}
        if unknown:
            raise ValueError(f"`frames`: unknown frame id(s) {sorted(unknown)}")
        plan = [s for s in plan if s.frame_id in wanted]
    made = {}
    paths = {}
    out = Path(out_dir) if out_dir is not None else None
    if out is not None:
        out.mkdir(parents=True, exist_ok=True)
    for spec in plan:
        t0 = time.perf_counter()
        key = int(spec.frame_id.split("_")[-1])
        frame = make_frame(inst, spec, seed=seed, frame_key=key)
        made[spec.frame_id] = frame
        if out is not None:
            path = out / f"{spec.frame_id}.fits"
            _write_with_defect(frame, spec, path)
            paths[spec.frame_id] = path
        if progress:
            print(f"{spec.frame_id} {spec.kind:9s} {time.perf_counter() - t0:5.2f} s", file=sys.stderr)
    night = NightTruth(inst, seed, plan, made, paths)
    if out is not None and write_truth_files:
        write_truth(night, out / "truth")
    return night


#: defects of written files -> expected pipeline status
DEFECT_STATUS = {"": "ok", "truncated": "rejected", "no_exptime": "rejected", "not_fits": "rejected",
                 "saturated_everywhere": "rejected", "all_zero": "rejected", "mostly_nan": "rejected"}


def _defect_pixels(frame, defect):
    """Pixels a defective file holds instead of the frame's own (None: the frame's own)."""
    if defect == "saturated_everywhere":       # controller fault: every pixel at the ADC maximum
        return np.full_like(frame.raw, frame.truth.instrument.detector.adc_max_adu)
    if defect == "all_zero":                   # readout failure: an all-zero image
        return np.zeros_like(frame.raw)
    if defect == "mostly_nan":                 # a broken conversion: float32, 97 % NaN
        data = frame.raw.astype(np.float32)
        rng = np.random.default_rng(frame.header.get("SIMSEED", 0) + 7)
        data[rng.random(data.shape) < 0.97] = np.nan
        return data
    return None


def _write_with_defect(frame, spec, path):
    if spec.defect == "not_fits":
        path.write_text("Night notes 2026-05-28, RLS.\nClouds at 03:10 UT, closed 20 min.\n"
                        "Saved with the wrong extension by mistake.\n")
        return
    write_frame(frame, path, data=_defect_pixels(frame, spec.defect))
    if spec.defect == "truncated":
        data = path.read_bytes()
        path.write_bytes(data[: len(data) // 2 + 1234])  # transfer interrupted mid-data


# =============================================================================== truth files
def _write_ecsv(table_dict, path, meta=None):
    from astropy.table import Table
    t = Table(table_dict)
    if meta:
        t.meta.update(meta)
    t.write(path, format="ascii.ecsv", overwrite=True)


def _write_slit_table(path, trc, info, offset_arcsec, inst):
    lam = np.asarray(trc["wavelength_angstrom"], float)
    _write_ecsv({"x_px": trc["x_px"], "wavelength_air_angstrom": lam,
                 "wavelength_vacuum_angstrom": air_to_vac(lam),
                 "seeing_fwhm_arcsec": info["seeing_fwhm_arcsec_5000"] * (lam / 5000.0) ** -0.2,
                 "slit_fraction": trc["slit_fraction"],
                 "flux_total_erg_s_cm2_angstrom": trc["flux_total_erg_s_cm2_angstrom"],
                 "flux_in_slit_erg_s_cm2_angstrom": trc["flux_in_slit_erg_s_cm2_angstrom"]},
                path,
                {"comment": ("per binned canonical column at the trace: exact fraction of the star's "
                             "light entering the slit (seeing profile, centring offset, local slit "
                             "width incl. the ripple), f_lambda above the atmosphere at the telescope "
                             "(topocentric, per A of air wavelength) and the part entering the slit"),
                 "seeing_profile": info["seeing_profile"], "moffat_beta": info["moffat_beta"],
                 "seeing_fwhm_arcsec_5000": info["seeing_fwhm_arcsec_5000"],
                 "slit_offset_arcsec": float(offset_arcsec),
                 "slit_width_arcsec": inst.slit_width_arcsec, "v_corr_km_s": info["v_corr_km_s"]})


def write_truth(night, truth_dir, *, models=None):
    """Write the truth of a night (format in demo_data/README.md).

    ``models``: write the noise-free ``model_<frame>.fits`` images of standards and
    science frames (default: only for the small night; at full size they would
    take about 130 MB per frame).
    """
    if models is None:
        models = night.instrument.size == "small"
    from . import observer_tables
    truth_dir = Path(truth_dir)
    truth_dir.mkdir(parents=True, exist_ok=True)
    inst = night.instrument
    det = inst.detector
    grid = inst.grid
    wren_night = inst.name == "WREN"
    if wren_night:
        from . import wren
    index = {
        "format": "wren-demo-truth/1" if wren_night else "rls-demo-truth/1",
        "scenario": ("invented: Fellhaven Observatory, Fellhaven 2.4-m telescope, WREN spectrograph"
                     if wren_night else
                     "invented: Tarn Ridge Observatory, Tarn Ridge 1.8-m telescope, RLS spectrograph"),
        "seed": night.seed, "size": inst.size,
        "orientation": (("truth arrays are in the CANONICAL orientation: canonical[y, x] = "
                         f"raw[y, {det.n_prescan} + x] (pixels of the RAWPIX extension; no transpose, "
                         "no flip: wavelength increases with the raw column); x along increasing "
                         "wavelength, y along the slit, binned pixels, centres at integers")
                        if wren_night else
                        ("truth arrays are in the CANONICAL orientation: canonical[y, x] = "
                         "raw[nx_binned - 1 - x, y] (canonical = raw[::-1, :ny_binned].T); x along "
                         "increasing wavelength, y along the slit, binned pixels, centres at integers")),
        "raw_to_canonical": {"pixel_hdu": wren.EXTNAME if wren_night else 0,
                             "transpose": not wren_night, "flip_x": not wren_night, "flip_y": False,
                             "data_rows": [0, det.raw_shape[0]],
                             "data_columns": ([det.n_prescan, det.n_prescan + det.nxb] if wren_night
                                              else [0, det.nyb])},
        "binned_to_unbinned": "X_phys = bin_x * x + (bin_x - 1)/2 ; Y_phys = bin_y * y + (bin_y - 1)/2",
        "instrument": inst.to_dict(),
        "noise_model": {
            "gain_e_per_adu": det.gain_e_per_adu, "read_noise_e": det.read_noise_e,
            "read_noise_adu": det.read_noise_e / det.gain_e_per_adu,
            "bias_level_adu": det.bias_level_adu,
            "description": ("ADU = round(bias(row, col) + (Poisson(expected_e) + cosmic_e) / gain "
                            "+ N(0, read_noise/gain)); bias = level + per-frame offset N(0,1.5) + "
                            "4 ADU ramp along the readout + 2.5 exp(-row/30) transient + per-row "
                            "jitter N(0,0.7) shared with the overscan + fixed column pattern "
                            "(bias_pattern.fits, data columns only); clipped to 0..65535"),
        },
        "night_date_local": wren.NIGHT_DATE if wren_night else NIGHT_DATE,
        "wavelengths": ("air (standard air, Ciddor 1996: lambda_air = lambda_vac / n) in every map, "
                        "line table and trace file; targets are defined at rest in vacuum; "
                        "redshifts barycentric (vacuum)"),
        "velocity_convention": ("v_bary_km_s / v_helio_km_s: astropy radial_velocity_correction at "
                                "mid-exposure (v_true = v_measured + v_corr); the target's barycentric "
                                "vacuum spectrum is seen at lambda_vac / (1 + v_bary/c), then in air"),
        "site": dict(inst.site, extinction_model=
                     f"Rayleigh (Hansen & Travis 1974, pressure-scaled, {inst.atmosphere.height_m:g} m) "
                     f"+ aerosol {inst.atmosphere.aerosol_tau_5500:g} (l/5500)^-{inst.atmosphere.aerosol_alpha:g} "
                     f"+ ozone {inst.atmosphere.ozone_column_du:g} DU; O2 B and A bands applied in the "
                     "frames but not in the table",
                     telescope_area_cm2=inst.telescope_area_cm2),
        "setups": {}, "frames": {}, "targets": {},
    }
    if wren_night:
        index["conventions"] = wren.conventions(inst)
    fits.PrimaryHDU(det.pixel_response().astype(np.float32),
                    header=fits.Header([("COMMENT", "binned canonical relative pixel response")])
                    ).writeto(truth_dir / "pixel_response.fits", overwrite=True)
    fits.PrimaryHDU(det.bias_pattern_adu().astype(np.float32),
                    header=fits.Header([("COMMENT", "fixed bias pattern, RAW layout data section, ADU")])
                    ).writeto(truth_dir / "bias_pattern.fits", overwrite=True)
    for tilt, filt in night.setups():
        optics = inst.optics(tilt)
        name = setup_name(tilt, filt, inst)
        wmap = wavelength_map(inst, optics)
        hdr = fits.Header()
        hdr["GRTILT"] = (tilt, "[deg] header tilt of the setup")
        hdr["TRUETILT"] = (optics.tilt_deg, "[deg] true tilt")
        hdr["TRUEFCAM"] = (optics.camera_focal_length_mm, "[mm] true camera focal length")
        hdr["FILTER"] = filt
        hdr["BUNIT"] = "Angstrom"
        hdr["COMMENT"] = "Exact air wavelength at each binned canonical pixel centre, zero flexure."
        hdr["COMMENT"] = "Frame with flexure f (binned px): lambda(y, x) = this map at x - f."
        fits.PrimaryHDU(wmap, header=hdr).writeto(truth_dir / f"wavelength_{name}.fits", overwrite=True)
        thr = src.throughput(wmap[grid.nyb // 2], optics, filt)
        _write_ecsv({"x_px": np.arange(grid.nxb, dtype=float), "wavelength_angstrom": wmap[grid.nyb // 2],
                     "throughput": thr,
                     "spectrograph_throughput": src.spectrograph_throughput(wmap[grid.nyb // 2], optics, filt)},
                    truth_dir / f"throughput_{name}.ecsv",
                    {"comment": "telescope x spectrograph (and spectrograph only) at the central row"})
        index["setups"][name] = {"grtilt_deg": tilt, "filter": filt, "optics": optics.to_dict(),
                                 "wavelength_map": f"wavelength_{name}.fits",
                                 "throughput": f"throughput_{name}.ecsv",
                                 "wavelength_range_angstrom": [float(wmap.min()), float(wmap.max())]}
    cr_rows = {"frame_id": [], "y_px": [], "x_px": [], "electrons": []}
    for spec in night.plan:
        fid = spec.frame_id
        frame = night.frames.get(fid)
        entry = {"file": f"{fid}.fits", "kind": spec.kind, "defect": spec.defect,
                 "expected_pipeline_status": DEFECT_STATUS[spec.defect] if spec.defect else
                 ("ignored" if spec.kind == "focus" else "ok"),
                 "date_obs": spec.date_obs}
        if frame is None:
            index["frames"][fid] = entry
            continue
        tr = frame.truth
        entry.update(exptime_s=tr.exptime_s, n_cosmic=tr.info.get("n_cosmic"),
                     n_saturated_pixels=tr.info.get("n_saturated"))
        if tr.optics is not None:
            entry.update(setup=setup_name(spec.grtilt_deg, spec.filter_name, inst),
                         flexure_x_px=tr.flexure_x_px)
        if "tilt_reading_deg" in tr.info:
            entry["tilt_reading_deg"] = tr.info["tilt_reading_deg"]
        ys, xs = np.nonzero(tr.cosmic_e > 0)
        cr_rows["frame_id"] += [fid] * len(ys)
        cr_rows["y_px"] += ys.tolist()
        cr_rows["x_px"] += xs.tolist()
        cr_rows["electrons"] += tr.cosmic_e[ys, xs].astype(float).tolist()
        if tr.frame_type in ("arc", "focus"):
            ln = tr.info["lines"]
            yc = grid.nyb // 2
            _write_ecsv({"species": ln["species"], "wavelength_air_angstrom": ln["wavelength_air_angstrom"],
                         "electrons_total": ln["electrons_total"],
                         "x_px_row0": ln["x_px_per_row"][:, 0],
                         "x_px_centre_row": ln["x_px_per_row"][:, yc],
                         "x_px_last_row": ln["x_px_per_row"][:, -1]},
                        truth_dir / f"lines_{fid}.ecsv",
                        {"comment": f"binned canonical x of each line; centre row y = {yc}; "
                                    "electrons_total = expected electrons summed over the slit",
                         "lamps": tr.info["lamps"]})
            entry["lines"] = f"lines_{fid}.ecsv"
            entry["lamps"] = tr.info["lamps"]
        if tr.frame_type in ("science", "standard"):
            entry.update(target=tr.info["target"], airmass=tr.info["airmass"],
                         seeing_fwhm_arcsec_5000=tr.info["seeing_fwhm_arcsec_5000"],
                         seeing_profile=tr.info["seeing_profile"],
                         moffat_beta=tr.info["moffat_beta"],
                         slit_offset_arcsec=tr.info["slit_offset_arcsec"],
                         trace_y_px_centre=tr.info["trace_y_px_centre"],
                         trace_drift_px=list(tr.info["trace_drift_px"]),
                         v_corr_applied_km_s=tr.info["v_corr_km_s"])
            for key in ("mid_exposure_utc", "airmass_start", "airmass_mid_exposure",
                        "airmass_exposure_mean", "v_bary_km_s", "v_helio_km_s", "velocity_note",
                        "nod_arcsec", "redshift_topocentric"):
                if key in tr.info:
                    entry[key] = tr.info[key]
            trc = tr.info["trace"]
            if "flux_total_erg_s_cm2_angstrom" in trc:
                _write_slit_table(truth_dir / f"slit_{fid}.ecsv", trc, tr.info,
                                  tr.info["slit_offset_arcsec"], inst)
                entry["slit"] = f"slit_{fid}.ecsv"
            comps = []
            for comp in tr.info.get("companions", ()):
                stem = f"{fid}_{comp['target']}"
                _write_ecsv(dict(comp["trace"]), truth_dir / f"trace_{stem}.ecsv",
                            {"comment": f"star {comp['target']} on the slit of {fid}: per binned "
                                        "canonical column, as trace_<frame>.ecsv"})
                _write_slit_table(truth_dir / f"slit_{stem}.ecsv", comp["trace"], tr.info,
                                  comp["slit_offset_arcsec"], inst)
                comps.append({"target": comp["target"], "trace_y_px_centre": comp["trace_y_px_centre"],
                              "slit_offset_arcsec": comp["slit_offset_arcsec"],
                              "trace": f"trace_{stem}.ecsv", "slit": f"slit_{stem}.ecsv",
                              "model_extension": f"STAR{len(comps) + 1}"})
            if comps:
                entry["companions"] = comps
            _write_ecsv(dict(tr.info["trace"]), truth_dir / f"trace_{fid}.ecsv",
                        {"comment": "per binned canonical column: trace centre, wavelength at the "
                                    "trace, noise-free object electrons summed along the slit, sky "
                                    "electrons per pixel at the trace"})
            entry["trace"] = f"trace_{fid}.ecsv"
            if models:
                hdus = [fits.PrimaryHDU()]
                for cname, arr in tr.components.items():
                    hdus.append(fits.ImageHDU(arr, name=cname.upper()))
                fits.HDUList(hdus).writeto(truth_dir / f"model_{fid}.fits", overwrite=True)
                entry["model"] = f"model_{fid}.fits"
            if tr.info.get("galaxy_lines"):
                entry["galaxy_lines"] = tr.info["galaxy_lines"]
                entry["redshift"] = tr.info["redshift"]
        index["frames"][fid] = entry
    _write_ecsv(cr_rows, truth_dir / "cosmic_rays.ecsv",
                {"comment": "cosmic-ray electrons per binned canonical pixel, per frame"})
    # intrinsic spectra of the targets
    spec_dir = truth_dir / "spectra"
    spec_dir.mkdir(exist_ok=True)
    lam = np.arange(3200.0, 10000.0 + 0.5, 1.0)
    for name, tgt in inst.targets.items():
        _write_ecsv({"wavelength_angstrom": lam, "flux_erg_s_cm2_angstrom": tgt.f_lambda_at_telescope(lam),
                     "wavelength_vacuum_angstrom": air_to_vac(lam)},
                    spec_dir / f"{name}.ecsv",
                    {"comment": f"intrinsic f_lambda of {name} in the BARYCENTRIC frame (redshift "
                                "included, no observer motion) at AIR wavelengths (wavelength_angstrom; "
                                "wavelength_vacuum_angstrom beside it), above the atmosphere; extended "
                                "sources: flux entering the slit. Per frame, the topocentric spectrum "
                                "of a star is in slit_<frame>.ecsv"})
        air_obs = tgt.line_air_wavelengths(0.0) if tgt.lines else []
        index["targets"][name] = {
            "kind": tgt.kind, "ra_deg": tgt.ra_deg, "dec_deg": tgt.dec_deg, "redshift": tgt.redshift,
            "redshift_definition": "barycentric, from vacuum wavelengths: lambda_bary_vac = "
                                   "lambda_rest_vac (1 + z)",
            "spectrum": f"spectra/{name}.ecsv", "info": tgt.info,
            "lines": [{"name": ln.name, "rest_wavelength_angstrom": ln.rest_wavelength_angstrom,
                       "rest_wavelength_vacuum_angstrom": ln.rest_wavelength_vacuum_angstrom,
                       "observed_wavelength_angstrom": float(air_obs[i]),
                       "observed_wavelength_vacuum_angstrom":
                           ln.rest_wavelength_vacuum_angstrom * (1 + tgt.redshift),
                       "flux_erg_s_cm2": ln.flux_erg_s_cm2} for i, ln in enumerate(tgt.lines)],
            "rotation_vmax_km_s": tgt.rotation_vmax_km_s,
            "rotation_rturn_arcsec": tgt.rotation_rturn_arcsec,
            "velocity_dispersion_km_s": tgt.velocity_dispersion_km_s,
        }
    _write_ecsv({"wavelength_angstrom": lam,
                 "extinction_mag_per_airmass": src.extinction_mag_per_airmass(lam, site=inst.atmosphere)},
                truth_dir / "extinction_model.ecsv", {"comment": "true mean extinction of the site"})
    index["observer_tables"] = observer_tables.WREN_SHIPPED if wren_night else observer_tables.SHIPPED
    with open(truth_dir / "index.json", "w") as fh:
        json.dump(index, fh, indent=1, default=_json_default)
    return truth_dir


def _json_default(obj):
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, (np.floating, np.integer)):
        return obj.item()
    if isinstance(obj, np.bool_):
        return bool(obj)
    raise TypeError(f"not JSON serialisable: {type(obj)}")


# =============================================================================== CLI
def main(argv=None):
    parser = argparse.ArgumentParser(
        prog="python -m demo_data.simulate",
        description="Simulate a night of an invented long-slit spectrograph (default: RLS at Tarn "
                    "Ridge Observatory; --instrument wren: WREN at Fellhaven Observatory), writing "
                    "raw FITS frames and the truth (DIR/truth/).")
    parser.add_argument("--out", required=True, help="output folder for the raw frames")
    parser.add_argument("--instrument", choices=("rls", "wren"), default="rls",
                        help="rls: the demo night (default); wren: the second invented instrument "
                             "(18 files, 220 x 832 raw pixels, small only)")
    parser.add_argument("--size", choices=("small", "full"), default="small",
                        help="small: 2x2-binned 1024x256 RLS night of 28 frames (default); "
                             "full: 4096x2048 unbinned, 82 frames (benchmarks; RLS only)")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help=f"random seed (default {DEFAULT_SEED})")
    parser.add_argument("--quiet", action="store_true", help="no progress lines")
    args = parser.parse_args(argv)
    t0 = time.perf_counter()
    if args.instrument == "wren" and args.size != "small":
        parser.error("--instrument wren exists in --size small only")
    night = make_night(args.out, size=args.size, seed=args.seed, instrument=args.instrument,
                       progress=not args.quiet)
    print(f"simulated {len(night.plan)} files into {args.out} in {time.perf_counter() - t0:.1f} s "
          f"(truth in {Path(args.out) / 'truth'})", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
