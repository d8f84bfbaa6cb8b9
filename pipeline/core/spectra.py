"""The 1-D spectrum product: one FITS file per exposure and object.

Written by the extraction step into ``spectra/{frame}/`` below the output
folder, one file per object on the slit, named from the sanitised OBJECT keyword
(:func:`sanitise_name`) and the object's label (:func:`spectrum_file_name`):
``{OBJECT}_target.fits`` for the target (the object nearest the expected slit
position, ``tracing.target_offset_arcsec`` or ``tracing.target_offset_keyword``),
``{OBJECT}_other1.fits``, ``{OBJECT}_other2.fits``... for the other objects on
the slit, in decreasing detection S/N. The same folder holds ``extraction.ecsv``,
the listing of what was written (:data:`LISTING_COLUMNS`; its meta lists the
candidates that were found not to be sources, with the reason).

Reading
-------
``specutils.Spectrum.read(path)`` (no format argument; the ``wcs1d-fits``
reader) gives the **optimal extraction**:

* ``spectral_axis``: air wavelengths of the pixel centres. The file says
  ``CTYPE1 = 'AWAV'`` (``'AWAV-LOG'`` on a log grid), ``CUNIT1 = 'Angstrom'``
  (Greisen et al. 2006, A&A 446, 747); astropy.wcs normalises the unit, so the
  axis comes back in metres: use ``spec.spectral_axis.to(u.AA)``.
* ``flux``: electron, the total number of electrons of the object in each
  spectral pixel during the whole exposure (not per second, not per Angstrom).
* ``uncertainty``: :class:`~astropy.nddata.VarianceUncertainty` in electron².
* ``mask``: uint8 bits of :mod:`pipeline.core.maskbits` (0 = good; nonzero = do not
  use). Bits set: NO_COVERAGE outside the frame's coverage, and the OR of the
  bits of the masked pixels when they carry more than the configured fraction
  of the spatial profile (cosmic rays, bad pixels, saturation...).
* ``meta['header']``: the header of HDU 0 (below).

:func:`read_spectrum` reads the same file (either extraction) with astropy only, and any
other specutils-style 1-D spectrum (the flux calibration reads its inputs with it), as an
:class:`ExtractedSpectrum`.

File layout
-----------
========= ======= ==================================================================
HDU       type    content
========= ======= ==================================================================
0 FLUX    image   optimal extraction (Horne 1986), float32, BUNIT electron; header
1 VAR     image   variance of FLUX, float32, electron² (``UTYPE='VarianceUncertainty'``)
2 MASK    image   uint8 mask bits of FLUX
3 SUMFLUX image   boxcar sum over the aperture, float32, electron (same grid and WCS)
4 SUMVAR  image   variance of SUMFLUX, electron² (``UTYPE='VarianceUncertainty'``)
5 SUMMASK image   uint8 mask bits of SUMFLUX
6 SKY     image   sky model summed over the boxcar aperture, electron (what was subtracted)
7 TRACE   image   trace centre per pixel, float32, rows of the rectified frame (0-based)
========= ======= ==================================================================

Every image HDU carries the same spectral WCS cards. Variances include the
error of the sky model, which is fully correlated along the slit and is added
as such (see :mod:`pipeline.extraction.extract`); neighbouring spectral pixels are
correlated by the rectification (``VARCORR``, see :mod:`pipeline.extraction.rectify`).

Header keywords of HDU 0
------------------------
Copied from the calibrated frame: ``OBJECT``, ``EXPTIME`` (s), ``AIRMASS``,
``DATE-OBS``, ``RA``, ``DEC`` (standard names written by the CCD calibration from the
configured raw keywords, values as the raw header had them; degrees in the demo
data), plus any of ``GRATING GRTILT SLITWID FILTER BINSPEC BINSPAT`` present.
Written by the extraction:

============ ==========================================================
``SETUP``    setup id of the inventory (e.g. ``G600_t08.93_s1.2_2x2_NONE``)
``FRAMEID``  frame id of the exposure
``FRAMETYP`` ``standard`` or ``science``
``OBJROLE``  ``target`` or ``other`` (another object on the slit)
``OBJLABEL`` ``target``, ``other1``, ``other2``... (the label of the file name)
``NOBJECTS`` number of objects traced on this frame
``EXPECTAS`` where the target was expected, arcsec along the slit from its centre
``OBJPOSPX`` trace centre at the reference wavelength, row of the rectified frame
``OBJPOSAS`` same, arcsec along the slit from the slit centre
``OBJREFWL`` reference wavelength of OBJPOSPX, Angstrom
``BOXHALFW`` boxcar half width, rows
``SPATFWHM`` spatial FWHM of the profile, rows
``TRCMODE``  ``own`` (fitted), ``reference`` (shape of a bright reference trace,
             offset fitted; ``TRCREF`` names the reference frame) or ``fixed``
``EXTMETH``  ``optimal`` (HDU 0) ; boxcar sum in HDU 3 (SUMFLUX)
``SNRMED``   median S/N per pixel of FLUX over good pixels
``NREJECT``  pixels rejected in the profile fit
``FLEXPIX``  flexure shift applied, pixels along the dispersion (+ = features
             appear at larger x than in the arc); ``FLEXERR`` its error
             (-1 = not measured), ``FLEXSTAT`` ``ok``/``no_lines``/``disabled``
``FLEXKMS``  the same as a velocity, km/s
``SKYSUB``   T
``SPECSYS``  ``TOPOCENT``
``VARCORR``  variance ratio of long sums along the dispersion (rectify.py)
``VARRN``    variance model of the frame ``a + b S + c S^2``: ``a`` (e2),
             ``VARGAIN`` = ``b``, ``VARFLAT`` = ``c`` (pipeline.extraction.sky)
============ ==========================================================

plus the provenance keywords of :func:`pipeline.core.provenance.stamp`
(``PIPEVERS PIPESTEP CFGHASH DATE INPUTnn CALIBnn``) and FITS checksums.
"""

