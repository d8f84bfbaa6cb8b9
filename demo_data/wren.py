"""The second invented instrument: WREN, the Wren Slit Spectrograph of Fellhaven Observatory.

Everything here is invented (instrument, observatory, site, telescope, targets).
Its conventions differ from the RLS demo on purpose, so that a reduction of it
exercises everything an instrument file has to describe:

* pixels in an IMAGE extension ``RAWPIX`` (the primary HDU has no data), uint16;
  detector keywords in the extension header, observation keywords in the primary,
* dispersion along FITS axis 1 with wavelength INCREASING with the column (the
  RLS has it along FITS axis 2, decreasing), 8 prescan + 24 overscan columns,
* binning 2 (spectral, FITS axis 1) x 1 (spatial, FITS axis 2): ``DETBIN = '2 1'``,
* its own keyword names and frame-type values (:data:`KEYWORDS`, :data:`FRAME_TYPES`),
* grating-angle readings that jitter by a few 1e-4 deg between frames of a setup and
  straddle the rounding boundary at two decimals (12.34487 ... 12.34521),
* sexagesimal RA/DEC strings, the airmass at the START of the exposure,
* its own lamps, site extinction, standard star and flux-table conventions (nm,
  vacuum, AB magnitudes), Moffat seeing, and hostile files.

Only the physics (the same models as the RLS: :mod:`demo_data.optics`,
:mod:`demo_data.sources`, :mod:`demo_data.observing`) is shared.
"""

import datetime as _dt

import numpy as np

from . import sources as src

__all__ = ["SITE", "TELESCOPE", "KEYWORDS", "FRAME_TYPES", "EXTNAME", "SETUPS",
           "make_wren_instrument", "wren_header", "wren_plan", "setup_label",
           "PRIMARY_ONLY_KEYS", "EXTENSION_KEYS"]

SITE = {"name": "Fellhaven Observatory", "latitude_deg": 43.27, "longitude_deg": 104.62,
        "height_m": 1850.0}
TELESCOPE = "Fellhaven 2.4-m"
INSTRUMENT_NAME = "WREN"
NIGHT_DATE = "2026-10-07"  # local date of the evening (UT = local - 7 h: the night is one UT date)
EXTNAME = "RAWPIX"

#: the atmosphere of the invented site: lower, dustier, more ozone than Tarn Ridge
ATMOSPHERE = src.SiteAtmosphere(height_m=1850.0, aerosol_tau_5500=0.075, aerosol_alpha=1.1,
                                ozone_column_du=315.0)

#: role -> header keyword (what an instrument file maps)
KEYWORDS = {
    "frame_type": "EXPKIND", "object": "SRCNAME", "exposure_time_s": "SHUTTIME",
    "date_obs": "SHUTOPEN", "airmass": "AMSTART", "ra": "POINTRA", "dec": "POINTDEC",
    "grating": "GRATNAME", "grating_tilt_deg": "GRATPOS", "slit_width_arcsec": "SLITSIZE",
    "binning": "DETBIN", "filter": "BLOCKFLT", "lamps": "CALSRC", "gain": "EGAIN",
    "read_noise": "RONOISE", "saturation": "SATLEVEL", "data_section": "DATAREG",
    "overscan_section": "OSCANREG", "seeing": "SEEFWHM",
}
#: simulator frame type -> EXPKIND value
FRAME_TYPES = {"BIAS": "ZEROREAD", "FLAT": "LAMPFLAT", "ARC": "COMPARC", "STANDARD": "FLUXSTD",
               "OBJECT": "SCIENCE", "FOCUS": "FOCUSRUN"}
#: detector keywords written in the RAWPIX extension header (the rest go to the primary)
EXTENSION_KEYS = ("EXTNAME", "DETBIN", "EGAIN", "RONOISE", "SATLEVEL", "DATAREG", "OSCANREG",
                  "PRESCAN", "DETNAME", "DETTEMP")
PRIMARY_ONLY_KEYS = ()

#: the two setups: nominal grating angle (deg), order-blocking filter, arc lamps
SETUPS = {"blue": (12.345, "CLEAR", "NEON+KRYPTON+XENON"),
          "red": (17.885, "LP570", "KRYPTON+XENON")}
#: grating-angle readings per frame: nominal + these offsets (deg), cycling; they straddle
#: 12.345 / 17.885, the rounding boundary at two decimals (encoder noise; the grating
#: itself sits at the same true angle for every frame of a setup)
TILT_JITTER_DEG = (0.00012, -0.00009, 0.00021, -0.00013, 0.00004, -0.00026, 0.00017, -0.00004,
                   0.00008, -0.00019)


