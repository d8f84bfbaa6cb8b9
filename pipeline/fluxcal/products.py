"""The flux calibration's products on disk: the sensitivity, calibrated spectra, listings.

:func:`read_sensitivity` is the reader later steps use; the writers are called by the
adapters in :mod:`pipeline.fluxcal.steps`.

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

import math
import re
import warnings
from pathlib import Path

import numpy as np

from pipeline.core import maskbits, provenance
from pipeline.core.errors import FluxCalibrationError, InputFileError
from pipeline.core.spectra import wcs_wavelengths_angstrom
from pipeline.fluxcal.sensitivity import SensitivityFit
from pipeline.fluxcal.standards import FLUX_UNIT
from pipeline.fluxcal.telluric import TelluricTemplate

__all__ = ["read_sensitivity", "write_sensitivity", "write_fluxed_spectrum",
           "sensitivity_qa_table", "write_listing", "LISTING_NAME", "FLUX_UNIT"]

#: Name of the listing written in every spectra_fluxed/{frame}/ directory.
LISTING_NAME = "fluxed_spectra.ecsv"


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
    try:
        world = wcs_wavelengths_angstrom(header, wave_angstrom.size)
    except Exception:  # noqa: BLE001 - any WCS problem means "does not match"
        return False
    if world is None:
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


def sensitivity_qa_table(rows, meta):
    """The QA table of a sensitivity: one row per standard frame (ECSV-ready)."""
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


def write_listing(path, rows, meta):
    """Write the listing of one frame's calibrated spectra (ECSV)."""
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
