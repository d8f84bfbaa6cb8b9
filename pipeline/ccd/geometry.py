"""Detector geometry: where the data lie in a raw frame and how they map onto the canonical orientation.

Everything the CCD step writes is in the canonical orientation (numpy axis 1 =
dispersion, wavelength increasing with index; numpy axis 0 = along the slit) and
records the way back to raw pixels in the header:

``ORIENT_T``
    True when the trimmed raw array was transposed (dispersion along raw numpy axis 0).
``ORIENT_X`` / ``ORIENT_Y``
    True when canonical x / y runs opposite to the (transposed) raw order.
``TRIM_X0`` / ``TRIM_Y0``
    0-based raw column / row of the first data-section pixel.

A canonical pixel ``(y, x)`` of an ``(ny, nx)`` frame maps back to raw pixels
as follows: ``a = ny - 1 - y if ORIENT_Y else y``, ``b = nx - 1 - x if ORIENT_X
else x``; then ``(row, col) = (b, a) if ORIENT_T else (a, b)`` within the trimmed
array; add ``TRIM_Y0`` to the row and ``TRIM_X0`` to the column.
"""

from dataclasses import dataclass

import numpy as np

from pipeline.core import headers as hdr
from pipeline.core.errors import InputFileError

__all__ = ["Orientation", "FrameLayout", "frame_layout", "known_defects_mask"]


@dataclass(frozen=True)
class Orientation:
    """How the trimmed raw array maps onto the canonical orientation.

    Parameters
    ----------
    transpose : bool
        Swap the raw numpy axes (dispersion runs along raw numpy axis 0 = FITS axis 2).
    flip_x : bool
        Reverse canonical x (wavelength decreases with raw pixel index).
    flip_y : bool
        Reverse canonical y (never needed by the instruments described so far).

    Examples
    --------
    >>> o = Orientation.from_instrument(dispersion_axis=2, wavelength_increases_with_pixel=False)
    >>> o.apply(np.arange(6).reshape(3, 2))
    array([[4, 2, 0],
           [5, 3, 1]])
    """

    transpose: bool
    flip_x: bool
    flip_y: bool = False

    @classmethod
    def from_instrument(cls, *, dispersion_axis, wavelength_increases_with_pixel):
        """Orientation for a FITS dispersion axis (1 or 2) and its direction."""
        if dispersion_axis not in (1, 2):
            raise ValueError(f"`dispersion_axis` must be 1 or 2 (FITS axis), got "
                             f"{dispersion_axis!r}")
        return cls(transpose=dispersion_axis == 2, flip_x=not bool(wavelength_increases_with_pixel))

    def apply(self, array):
        """Canonical view of a trimmed raw array (or a stack whose last two axes are)."""
        a = np.swapaxes(array, -1, -2) if self.transpose else array
        if self.flip_x:
            a = a[..., ::-1]
        if self.flip_y:
            a = a[..., ::-1, :]
        return a

    def invert(self, array):
        """Trimmed-raw-orientation view of a canonical array (inverse of :meth:`apply`)."""
        a = array
        if self.flip_y:
            a = a[..., ::-1, :]
        if self.flip_x:
            a = a[..., ::-1]
        return np.swapaxes(a, -1, -2) if self.transpose else a

    def canonical_shape(self, raw_shape):
        return tuple(raw_shape[::-1]) if self.transpose else tuple(raw_shape)

    def to_raw(self, y, x, *, shape, trim_y0=0, trim_x0=0):
        """Raw 0-based (row, column) of canonical pixel(s) ``(y, x)`` of a frame of ``shape``."""
        ny, nx = shape
        a = ny - 1 - np.asarray(y) if self.flip_y else np.asarray(y)
        b = nx - 1 - np.asarray(x) if self.flip_x else np.asarray(x)
        row, col = (b, a) if self.transpose else (a, b)
        return row + trim_y0, col + trim_x0

    def header_cards(self, *, trim_y0, trim_x0):
        return [("ORIENT_T", self.transpose, "raw array transposed to canonical"),
                ("ORIENT_X", self.flip_x, "canonical x reversed w.r.t. raw"),
                ("ORIENT_Y", self.flip_y, "canonical y reversed w.r.t. raw"),
                ("TRIM_X0", int(trim_x0), "0-based raw column of first data pixel"),
                ("TRIM_Y0", int(trim_y0), "0-based raw row of first data pixel")]



