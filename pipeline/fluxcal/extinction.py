"""Atmospheric extinction: the site's mean curve, its interpolation and the airmass.

The light of a source at airmass ``X`` is dimmed by ``10**(-0.4 * k(lambda) * X)``
where ``k`` is the extinction in magnitudes per airmass. The pipeline corrects
standard-star and science spectra to airmass zero with the site's mean curve,
read from a table (ECSV, or CSV with ``#`` comment lines) with the columns
``wavelength_angstrom`` and ``extinction_mag_per_airmass``.

Pure functions work on bare floats (Angstrom, magnitudes); :func:`read_extinction_table`
is the only file reader.
"""

import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from pipeline.core.checks import as_1d_float
from pipeline.core.errors import FluxCalibrationWarning, InputFileError
from pipeline.core.headers import header_float
from pipeline.core.observing import choose_airmass

__all__ = [
    "ExtinctionCurve", "read_extinction_table", "extinction_at", "transmission",
    "as_airmass", "spectrum_airmass",
]


@dataclass(frozen=True)
class ExtinctionCurve:
    """A tabulated extinction curve.

    Parameters
    ----------
    wave_angstrom : ndarray, shape (n,), Angstrom
        Strictly increasing wavelengths (air).
    k_mag_per_airmass : ndarray, shape (n,), mag / airmass
        Extinction coefficient at each wavelength.
    source : str
        Where the table came from (file name and the table's own source note).
    info : dict
        Anything else read with the table (e.g. its meta data).
    """

    wave_angstrom: np.ndarray
    k_mag_per_airmass: np.ndarray
    source: str = ""
    info: dict = field(default_factory=dict)

    def __post_init__(self):
        wave = as_1d_float(self.wave_angstrom, "wave_angstrom")
        k = as_1d_float(self.k_mag_per_airmass, "k_mag_per_airmass")
        if wave.shape != k.shape:
            raise ValueError(f"`k_mag_per_airmass` must have the shape of `wave_angstrom` "
                             f"{wave.shape}, got {k.shape}")
        if wave.size < 2:
            raise ValueError(f"an extinction curve needs at least 2 points, got {wave.size}")
        if not np.all(np.isfinite(wave)) or not np.all(np.isfinite(k)):
            raise ValueError("`wave_angstrom` and `k_mag_per_airmass` must be finite")
        if np.any(np.diff(wave) <= 0):
            raise ValueError("`wave_angstrom` must be strictly increasing")
        object.__setattr__(self, "wave_angstrom", wave)
        object.__setattr__(self, "k_mag_per_airmass", k)

    def __call__(self, wave_angstrom, *, outside="hold"):
        return extinction_at(self, wave_angstrom, outside=outside)


def as_airmass(value, name="airmass"):
    """``value`` as a finite airmass >= 1 (a tolerance of 1e-6 below 1 is allowed).

    >>> as_airmass(1.25)
    1.25
    """
    try:
        airmass = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"`{name}` must be a finite number >= 1, got {value!r}") from None
    if not math.isfinite(airmass) or airmass < 1.0 - 1e-6:
        raise ValueError(f"`{name}` must be a finite number >= 1, got {value!r}")
    return airmass


def extinction_at(curve, wave_angstrom, *, outside="hold"):
    """Extinction coefficient at the given wavelengths.

    Parameters
    ----------
    curve : ExtinctionCurve
    wave_angstrom : array_like, Angstrom
        Wavelengths (air) at which to evaluate, any shape.
    outside : {'hold', 'nan', 'raise'}
        What to do outside the table: hold the end value (with an
        :class:`~pipeline.core.errors.FluxCalibrationWarning` naming the range), return NaN, or raise
        ``ValueError``.

    Returns
    -------
    ndarray, same shape as ``wave_angstrom``, mag / airmass

    Notes
    -----
    Linear interpolation between the tabulated points. Mean site curves are
    smooth and tabulated every 100-200 A, so the interpolation error is far
    below the night-to-night variation of the extinction itself.

    Examples
    --------
    >>> c = ExtinctionCurve([4000.0, 5000.0], [0.30, 0.13])
    >>> float(extinction_at(c, 4500.0))
    0.215
    """
    if outside not in ("hold", "nan", "raise"):
        raise ValueError(f"`outside` must be 'hold', 'nan' or 'raise', got {outside!r}")
    wave = np.asarray(wave_angstrom, dtype=float)
    k = np.interp(wave, curve.wave_angstrom, curve.k_mag_per_airmass)
    lo, hi = curve.wave_angstrom[0], curve.wave_angstrom[-1]
    out = (wave < lo) | (wave > hi)
    if np.any(out):
        message = (f"{int(np.count_nonzero(out))} wavelength(s) between "
                   f"{np.nanmin(wave[out]):.1f} and {np.nanmax(wave[out]):.1f} A lie outside the "
                   f"extinction table ({lo:.0f}-{hi:.0f} A, {curve.source or 'no source'})")
        if outside == "raise":
            raise ValueError(message)
        if outside == "nan":
            k = np.where(out, np.nan, k)
        else:
            warnings.warn(message + "; the end values are held there", FluxCalibrationWarning,
                          stacklevel=2)
    return k


