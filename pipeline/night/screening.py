"""Frames that are not data: recognised at inventory from a sample of their pixel rows.

A frame saturated everywhere (a lamp left on), constant (all zero, or one value:
the readout failed) or mostly NaN (a broken conversion) passes every header check
but poisons a master calibration or wastes a job. The inventory reads a few rows
of each frame (cheap: ``n_rows`` rows, not the whole array) and computes
:func:`pixel_problem` on them; such a frame is rejected with the reason, so the
workflow's graph leaves it out, and the rest of the night goes on.

Examples
--------
>>> import numpy as np
>>> pixel_problem(np.zeros((4, 8)), saturation_adu=65000.0)
'not data: every sampled pixel is 0 (readout failed?)'
>>> pixel_problem(np.arange(32.0).reshape(4, 8), saturation_adu=65000.0) is None
True
"""

import warnings

import numpy as np
from astropy.io import fits
from astropy.utils.exceptions import AstropyUserWarning

__all__ = ["pixel_problem", "read_row_sample"]


def pixel_problem(sample, *, saturation_adu, max_saturated_fraction=0.5,
                  max_nonfinite_fraction=0.5):
    """Why a pixel sample is not data, or None when it looks like data.

    Parameters
    ----------
    sample : ndarray, ADU
        Pixel values of some rows of the frame's data section (raw ADU).
    saturation_adu : float or None
        Saturation level (``instrument.saturation_adu``); None skips that test.
    max_saturated_fraction : float
        Reject when more than this fraction of the finite sampled pixels are at
        or above ``saturation_adu`` (``inventory.max_saturated_fraction``).
    max_nonfinite_fraction : float
        Reject when more than this fraction of the sampled pixels are NaN or
        infinite (``inventory.max_nonfinite_fraction``).

    Returns
    -------
    str or None
        One line starting ``'not data: '`` that says what was seen.
    """
    values = np.asarray(sample, dtype=float).ravel()
    if values.size == 0:
        return None
    finite = np.isfinite(values)
    bad_fraction = 1.0 - finite.mean()
    if bad_fraction > max_nonfinite_fraction:
        return (f"not data: {100 * bad_fraction:.0f}% of the sampled pixels are NaN or "
                f"infinite (more than inventory.max_nonfinite_fraction = "
                f"{max_nonfinite_fraction})")
    good = values[finite]
    if np.all(good == 0):
        return "not data: every sampled pixel is 0 (readout failed?)"
    if saturation_adu is not None:
        saturated = float(np.mean(good >= saturation_adu))
        if saturated > max_saturated_fraction:
            return (f"not data: {100 * saturated:.0f}% of the sampled pixels are at or above "
                    f"saturation ({saturation_adu:g} ADU, instrument.saturation_adu; more than "
                    f"inventory.max_saturated_fraction = {max_saturated_fraction})")
    if np.ptp(good) == 0:
        return f"not data: every sampled pixel has the same value {good[0]:g} (readout failed?)"
    return None


def read_row_sample(path, *, extension=0, n_rows=16, section=None):
    """Evenly spaced rows of a raw frame's pixels (scaled by BZERO/BSCALE), read lazily.

    Parameters
    ----------
    path : str or Path
        Raw FITS file (already checked complete by the header read).
    extension : int or str
        Pixel HDU.
    n_rows : int
        Rows to read (all rows when the section has fewer).
    section : pipeline.core.headers.Section or None
        Data section (1-based inclusive); None = the whole array.

    Returns
    -------
    ndarray, shape (n, nx), float64
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AstropyUserWarning)
        with fits.open(path, memmap=False, lazy_load_hdus=True) as hdul:
            hdu = hdul[extension]
            ny, nx = int(hdu.header["NAXIS2"]), int(hdu.header["NAXIS1"])
            rows, cols = (slice(0, ny), slice(0, nx)) if section is None else section.slices
            start, stop = rows.start, min(rows.stop, ny)
            picks = np.unique(np.linspace(start, stop - 1, max(1, int(n_rows))).round().astype(int))
            reader = getattr(hdu, "section", None)
            if reader is None:
                data = hdu.data
                return np.asarray(data[picks, cols], dtype=float)
            return np.stack([np.asarray(reader[int(i), cols], dtype=float) for i in picks])