import re
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from astropy.io import fits

from pipeline.core.errors import InputFileError
from pipeline.core.maskbits import MASK_DTYPE, MaskBit
from pipeline.core.grid import WavelengthGrid

__all__ = ["ExtractedSpectrum", "sanitise_name", "spectrum_file_name", "write_spectrum",
           "read_spectrum", "LISTING_COLUMNS", "COPIED_KEYWORDS", "REQUIRED_KEYWORDS",
           "EXTENSIONS"]

#: keywords copied from the calibrated frame when present
COPIED_KEYWORDS = ("OBJECT", "EXPTIME", "AIRMASS", "DATE-OBS", "RA", "DEC", "GRATING", "GRTILT",
                   "SLITWID", "FILTER", "BINSPEC", "BINSPAT", "MJD-OBS", "INSTRUME")

#: keywords every product header carries (the flux calibration relies on them)
REQUIRED_KEYWORDS = ("OBJECT", "EXPTIME", "AIRMASS", "DATE-OBS", "RA", "DEC", "SETUP", "FRAMEID",
                     "OBJROLE", "OBJLABEL", "OBJPOSPX", "OBJPOSAS")

#: columns of the per-frame listing ``spectra/{frame}/extraction.ecsv``
LISTING_COLUMNS = ("frame_id", "object", "role", "label", "file", "trace_px", "trace_arcsec",
                   "fwhm_px", "trace_mode", "snr_median", "flux_total_e", "status")

#: HDU names of the two extractions: (flux, variance, mask)
EXTENSIONS = {"optimal": ("FLUX", "VAR", "MASK"), "boxcar": ("SUMFLUX", "SUMVAR", "SUMMASK")}

_UNSAFE = re.compile(r"[^A-Za-z0-9.+_-]+")


def sanitise_name(text, *, fallback="unnamed"):
    """Make a file-name stem from a header value such as OBJECT.

    Letters, digits and ``. + _ -`` are kept; every other run of characters
    (path separators, spaces, control characters...) becomes one ``_``;
    leading ``. _ -`` and trailing ``_`` are stripped, so the result can never
    be a path, a hidden file or an option-like name; at most 64 characters.

    Examples
    --------
    >>> sanitise_name("TFG 42/b")
    'TFG_42_b'
    >>> sanitise_name("../..")
    'unnamed'
    """
    cleaned = _UNSAFE.sub("_", str(text)).lstrip("._-").rstrip("_")
    cleaned = cleaned[:64].rstrip("_")
    if not cleaned or set(cleaned) <= {".", "_", "-"}:
        return fallback
    return cleaned


def spectrum_file_name(object_name, label):
    """File name of one product: ``{sanitised OBJECT}_{label}.fits``.

    Examples
    --------
    >>> spectrum_file_name("TRG 511", "target"), spectrum_file_name("TRG 511", "other1")
    ('TRG_511_target.fits', 'TRG_511_other1.fits')
    """
    label = str(label)
    if label != "target" and not (label.startswith("other") and label[5:].isdigit()):
        raise ValueError(f"`label` must be 'target' or 'other<k>', got {label!r}")
    return f"{sanitise_name(object_name)}_{label}.fits"


def _image(data, name, grid, *, dtype, bunit=None, comment=None):
    hdr = fits.Header()
    for card in grid.wcs_cards(axis=1):
        hdr.append(card)
    if bunit is not None:
        hdr["BUNIT"] = bunit
    if comment:
        hdr["COMMENT"] = comment
    return fits.ImageHDU(np.asarray(data, dtype=dtype), header=hdr, name=name)