def make_wren_instrument(**changes):
    """The true WREN (small frames for CI: 1600 x 220 unbinned, read out 2 x 1 binned).

    Raw frames are 220 rows x (8 + 800 + 24) columns; canonical frames 220 x 800.
    ``changes``: any Instrument or Detector field, as for the RLS.
    """
    from .detector import Detector
    from .simulate import Instrument

    det_fields = set(Detector.__dataclass_fields__)
    det = dict(nx_phys=1600, ny_phys=220, bin_x=2, bin_y=1, n_overscan=24, n_prescan=8,
               pixel_size_mm=0.0135, gain_e_per_adu=1.45, read_noise_e=3.3, gain_nominal=1.40,
               read_noise_nominal=3.5, bias_level_adu=1500.0, dead_columns=(51,),
               hot_columns=(170,), hot_column_e_per_s=0.4, low_column=(133, 900, 0.6),
               pixel_response_rms=0.009, readout_time_s=12.0, seed=20261007, layout="wren")
    det.update({k: changes.pop(k) for k in list(changes) if k in det_fields})
    base = dict(tilt_error_deg=-0.12, focal_length_error=-0.006, nominal_focal_length_mm=185.0,
                groove_density_per_mm=720.0, camera_collimator_angle_deg=38.0,
                detector_offset_px=-2.1, distortion_a3_px=-0.5, line_tilt_px_per_px=-0.0035,
                psf_sigma_px=1.1, slit_width_arcsec=1.5, spatial_scale_arcsec=0.30,
                slit_rows=(12, 207), slit_ripple=((0.010, 61.0, 1.9), (0.005, 23.0, 0.4)),
                size="small", name=INSTRUMENT_NAME, blaze_wavelength_angstrom=6000.0,
                telescope_area_cm2=0.25 * np.pi * (240.0 ** 2 - 80.0 ** 2), atmosphere=ATMOSPHERE,
                site=dict(SITE), catalogue="wren", header_airmass_at="start")
    base.update(changes)
    unknown = set(base) - set(Instrument.__dataclass_fields__)
    if unknown:
        raise TypeError(f"make_wren_instrument: unknown parameter(s) {sorted(unknown)}")
    return Instrument(detector=Detector(**det), **base)


def setup_label(grtilt_deg, filter_name):
    """Simulator's label of a WREN setup (nominal angle, 3 decimals)."""
    return f"RG720_a{grtilt_deg:06.3f}_{filter_name}"


def _sexagesimal(value_deg, *, hours):
    v = value_deg / 15.0 if hours else value_deg
    sign = "-" if v < 0 else "+"
    v = abs(v)
    d = int(v)
    m = int((v - d) * 60)
    sec = (v - d - m / 60.0) * 3600.0
    if hours:
        return f"{d:02d}:{m:02d}:{sec:05.2f}"
    return f"{sign}{d:02d}:{m:02d}:{sec:04.1f}"


def wren_header(inst, frame_type, *, exptime_s, date_obs, grtilt_deg, filter_name, lamps,
                object_name, ra_deg=None, dec_deg=None, airmass=None, seed=0):
    """Header cards of a WREN frame (primary and RAWPIX keywords in one Header; the writer splits)."""
    from astropy.io import fits

    det = inst.detector
    h = fits.Header()
    h["EXPKIND"] = (FRAME_TYPES.get(frame_type, frame_type), "kind of exposure")
    h["SRCNAME"] = (object_name, "source name")
    if exptime_s is not None:
        h["SHUTTIME"] = (float(exptime_s), "[s] shutter open time")
    h["SHUTOPEN"] = (date_obs, "UTC when the shutter opened (ISO 8601)")
    if ra_deg is not None:
        h["POINTRA"] = (_sexagesimal(ra_deg, hours=True), "[h:m:s] right ascension (ICRS)")
        h["POINTDEC"] = (_sexagesimal(dec_deg, hours=False), "[d:m:s] declination (ICRS)")
        h["RADECSYS"] = ("ICRS", "frame of POINTRA/POINTDEC")
    if airmass is not None:
        h["AMSTART"] = (round(float(airmass), 4), "airmass when the shutter opened")
    h["TELESCOP"] = (TELESCOPE, "telescope (invented)")
    h["INSTRUME"] = (INSTRUMENT_NAME, "Wren Slit Spectrograph (invented)")
    h["OBSERVAT"] = (SITE["name"], "observatory (invented)")
    h["OBS-LAT"] = (SITE["latitude_deg"], "[deg] site latitude (north positive)")
    h["OBS-LONG"] = (SITE["longitude_deg"], "[deg] site longitude (east positive)")
    h["OBS-ELEV"] = (SITE["height_m"], "[m] site elevation")
    h["GRATNAME"] = ("RG720", "grating (720 grooves/mm)")
    h["GRATPOS"] = (round(float(grtilt_deg), 5), "[deg] grating angle (encoder reading)")
    h["SLITSIZE"] = (inst.slit_width_arcsec, "[arcsec] slit width")
    h["BLOCKFLT"] = (filter_name, "order-blocking filter")
    h["CALSRC"] = (lamps, "calibration source(s) on")
    h["EXTNAME"] = (EXTNAME, "raw pixels")
    h["DETBIN"] = (det.ccdsum, "binning: FITS axis 1 (dispersion), 2 (slit)")
    h["DETNAME"] = ("WREN-CCD", f"{det.nx_phys}x{det.ny_phys} 13.5um CCD")
    h["EGAIN"] = (det.gain_nominal, "[e-/ADU] nominal gain")
    h["RONOISE"] = (det.read_noise_nominal, "[e-] nominal read noise")
    h["SATLEVEL"] = (62000, "[ADU] saturation level")
    h["DATAREG"] = (det.datasec, "data region")
    h["OSCANREG"] = (det.biassec, "serial overscan region")
    h["PRESCAN"] = (det.n_prescan, "prescan columns before the data")
    h["DETTEMP"] = (-105.0, "[C] detector temperature")
    h["SIMULATD"] = (True, "simulated by demo_data.simulate")
    h["SIMSEED"] = (int(seed), "simulator seed of this frame")
    return h


