"""Night-sky emission lines used to measure flexure.

The shipped table ``pipeline/data/sky_lines_air.ecsv`` is a row-by-row copy
of the project's reference table ``sky_lines_air.csv`` (air wavelengths in
Angstrom, with the source key of every row; the keys are explained in that
folder's README). Rows whose source is ``memory`` were not verified against
any source: they are skipped unless asked for.
"""

from pathlib import Path

import numpy as np
from astropy.table import Table

from pipeline.core.errors import InputFileError

__all__ = ["DEFAULT_SKY_LINES", "load_sky_lines", "group_blends"]

#: the shipped list
DEFAULT_SKY_LINES = Path(__file__).resolve().parents[1] / "data" / "sky_lines_air.ecsv"

_REQUIRED = ("species", "wavelength_air_angstrom", "source")


def load_sky_lines(path=None, *, verified_only=True):
    """Read a sky-line table (ECSV or CSV with the columns of the shipped list).

    Parameters
    ----------
    path : str or Path, optional
        Table to read; default :data:`DEFAULT_SKY_LINES`.
    verified_only : bool
        Drop rows whose ``source`` is ``memory``.

    Returns
    -------
    astropy.table.Table
        Columns ``species``, ``wavelength_air_angstrom``, ``source`` (and any
        others of the file), sorted by wavelength.

    Raises
    ------
    InputFileError
        When the file cannot be read or lacks a required column.
    """
    path = Path(DEFAULT_SKY_LINES if path is None else path)
    try:
        fmt = "ascii.ecsv" if path.suffix == ".ecsv" else "ascii.csv"
        table = Table.read(path, format=fmt, comment="#")
    except (OSError, ValueError) as exc:
        raise InputFileError(path, f"cannot be read as a sky-line table ({exc})") from exc
    missing = [c for c in _REQUIRED if c not in table.colnames]
    if missing:
        raise InputFileError(path, f"columns {missing} missing; expected {list(_REQUIRED)}")
    if verified_only:
        table = table[np.array([str(s).strip().lower() != "memory" for s in table["source"]],
                               dtype=bool)]
    table.sort("wavelength_air_angstrom")
    return table


def group_blends(wave_angstrom, *, min_separation_angstrom):
    """Group lines closer than ``min_separation_angstrom`` into blends.

    Parameters
    ----------
    wave_angstrom : array_like, shape (n,)
        Sorted line wavelengths.
    min_separation_angstrom : float
        Lines closer than this (e.g. 2.5 line FWHM) are fitted together.

    Returns
    -------
    list of ndarray of int
        Indices of the lines of each group.

    Examples
    --------
    >>> [g.tolist() for g in group_blends([5577.3, 5889.95, 5895.92], min_separation_angstrom=8)]
    [[0], [1, 2]]
    """
    wave = np.asarray(wave_angstrom, dtype=float)
    if wave.size == 0:
        return []
    groups = [[0]]
    for i in range(1, wave.size):
        if wave[i] - wave[groups[-1][-1]] < min_separation_angstrom:
            groups[-1].append(i)
        else:
            groups.append([i])
    return [np.array(g, dtype=int) for g in groups]