def write_spectrum(path, grid, header, *, flux, variance, mask, boxcar_flux, boxcar_variance,
                   boxcar_mask, sky, trace_px, unit="electron"):
    """Write one 1-D product in the layout of the module docstring.

    Parameters
    ----------
    path : str or Path
    grid : WavelengthGrid
    header : astropy.io.fits.Header
        Keywords for HDU 0 (already stamped with provenance by the caller).
    flux, variance, mask : ndarray, shape (grid.n_pix,)
        Optimal extraction, electron, electron^2, uint8 bits.
    boxcar_flux, boxcar_variance, boxcar_mask : ndarray, shape (grid.n_pix,)
        Boxcar extraction.
    sky : ndarray, shape (grid.n_pix,), electron
        Sky model summed over the boxcar aperture.
    trace_px : ndarray, shape (grid.n_pix,)
        Trace centre, rows of the rectified frame.
    """
    n = grid.n_pix
    for name, arr in (("flux", flux), ("variance", variance), ("mask", mask),
                      ("boxcar_flux", boxcar_flux), ("boxcar_variance", boxcar_variance),
                      ("boxcar_mask", boxcar_mask), ("sky", sky), ("trace_px", trace_px)):
        if np.shape(arr) != (n,):
            raise ValueError(f"`{name}` must have shape ({n},) like the grid, got {np.shape(arr)}")
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    hdr0 = header.copy()
    for key in ("BSCALE", "BZERO", "BLANK", "WCSAXES"):
        hdr0.remove(key, ignore_missing=True, remove_all=True)
    for key in [k for k in hdr0 if re.match(r"^(CTYPE|CUNIT|CRPIX|CRVAL|CDELT|CD\d_|PC\d_)", k)]:
        del hdr0[key]
    hdr0["EXTNAME"] = "FLUX"
    hdr0["BUNIT"] = (unit, "electrons per spectral pixel, whole exposure")
    for card in grid.wcs_cards(axis=1):
        hdr0[card[0]] = card[1:]
    hdr0.setdefault("SPECSYS", "TOPOCENT")
    hdr0.setdefault("EXTMETH", "optimal")
    primary = fits.PrimaryHDU(np.asarray(flux, dtype=np.float32), header=hdr0)
    var = _image(variance, "VAR", grid, dtype=np.float32, bunit=f"({unit})2")
    var.header["UTYPE"] = ("VarianceUncertainty", "astropy.nddata uncertainty class")
    box_var = _image(boxcar_variance, "SUMVAR", grid, dtype=np.float32, bunit=f"({unit})2")
    box_var.header["UTYPE"] = ("VarianceUncertainty", "astropy.nddata uncertainty class")
    hdus = [
        primary, var,
        _image(mask, "MASK", grid, dtype=MASK_DTYPE, comment="bits of pipeline.core.maskbits; 0 = good"),
        _image(boxcar_flux, "SUMFLUX", grid, dtype=np.float32, bunit=unit,
               comment="boxcar sum over the aperture"),
        box_var,
        _image(boxcar_mask, "SUMMASK", grid, dtype=MASK_DTYPE),
        _image(sky, "SKY", grid, dtype=np.float32, bunit=unit,
               comment="sky model summed over the boxcar aperture"),
        _image(trace_px, "TRACE", grid, dtype=np.float32, bunit="pixel",
               comment="trace centre, rows of the rectified frame (0-based)"),
    ]
    fits.HDUList(hdus).writeto(path, overwrite=True, checksum=True)
    return path


@dataclass(frozen=True)
class ExtractedSpectrum:
    """A 1-D spectrum as read by :func:`read_spectrum` (an extraction or calibration product,
    or any specutils-style 1-D spectrum).

    Parameters
    ----------
    wave_angstrom : ndarray, shape (n,), Angstrom (air for our products)
    values : ndarray, shape (n,)
        Flux in ``unit`` (electrons per spectral pixel for extraction products).
    variance : ndarray, shape (n,), ``unit`` squared
    mask : ndarray of uint8, shape (n,)
    header : astropy.io.fits.Header
        The header of HDU 0 of our products (OBJECT, EXPTIME, AIRMASS, ... and the WCS),
        else of the flux HDU.
    path : str
    unit : str
    grid : WavelengthGrid or None
        The spectral grid of HDU 0's WCS when it is a linear or log grid (our products),
        else None. Wavelengths re-sorted to increase also leave it None.
    """

    wave_angstrom: np.ndarray
    values: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    header: object
    path: str
    unit: str = "electron"
    grid: object = None

    @property
    def flux(self):
        """The flux values (``values``), in ``unit``."""
        return self.values