@dataclass(frozen=True)
class FrameLayout:
    """Where the data lie in a raw frame, its binning and its canonical orientation.

    Attributes
    ----------
    data : pipeline.core.headers.Section
        Data section (1-based, raw FITS axes).
    overscan : pipeline.core.headers.Section or None
        Serial overscan section; None subtracts no overscan.
    orientation : Orientation
    binning : (int, int)
        Binning along FITS axes 1 and 2.
    dispersion_axis : int
        FITS axis (1 or 2) along which wavelength runs.
    """

    data: hdr.Section
    overscan: object
    orientation: Orientation
    binning: tuple
    dispersion_axis: int

    @property
    def trim_y0(self):
        return self.data.y1 - 1

    @property
    def trim_x0(self):
        return self.data.x1 - 1

    def binning_cards(self):
        bx, by = self.binning
        spec, spat = (bx, by) if self.dispersion_axis == 1 else (by, bx)
        return [("BINSPEC", int(spec), "binning along the dispersion (canonical x)"),
                ("BINSPAT", int(spat), "binning along the slit (canonical y)")]


def frame_layout(header, instrument, *, path):
    """The :class:`FrameLayout` of a raw frame from its header and the instrument config.

    Raises :class:`~pipeline.core.errors.InputFileError` naming ``path`` when a section
    or the binning keyword cannot be read or a section lies outside the pixel array.
    """
    sections = instrument.get("sections", {}) or {}
    data = hdr.section_from_header(header, sections.get("data"), path=path, name="data")
    ov_spec = sections.get("overscan") or {}
    overscan = None
    if ov_spec.get("keyword") or ov_spec.get("value"):
        overscan = hdr.section_from_header(header, ov_spec, path=path, name="overscan")
    axis = int(instrument.get("dispersion_axis", 1))
    orientation = Orientation.from_instrument(
        dispersion_axis=axis,
        wavelength_increases_with_pixel=instrument.get("wavelength_increases_with_pixel", True))
    binning = (1, 1)
    keyword = instrument.get("binning_keyword")
    if keyword and header.get(keyword) is not None:
        try:
            binning = hdr.parse_binning(header[keyword], name=keyword)
        except ValueError as exc:
            raise InputFileError(path, str(exc)) from None
    shape = hdr.raw_shape(header)
    for name, section in (("data", data), ("overscan", overscan)):
        if section is not None and not section.fits_in(shape):
            raise InputFileError(path, f"{name} section {section} lies outside the "
                                 f"{shape[1]} x {shape[0]} pixel array (NAXIS1 x NAXIS2)")
    return FrameLayout(data, overscan, orientation, binning, axis)


def known_defects_mask(sections, layout):
    """Canonical bool mask of known detector defects.

    Parameters
    ----------
    sections : list of str
        FITS-style sections ``[x1:x2,y1:y2]`` in UNBINNED raw detector pixels
        (1-based inclusive, FITS axis 1 first), converted with the frame's binning.
    layout : FrameLayout
        Data section, binning and orientation of the frame.

    Returns
    -------
    ndarray of bool, shape (ny, nx) canonical
    """
    rows, cols = layout.data.slices
    raw = np.zeros((rows.stop - rows.start, cols.stop - cols.start), bool)
    bx, by = layout.binning
    for text in sections or []:
        sec = hdr.parse_section(text, name="flat.bad_pixel_sections")
        x1, x2 = (sec.x1 - 1) // bx, (sec.x2 - 1) // bx      # 0-based binned raw columns
        y1, y2 = (sec.y1 - 1) // by, (sec.y2 - 1) // by
        c0, c1 = max(x1 - cols.start, 0), min(x2 - cols.start + 1, raw.shape[1])
        r0, r1 = max(y1 - rows.start, 0), min(y2 - rows.start + 1, raw.shape[0])
        if c0 < c1 and r0 < r1:
            raw[r0:r1, c0:c1] = True
    return np.ascontiguousarray(layout.orientation.apply(raw))