def split_header(header):
    """(primary, RAWPIX extension) headers of a WREN frame."""
    from astropy.io import fits

    prim, ext = fits.Header(), fits.Header()
    for card in header.cards:
        (ext if card.keyword in EXTENSION_KEYS else prim).append(card)
    return prim, ext


def _t(base, minutes):
    return (base + _dt.timedelta(minutes=minutes)).strftime("%Y-%m-%dT%H:%M:%S")


def wren_plan(size="small"):
    """The planned frames of the WREN night, in observing order (list of FrameSpec).

    Hostile files: a science frame saturated everywhere, an all-zero frame, a
    mostly-NaN frame (float32) and a truncated file; all must be refused with a
    message naming the file, while the rest of the night is reduced.
    """
    from .simulate import FrameSpec

    if size != "small":
        raise ValueError(f"`size`: the WREN night exists in size 'small' only, got {size!r}")
    day = _dt.datetime(2026, 10, 7, 10, 0, 0)     # UTC (local 17:00)
    night = _dt.datetime(2026, 10, 7, 12, 40, 0)  # UTC (local 19:40)
    plan = []
    jitter = iter(TILT_JITTER_DEG * 3)
    n = [0]

    def add(kind, minutes, base, setup=None, **kw):
        n[0] += 1
        if setup is not None:
            tilt, filt, lamps = SETUPS[setup]
            kw.setdefault("grtilt_deg", tilt)
            kw.setdefault("filter_name", filt)
            if kind in ("arc",):
                kw.setdefault("lamps", lamps)
            reading = tilt + next(jitter)
            kw["options"] = tuple(kw.get("options", ())) + (("tilt_reading_deg", reading),)
        plan.append(FrameSpec(frame_id=f"wren_{n[0]:04d}", kind=kind, date_obs=_t(base, minutes),
                              **kw))

    for i in range(3):
        add("bias", i, day, grtilt_deg=SETUPS["blue"][0], filter_name="CLEAR",
            options=(("tilt_reading_deg", SETUPS["blue"][0] + TILT_JITTER_DEG[i]),))
    for i in range(2):
        add("flat", 10 + i, day, "blue", exptime_s=4.0)
    for i in range(2):
        add("flat", 15 + i, day, "red", exptime_s=3.0)
    add("flat", 17, day, "red", exptime_s=3.0, defect="truncated")
    # red setup first: the galaxy rising at airmass ~1.8
    add("arc", 0, night, "red", exptime_s=12.0, flexure_x_px=0.05)
    add("standard", 4, night, "red", target="FHV-S4", exptime_s=10.0, flexure_x_px=0.08,
        seeing_fwhm_arcsec=1.42, moffat_beta=2.9, slit_offset_arcsec=0.09)
    add("science", 8, night, "red", target="FHV-G27", exptime_s=1800.0, flexure_x_px=0.12,
        seeing_fwhm_arcsec=1.55, moffat_beta=3.1, slit_offset_arcsec=0.0,
        options=(("companions", (("FHV-F2", 62.0),)),))
    # blue setup
    add("arc", 42, night, "blue", exptime_s=15.0, flexure_x_px=-0.04)
    add("standard", 46, night, "blue", target="FHV-S4", exptime_s=10.0, flexure_x_px=-0.02,
        seeing_fwhm_arcsec=1.35, moffat_beta=3.3, slit_offset_arcsec=-0.12)
    faint_y = (("trace_y_px", 138.0),)
    add("science", 50, night, "blue", target="FHV-F9", exptime_s=1200.0, flexure_x_px=0.03,
        seeing_fwhm_arcsec=1.48, moffat_beta=2.7, slit_offset_arcsec=0.07, options=faint_y)
    add("science", 72, night, "blue", target="FHV-F9", exptime_s=1200.0, flexure_x_px=0.04,
        seeing_fwhm_arcsec=1.5, moffat_beta=2.7, defect="all_zero", options=faint_y)
    add("science", 94, night, "blue", target="FHV-F9", exptime_s=1200.0, flexure_x_px=0.05,
        seeing_fwhm_arcsec=1.5, moffat_beta=2.7, defect="mostly_nan", options=faint_y)
    # late in the night: the galaxy setting at airmass ~1.8
    add("science", 402, night, "blue", target="FHV-G27", exptime_s=1800.0, flexure_x_px=0.1,
        seeing_fwhm_arcsec=1.6, moffat_beta=3.0, defect="saturated_everywhere",
        options=(("companions", (("FHV-F2", 62.0),)),))
    add("science", 436, night, "blue", target="FHV-G27", exptime_s=1800.0, flexure_x_px=0.14,
        seeing_fwhm_arcsec=1.52, moffat_beta=3.2, slit_offset_arcsec=0.0,
        options=(("companions", (("FHV-F2", 62.0),)),))
    return plan


