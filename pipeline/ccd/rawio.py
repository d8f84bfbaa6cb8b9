"""Reading raw frames and master calibrations: whole frames, or overscan-corrected rows on demand.

Raw files are opened read-only and never modified.
"""

import numpy as np

from pipeline.core import headers as hdr
from pipeline.core.errors import InputFileError
from pipeline.ccd.geometry import frame_layout
from pipeline.ccd.overscan import fit_overscan, overscan_level_for_rows

__all__ = ["read_raw", "RawRows", "read_master"]


def _open_pixels(path, extension):
    from astropy.io import fits
    hdul = fits.open(path, memmap=False, mode="readonly")
    for index, h in enumerate(hdul):
        if (isinstance(extension, int) and index == extension) or \
                (isinstance(extension, str) and h.name.upper() == extension.upper()) or \
                (isinstance(extension, str) and extension.isdigit() and index == int(extension)):
            return hdul, h
    hdul.close()
    raise InputFileError(path, f"HDU {extension!r} missing; expected the raw pixels there")


def read_raw(path, instrument):
    """Header (primary + pixel extension), raw pixels as float32 and the layout."""
    ext = instrument.get("pixel_extension", 0)
    header = hdr.read_raw_header(path, extension=ext)
    hdul, hdu = _open_pixels(path, ext)
    try:
        raw = np.asarray(hdu.data, dtype=np.float32)
    except Exception as exc:
        raise InputFileError(path, f"pixels of HDU {ext!r} cannot be read ({exc})") from None
    finally:
        hdul.close()
    return header, raw, frame_layout(header, instrument, path=path)


class RawRows:
    """Overscan-corrected, trimmed rows of a raw frame read on demand (raw orientation).

    ``reader[r0:r1]`` reads only raw rows ``r0..r1`` of the data section from
    the file; the overscan level is fitted once, reading the file in row
    blocks. Optionally subtracts a bias (raw orientation) and marks values at
    or above ``saturation_adu`` as NaN.
    """

    def __init__(self, path, instrument, overscan_options, *, block_rows=256,
                 bias_raw=None, saturation_adu=None):
        self.path = str(path)
        ext = instrument.get("pixel_extension", 0)
        self.header = hdr.read_raw_header(path, extension=ext)
        self.layout = frame_layout(self.header, instrument, path=path)
        self._hdul, self._hdu = _open_pixels(path, ext)
        self.bias_raw = bias_raw
        self.saturation_adu = saturation_adu
        rows, cols = self.layout.data.slices
        self._rows, self._cols = rows, cols
        self.shape = (rows.stop - rows.start, cols.stop - cols.start)
        self.overscan_fit = None
        self.n_saturated = 0
        ov = self.layout.overscan
        if ov is not None:
            ors, ocs = ov.slices
            pieces = []
            for r0 in range(ors.start, ors.stop, block_rows):
                r1 = min(r0 + block_rows, ors.stop)
                # whole rows: reading a column slice goes row by row and is much slower
                pieces.append(np.asarray(self._hdu.section[r0:r1, :], dtype=np.float32)[:, ocs])
            try:
                self.overscan_fit = fit_overscan(np.concatenate(pieces), first_row=ors.start,
                                                 **overscan_options)
                self._level = overscan_level_for_rows(self.overscan_fit, rows).astype(np.float32)
            except ValueError as exc:
                self.close()
                raise InputFileError(path, f"overscan {ov}: {exc}") from None
        else:
            self._level = np.zeros(self.shape[0], np.float32)

    def __getitem__(self, item):
        if not isinstance(item, slice) or item.step not in (None, 1):
            raise TypeError("rows are read by a contiguous slice")
        r0, r1, _ = item.indices(self.shape[0])
        raw = np.asarray(self._hdu.section[self._rows.start + r0:self._rows.start + r1, :],
                         dtype=np.float32)[:, self._cols]
        out = raw - self._level[r0:r1, None]
        if self.bias_raw is not None:
            out -= self.bias_raw[r0:r1]
        if self.saturation_adu is not None:
            sat = raw >= self.saturation_adu
            if sat.any():
                out[sat] = np.nan
        return out

    def close(self):
        self._hdul.close()


def read_master(path, *, kind):
    """A master calibration frame; any read problem is an InputFileError naming the file."""
    from pipeline.core.frames import read_frame
    try:
        return read_frame(path)
    except InputFileError:
        raise
    except Exception as exc:
        raise InputFileError(path, f"cannot read the master {kind} ({exc})") from None

