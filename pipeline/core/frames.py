"""The Frame container and the only code that reads and writes frame FITS files.

A :class:`Frame` holds a 2-D image in the canonical orientation used by every
step after CCD calibration: numpy axis 1 runs along the dispersion with
wavelength increasing with index, numpy axis 0 runs along the slit. Pixel
``(y, x)`` has its centre at integer coordinates and covers ``x - 0.5 .. x + 0.5``.

File layout (CCDData conventions where they fit, so
``astropy.nddata.CCDData.read(path, hdu_uncertainty="VAR")`` also opens it; ``VAR`` is
the variance extension of every product, 2-D frames and 1-D spectra alike, because it is
the name specutils reads as a variance, while it reads ``UNCERT`` as a standard
deviation):

========= ========================================================
HDU       content
========= ========================================================
PRIMARY   data (float32), ``BUNIT``, all header keywords
VAR       variance (float32), ``UTYPE = 'VarianceUncertainty'``
MASK      bit mask (uint8), bits documented in :mod:`pipeline.core.maskbits`
========= ========================================================

FITS checksums (``CHECKSUM``/``DATASUM``) are written in every HDU.
"""

from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
from astropy.io import fits

from pipeline.core import maskbits
from pipeline.core.errors import InputFileError

__all__ = ["Frame", "read_frame", "write_frame"]


@dataclass(frozen=True)
class Frame:
    """Pixel values, their variance and bit mask, with the header.

    Parameters
    ----------
    data : ndarray, shape (ny, nx)
        Pixel values, usually in electrons.
    variance : ndarray, shape (ny, nx)
        Variance of ``data``, in ``unit`` squared.
    mask : ndarray of uint8, shape (ny, nx)
        Bit mask; 0 is good (see :mod:`pipeline.core.maskbits`).
    header : astropy.io.fits.Header
        Metadata carried from the raw frame plus provenance.
    unit : str
        FITS unit string of ``data``.
    """

    data: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    header: fits.Header = field(default_factory=fits.Header)
    unit: str = "electron"

    def __post_init__(self):
        if self.data.ndim != 2:
            raise ValueError(f"`data` must be 2-D, got shape {self.data.shape}")
        for name in ("variance", "mask"):
            shape = getattr(self, name).shape
            if shape != self.data.shape:
                raise ValueError(
                    f"`{name}` must have the shape of `data` {self.data.shape}, got {shape}")

    @property
    def shape(self):
        return self.data.shape

    def with_changes(self, **changes):
        """Return a copy with some fields replaced (the header is copied)."""
        changes.setdefault("header", self.header.copy())
        return replace(self, **changes)


def read_frame(path, *, hdu_data=0, hdu_variance="VAR", hdu_mask="MASK"):
    """Read a frame written by :func:`write_frame`.

    Raises
    ------
    InputFileError
        When the file is missing an extension or the shapes disagree.
    """
    path = Path(path)
    try:
        with fits.open(path, memmap=False) as hdul:
            names = [h.name for h in hdul]
            for ext in (hdu_variance, hdu_mask):
                if ext not in names:
                    raise InputFileError(
                        path, f"extension {ext} missing (found {names}); expected a frame "
                        "written by pipeline.core.frames.write_frame")
            header = hdul[hdu_data].header.copy()
            data = np.asarray(hdul[hdu_data].data, dtype=np.float32)
            variance = np.asarray(hdul[hdu_variance].data, dtype=np.float32)
            mask = np.asarray(hdul[hdu_mask].data, dtype=maskbits.MASK_DTYPE)
    except OSError as exc:
        raise InputFileError(path, f"cannot be read as FITS ({exc})") from exc
    unit = header.get("BUNIT", "electron")
    try:
        return Frame(data, variance, mask, header, unit)
    except ValueError as exc:
        raise InputFileError(path, str(exc)) from exc


def write_frame(frame, path, *, hdu_variance="VAR", hdu_mask="MASK", extra_hdus=()):
    """Write a frame as multi-extension FITS with checksums.

    Parameters
    ----------
    frame : Frame
    path : str or Path
    extra_hdus : sequence of astropy.io.fits HDUs
        Appended after the mask (e.g. a table of measurements).
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    header = frame.header.copy()
    for key in ("BSCALE", "BZERO", "BLANK"):
        header.remove(key, ignore_missing=True, remove_all=True)
    header["BUNIT"] = frame.unit
    primary = fits.PrimaryHDU(np.asarray(frame.data, dtype=np.float32), header=header)
    var_header = fits.Header()
    var_header["UTYPE"] = ("VarianceUncertainty", "astropy.nddata uncertainty class")
    var_header["BUNIT"] = f"({frame.unit})2" if frame.unit else ""
    variance = fits.ImageHDU(np.asarray(frame.variance, dtype=np.float32),
                             header=var_header, name=hdu_variance)
    mask_header = fits.Header()
    for card in maskbits.header_cards():
        mask_header.append(card)
    mask = fits.ImageHDU(np.asarray(frame.mask, dtype=maskbits.MASK_DTYPE),
                         header=mask_header, name=hdu_mask)
    fits.HDUList([primary, variance, mask, *extra_hdus]).writeto(
        path, overwrite=True, checksum=True)
    return path