def conventions(inst):
    """Everything an instrument file for WREN needs (also written to truth/index.json)."""
    det = inst.detector
    return {
        "pixel_extension": EXTNAME, "primary_hdu": "no data; observation keywords",
        "extension_keywords": list(EXTENSION_KEYS),
        "raw_dtype": "uint16 (BITPIX 16, BZERO 32768); the mostly-NaN hostile file is float32",
        "dispersion_axis_fits": 1, "wavelength_increases_with_pixel": True,
        "binning_keyword_value": f"{KEYWORDS['binning']} = '{det.ccdsum}' (FITS axis 1 = dispersion, "
                                 "axis 2 = slit)",
        "keywords": dict(KEYWORDS), "frame_types": dict(FRAME_TYPES),
        "ra_dec_format": "sexagesimal strings: POINTRA 'HH:MM:SS.SS' (hours), POINTDEC '+DD:MM:SS.S'",
        "date_format": "SHUTOPEN: ISO 8601 UTC, shutter opening",
        "airmass": "AMSTART: airmass at the START of the exposure",
        "grating_angle": ("GRATPOS: encoder reading, 5 decimals, jitters by up to 3e-4 deg between "
                          "frames of one setup around 12.345 / 17.885 (straddles the 2-decimal "
                          "rounding boundary); group setups with a tolerance, not by rounding"),
        "setups": {setup_label(t, f, ): {"grating_angle_nominal_deg": t, "filter": f, "arc_lamps": lamps}
                   for t, f, lamps in SETUPS.values()},
        "lamps": {"NEON": ["Ne I"], "KRYPTON": ["Kr I"], "XENON": ["Xe I"], "HALOGEN": "flat lamp"},
        "order_blocking_filters_cut_on_angstrom": {"CLEAR": None, "LP570": 5700.0},
        "optics_nominal": {
            "groove_density_per_mm": inst.groove_density_per_mm, "order": 1,
            "camera_collimator_angle_deg": inst.camera_collimator_angle_deg,
            "camera_focal_length_mm": inst.nominal_focal_length_mm,
            "pixel_size_um": det.pixel_size_mm * 1000.0,
            "detector_pixels_dispersion_unbinned": det.nx_phys,
            "detector_pixels_slit_unbinned": det.ny_phys,
            "spatial_scale_arcsec_per_unbinned_px": inst.spatial_scale_arcsec,
            "slit_width_arcsec": inst.slit_width_arcsec,
            "blaze_wavelength_angstrom": inst.blaze_wavelength_angstrom,
            "collimated_beam_mm": 50.0,
        },
        "detector_nominal": {"gain_e_per_adu": det.gain_nominal, "read_noise_e": det.read_noise_nominal,
                             "saturation_adu": 62000, "adc_max_adu": det.adc_max_adu,
                             "data_section": det.datasec, "overscan_section": det.biassec,
                             "prescan_columns": det.n_prescan},
        "site": dict(SITE), "telescope": TELESCOPE,
        "extinction_table": "demo_data/fellhaven_extinction.ecsv",
        "standard_table": "demo_data/standards/FHV-S4.ecsv (wavelength nm VACUUM, AB magnitudes)",
    }