def wcs_wavelengths_angstrom(header, n_pix):
    """Wavelengths (Angstrom) of pixels ``0 .. n_pix - 1`` from a header's 1-D spectral WCS.

    Returns None when the header has no 1-D WCS. Raises ``ValueError``, ``TypeError`` or
    ``astropy.units.UnitsError`` when its cards cannot be evaluated or its unit is not
    spectral.
    """
    from astropy import units as u  # imported here: astropy.wcs costs start-up time
    from astropy.wcs import WCS, FITSFixedWarning

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FITSFixedWarning)
        wcs = WCS(header)
    if wcs.naxis != 1:
        return None
    world = wcs.all_pix2world(np.arange(n_pix), 0)[0]
    cunit = u.Unit(wcs.wcs.cunit[0] or "Angstrom")
    return (world * cunit).to_value(u.AA, equivalencies=u.spectral())


#: uncertainty HDU names in specutils' order of preference, with the power giving variance
_UNCERT_HDUS = (("STD", 2), ("ERR", 2), ("UNCERT", 2), ("VAR", 1), ("IVAR", -1))


def _read_wcs1d_direct(path):
    """Read a one-spectrum-per-HDU FITS file with astropy only, the way specutils'
    ``wcs1d-fits`` reader does (flux HDU FLUX/SCI/DATA/PRIMARY, uncertainty from
    VAR/STD/ERR/UNCERT/IVAR, mask from MASK/DQ/QUALITY). Returns None when the file does not
    look like that, so that the caller falls back to specutils (slow to import: ~1 s)."""
    from astropy import units as u

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
        wave = wcs_wavelengths_angstrom(header, values.size)
        if wave is None:
            return None
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


def _read_boxcar(path):
    """The boxcar sum of one of our products (HDUs SUMFLUX/SUMVAR/SUMMASK), astropy only."""
    from astropy import units as u

    try:
        with fits.open(path, memmap=False) as hdul:
            present = [h.name for h in hdul]
            for ext in EXTENSIONS["boxcar"]:
                if ext not in present:
                    raise InputFileError(path, f"HDU {ext} missing (found {present}); expected a "
                                         "1-D product written by "
                                         "pipeline.core.spectra.write_spectrum")
            header = hdul[0].header.copy()
            flux, var, mask = (np.asarray(hdul[e].data) for e in EXTENSIONS["boxcar"])
            unit = u.Unit(hdul[EXTENSIONS["boxcar"][0]].header.get("BUNIT", "electron"))
    except OSError as exc:
        raise InputFileError(path, f"cannot be read as FITS ({exc})") from exc
    try:
        wave = WavelengthGrid.from_header(header, axis=1).centres_angstrom()
    except (KeyError, ValueError) as exc:
        raise InputFileError(path, f"HDU 0 wavelength WCS unreadable: {exc}") from exc
    return wave, flux.astype(float), var.astype(float), mask, header, unit


def read_spectrum(path, *, method="optimal", expected_unit="electron"):
    """Read a 1-D spectrum: our products (either extraction) or any specutils-style one.

    Parameters
    ----------
    path : str or Path
    method : {'optimal', 'boxcar'}
        ``'optimal'``: the flux HDU as ``specutils.Spectrum.read`` finds it (FLUX, SCI, DATA
        or PRIMARY; uncertainty VAR/STD/ERR/UNCERT/IVAR; mask MASK/DQ/QUALITY), read with
        astropy alone when the layout allows (fast start-up for a job), else through
        specutils. ``'boxcar'``: the boxcar sum of our products (SUMFLUX, SUMVAR, SUMMASK).
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
        When the file cannot be read, an HDU is missing, the flux unit is wrong or the
        uncertainty is missing.
    """
    from astropy import units as u

    if method not in EXTENSIONS:
        raise ValueError(f"`method` must be 'optimal' or 'boxcar', got {method!r}")
    path = Path(path)
    if method == "boxcar":
        wave, values, var, mask, header, unit = _read_boxcar(path)
    else:
        direct = _read_wcs1d_direct(path)
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
        mask = np.zeros(values.shape, MASK_DTYPE)
    else:
        mask = np.asarray(mask)
        mask = (np.where(mask, MaskBit.BAD_PIXEL, 0) if mask.dtype == bool else mask).astype(
            MASK_DTYPE)
    header = header.copy() if isinstance(header, fits.Header) else fits.Header()
    order = np.argsort(wave)
    grid = None
    if not np.all(order == np.arange(wave.size)):
        wave, values, var, mask = wave[order], values[order], var[order], mask[order]
    else:
        try:
            grid = WavelengthGrid.from_header(header, axis=1)
        except (KeyError, ValueError, TypeError):
            grid = None
        if grid is not None and (grid.n_pix != wave.size
                                 or not np.allclose(grid.centres_angstrom(), wave, rtol=0,
                                                    atol=1e-6 * float(np.min(np.diff(wave)))
                                                    if wave.size > 1 else 1e-6)):
            grid = None
    return ExtractedSpectrum(wave, values, var, mask, header, str(path), unit.to_string(),
                             grid)
