"""Reading the extraction step's 1-D spectra (any specutils-style 1-D spectrum).

:func:`read_spectrum` reads one spectrum with astropy alone when the file has the
one-spectrum-per-HDU layout (fast start-up for a job), else through
``specutils.Spectrum.read``; :func:`read_spectra_directory` lists the spectra of one
frame from the extraction's listing.
"""

import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from pipeline.core import maskbits
from pipeline.core.errors import FluxCalibrationWarning, InputFileError
from pipeline.core.maskbits import MaskBit

__all__ = ["ExtractedSpectrum", "read_spectrum", "read_spectra_directory"]


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