def transmission(k_mag_per_airmass, airmass):
    """Fraction of the light that passes the atmosphere: ``10**(-0.4 k X)``.

    Parameters
    ----------
    k_mag_per_airmass : array_like, mag / airmass
    airmass : float
        Airmass X >= 1 (0 gives 1, i.e. above the atmosphere).

    Examples
    --------
    >>> round(float(transmission(0.25, 2.0)), 4)
    0.631
    """
    airmass = float(airmass)
    if not math.isfinite(airmass) or airmass < 0:
        raise ValueError(f"`airmass` must be a finite number >= 0, got {airmass!r}")
    return 10.0 ** (-0.4 * np.asarray(k_mag_per_airmass, dtype=float) * airmass)


def read_extinction_table(path):
    """Read a site extinction table.

    Parameters
    ----------
    path : str or Path
        ECSV (``.ecsv``) or CSV (``.csv``; lines starting with ``#`` are
        comments) with the columns ``wavelength_angstrom`` and
        ``extinction_mag_per_airmass``; other columns are ignored.

    Returns
    -------
    ExtinctionCurve
        Sorted by wavelength; ``source`` names the file (and the table's
        ``source`` meta item or column values when present).

    Raises
    ------
    InputFileError
        When the file cannot be read, a column is missing or the values are
        not finite, strictly increasing wavelengths.
    """
    from astropy.table import Table

    path = Path(path)
    fmt = "ascii.csv" if path.suffix.lower() == ".csv" else "ascii.ecsv"
    try:
        if fmt == "ascii.csv":
            table = Table.read(path, format=fmt, comment="#")
        else:
            table = Table.read(path, format=fmt)
    except (OSError, ValueError, TypeError) as exc:
        raise InputFileError(path, f"cannot be read as {fmt} ({exc}); expected a table with "
                             "columns wavelength_angstrom and extinction_mag_per_airmass") from exc
    for col in ("wavelength_angstrom", "extinction_mag_per_airmass"):
        if col not in table.colnames:
            raise InputFileError(path, f"column {col} missing (found {table.colnames}); expected "
                                 "wavelength_angstrom [Angstrom] and extinction_mag_per_airmass "
                                 "[mag/airmass]")
    wave = np.asarray(table["wavelength_angstrom"], dtype=float)
    k = np.asarray(table["extinction_mag_per_airmass"], dtype=float)
    order = np.argsort(wave)
    sources = []
    if "source" in table.meta:
        sources.append(str(table.meta["source"]))
    if "source" in table.colnames:
        sources.extend(sorted({str(s) for s in table["source"]}))
    source = path.name + (f" ({'; '.join(sources)})" if sources else "")
    try:
        return ExtinctionCurve(wave[order], k[order], source=source,
                               info={"path": str(path), "meta": dict(table.meta)})
    except ValueError as exc:
        raise InputFileError(path, f"{exc}; expected finite values at strictly increasing "
                             "wavelengths") from exc


def spectrum_airmass(header, *, site=None, path="<header>", policy="computed",
                     warn_difference=0.01):
    """The airmass of a spectrum and how it was obtained (:mod:`pipeline.core.observing`).

    Parameters
    ----------
    header : astropy.io.fits.Header
        Standard keywords AIRMASS, RA, DEC (degrees or sexagesimal), DATE-OBS (and
        TIME-OBS or UT when DATE-OBS holds only the date), EXPTIME.
    site : dict or None
        ``latitude_deg``, ``longitude_deg``, ``height_m`` (``instrument.site``).
    path : str
        The file the header came from (for messages).
    policy : {'computed', 'header'}
        ``observing.airmass``: the exposure-mean airmass computed from coordinates,
        time and site whenever possible, or the header value whenever present.
    warn_difference : float
        ``observing.airmass_warn_difference``.

    Returns
    -------
    airmass : float
    choice : pipeline.core.observing.AirmassChoice
        ``choice.cards()`` records the value used and its source (AIRMUSED, AIRMSRC,
        AIRMCOMP, AIRMHDR); each of its notes is warned naming the file.

    Raises
    ------
    InputFileError
        When neither a usable header AIRMASS nor a computed airmass exists.
    """
    try:
        header_value = header_float(header, "AIRMASS", path=path, default=math.nan)
    except InputFileError:
        header_value = math.nan
    if math.isfinite(header_value) and header_value < 1.0 - 1e-6:
        header_value = math.nan
    choice = choose_airmass(
        header_airmass=header_value, ra=header.get("RA"), dec=header.get("DEC"),
        date_obs=header.get("DATE-OBS"), exptime_s=header.get("EXPTIME"),
        time_obs=header.get("TIME-OBS", header.get("UT")), site=site or None, policy=policy,
        warn_difference=warn_difference)
    if choice.source == "none":
        raise InputFileError(path, f"header keyword AIRMASS is {header.get('AIRMASS')!r} and no "
                             f"airmass could be computed ({'; '.join(choice.notes)}); expected "
                             "AIRMASS >= 1, or RA, DEC, DATE-OBS, EXPTIME and the site")
    for note in choice.notes:
        warnings.warn(f"{path}: {note}", FluxCalibrationWarning, stacklevel=2)
    return choice.value, choice
