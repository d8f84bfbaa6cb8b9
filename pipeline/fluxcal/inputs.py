"""Reading the extraction step's 1-D spectra (any specutils-style 1-D spectrum).

:func:`read_spectrum` (the one reader of 1-D spectra, :mod:`pipeline.core.spectra`)
reads one spectrum with astropy alone when the file has the one-spectrum-per-HDU layout
(fast start-up for a job), else through ``specutils.Spectrum.read``;
:func:`read_spectra_directory` lists the spectra of one frame from the extraction's
listing.
"""

import warnings
from pathlib import Path

import numpy as np

from pipeline.core.errors import FluxCalibrationWarning, InputFileError
from pipeline.core.spectra import ExtractedSpectrum, read_spectrum

__all__ = ["ExtractedSpectrum", "read_spectrum", "read_spectra_directory", "read_trace_rows"]


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


def read_trace_rows(path):
    """The star's trace (rows of the rectified frame, per column) from a 1-D product's
    ``TRACE`` HDU, or None when the file has none."""
    from astropy.io import fits

    try:
        with fits.open(path, memmap=False) as hdul:
            if "TRACE" not in [h.name for h in hdul] or hdul["TRACE"].data is None:
                return None
            return np.asarray(hdul["TRACE"].data, dtype=float)
    except OSError as exc:
        raise InputFileError(path, f"cannot be read as FITS ({exc})") from exc
