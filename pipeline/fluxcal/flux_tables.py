"""Standard-star flux tables as observers get them: columns, units, air or vacuum.

A table (ECSV, CSV with ``#`` comments, or a FITS binary table) needs

* one **wavelength** column: a name starting with ``wave``/``lambda`` (or a column whose
  unit is a length), in Angstrom, nm or micron - the unit from the column's own unit
  (ECSV metadata) or from the last word of its name (``wavelength_nm``,
  ``wavelength_air_angstrom``);
* **air or vacuum declared**: a word of the column name (``air``, ``vac``/``vacuum``), or
  the table meta item ``wavelength_medium`` (``air`` or ``vacuum``; also ``medium``, any
  case, e.g. the FITS keyword ``MEDIUM``), or
  the column's own meta ``medium``. The pipeline's own name ``wavelength_angstrom`` means
  air (the convention of every pipeline product). Vacuum tables are converted to
  standard air (Ciddor 1996, :func:`pipeline.core.airvac.vacuum_to_air`);
* one **flux** column (a name starting with ``flux``, ``f_lambda``, ``flam``, ``f_nu``,
  ``fnu``, ``mag`` or ``ab``; or any column whose unit is a flux density or AB magnitude):
  F_lambda (any unit convertible to erg/s/cm2/A), F_nu (erg/s/cm2/Hz, Jy, mJy, ...) or
  AB magnitudes, converted with ``astropy.units.spectral_density``; the unit from the
  column (ECSV metadata) or from the words of its name after the first
  (``flux_erg_s_cm2_angstrom`` = erg / (s cm2 Angstrom), ``flux_mjy`` = mJy,
  ``mag_ab`` = AB magnitudes);
* optionally a **bin width** column (``bin_width_angstrom``, ``width_nm``, ...): each
  flux is then the mean over its bin.

Columns of uncertainties (names with ``err``, ``sigma``, ``unc``) are ignored. A table
that does not fit gets one message listing the columns found (with their units) and
what is accepted. Flux densities per unit wavelength are not rescaled between vacuum
and air wavelength: the factor d(lambda_vac)/d(lambda_air) differs from 1 by < 3e-4 in
the optical, far below the accuracy of any flux table.
"""

import re
from pathlib import Path

import numpy as np

from pipeline.core.airvac import vacuum_to_air
from pipeline.core.errors import InputFileError
from pipeline.fluxcal.standards import FluxTable

__all__ = ["read_flux_table", "interpret_flux_table", "ACCEPTED"]

#: what a flux table may hold (quoted in every error message)
ACCEPTED = (
    "one wavelength column (name starting 'wave' or 'lambda', or a length unit) in Angstrom, "
    "nm or micron (column unit or last word of the name, e.g. wavelength_air_nm), declared "
    "air or vacuum (a word 'air'/'vac'/'vacuum' in its name, or table meta "
    "wavelength_medium: air|vacuum; 'wavelength_angstrom' alone means air); one flux column "
    "in F_lambda (e.g. flux_erg_s_cm2_angstrom, W m-2 nm-1), F_nu (erg s-1 cm-2 Hz-1, Jy, "
    "mJy) or AB magnitudes (unit mag(AB) or name mag_ab), unit from the column or its name; "
    "optionally a bin width column (bin_width_angstrom, width_nm, ...)")

_LENGTH_WORDS = {"angstrom": "Angstrom", "angstroms": "Angstrom", "aa": "Angstrom",
                 "a": "Angstrom", "ang": "Angstrom", "nm": "nm", "um": "micron",
                 "micron": "micron", "microns": "micron"}
_UNIT_WORDS = {**_LENGTH_WORDS, "erg": "erg", "ergs": "erg", "s": "s", "sec": "s",
               "cm2": "cm2", "m2": "m2", "w": "W", "hz": "Hz", "jy": "Jy", "mjy": "mJy",
               "ujy": "uJy", "njy": "nJy", "photon": "photon", "photons": "photon"}
_AIR_WORDS, _VACUUM_WORDS = {"air"}, {"vac", "vacuum"}
_MEDIUM_KEYS = ("wavelength_medium", "medium")  # meta keys, any case (FITS: MEDIUM)
_WAVE_PREFIXES = ("wave", "lambda", "wl")
_FLUX_FIRST_WORDS = {"flux", "flam", "flambda", "fnu", "mag", "abmag", "ab", "fl"}
_FLUX_PREFIXES = ("f_lambda", "f_nu")
_WIDTH_WORDS = {"width", "bandwidth", "bin", "binwidth", "dlambda", "delta"}
_ERROR_WORDS = {"err", "error", "errors", "sigma", "unc", "uncertainty", "std", "stddev"}
_AB_WORDS = {"ab", "abmag"}


def _words(name):
    return [w for w in re.split(r"[_\s\-\[\]()/]+", name.lower()) if w]


def _describe(table):
    return ", ".join(f"{name} [{table[name].unit}]" if table[name].unit is not None else name
                     for name in table.colnames)


def _unit_from_words(words):
    """Unit spelled by name words: the first word over the product of the others."""
    from astropy import units as u

    known = [_UNIT_WORDS.get(w) for w in words]
    if not words or any(k is None for k in known):
        return None
    unit = u.Unit(known[0])
    for k in known[1:]:
        unit = unit / u.Unit(k)
    return unit


def _is_length(unit):
    from astropy import units as u

    return unit is not None and not isinstance(unit, u.FunctionUnitBase) and \
        unit.physical_type == "length"


def _is_flux_unit(unit):
    from astropy import units as u

    if unit is None:
        return False
    if isinstance(unit, u.FunctionUnitBase):
        return unit.physical_type == "spectral flux density"
    return unit.is_equivalent(u.erg / u.s / u.cm ** 2 / u.AA,
                              u.spectral_density(5000.0 * u.AA))


def _role(name, unit):
    words = _words(name)
    if set(words) & _ERROR_WORDS:
        return None
    if set(words) & _WIDTH_WORDS:
        return "width"
    if _is_length(unit) or name.lower().startswith(_WAVE_PREFIXES):
        return "wave"
    if _is_flux_unit(unit) or (words and words[0] in _FLUX_FIRST_WORDS) or \
            name.lower().startswith(_FLUX_PREFIXES):
        return "flux"
    return None


def _medium(table, column_name):
    """'air', 'vacuum' or None, with where it was declared."""
    words = set(_words(column_name))
    found = []
    if words & _AIR_WORDS:
        found.append(("air", f"column name {column_name}"))
    if words & _VACUUM_WORDS:
        found.append(("vacuum", f"column name {column_name}"))
    for where, meta in ((f"meta of column {column_name}", table[column_name].meta),
                        ("table meta", table.meta)):
        lower = {str(k).lower(): v for k, v in meta.items()} if hasattr(meta, "items") else {}
        for key in _MEDIUM_KEYS:
            value = lower.get(key)
            if value is None:
                continue
            text = str(value).strip().lower()
            if text in _AIR_WORDS:
                found.append(("air", f"{where} {key}"))
            elif text in _VACUUM_WORDS:
                found.append(("vacuum", f"{where} {key}"))
            else:
                found.append((f"unknown {value!r}", f"{where} {key}"))
    return found


def _length_column_angstrom(table, name, path, what):
    from astropy import units as u

    column = table[name]
    unit = column.unit
    if unit is None:
        words = _words(name)
        unit = u.Unit(_LENGTH_WORDS[words[-1]]) if words and words[-1] in _LENGTH_WORDS else None
    if unit is None or not _is_length(unit):
        raise InputFileError(path, f"{what} column {name} has no length unit "
                             f"({column.unit or 'none in the file, none in its name'}); found "
                             f"columns {_describe(table)}; accepted: {ACCEPTED}")
    return (np.asarray(column, dtype=float) * unit).to_value(u.AA)


def _flux_flambda(table, name, wave_angstrom, path):
    """The flux column as F_lambda in erg/s/cm2/A, and a description of what it was."""
    from astropy import units as u

    column = table[name]
    unit = column.unit
    words = _words(name)
    if unit is not None and not isinstance(unit, u.FunctionUnitBase) and unit == u.mag and \
            set(words) & _AB_WORDS:
        unit = u.ABmag
    if unit is None:
        unit = u.ABmag if set(words) & _AB_WORDS else _unit_from_words(words[1:])
    if unit is None or not _is_flux_unit(unit):
        raise InputFileError(path, f"flux column {name} has unit "
                             f"{column.unit or 'none (and none readable from its name)'}, not "
                             f"a flux density or AB magnitude; found columns {_describe(table)}; "
                             f"accepted: {ACCEPTED}")
    target = u.erg / u.s / u.cm ** 2 / u.AA
    values = np.asarray(column, dtype=float) * unit
    flux = values.to_value(target, equivalencies=u.spectral_density(wave_angstrom * u.AA))
    return flux, str(unit)


def interpret_flux_table(table, *, path="<table>"):
    """A standard's :class:`~pipeline.fluxcal.standards.FluxTable` from an astropy Table.

    Parameters
    ----------
    table : astropy.table.Table
        Columns and meta as described in the module docstring.
    path : str or Path
        The file (for messages and the table's ``source``).

    Returns
    -------
    FluxTable
        Air wavelengths in Angstrom, F_lambda in erg/s/cm2/A, sorted; ``info``
        records the columns used, their units and the medium declared.

    Raises
    ------
    InputFileError
        Naming the file, what was found (columns and units) and what is accepted.

    Examples
    --------
    >>> from astropy.table import Table
    >>> t = Table({"wavelength_vacuum_nm": [400.0, 500.0, 600.0], "mag_ab": [10.0, 10.0, 10.0]})
    >>> ft = interpret_flux_table(t)
    >>> ft.info["medium"], [round(float(w), 2) for w in ft.wave_angstrom]
    ('vacuum', [3998.87, 4998.61, 5998.34])
    """
    roles = {name: _role(name, table[name].unit) for name in table.colnames}
    by_role = {r: [n for n, rr in roles.items() if rr == r] for r in ("wave", "flux", "width")}
    for role, what in (("wave", "wavelength"), ("flux", "flux")):
        if len(by_role[role]) != 1:
            problem = "no" if not by_role[role] else f"{len(by_role[role])} ({by_role[role]})"
            raise InputFileError(path, f"{problem} {what} column(s) recognised; found columns "
                                 f"{_describe(table)}; accepted: {ACCEPTED}")
    if len(by_role["width"]) > 1:
        raise InputFileError(path, f"{len(by_role['width'])} bin width columns "
                             f"({by_role['width']}); found columns {_describe(table)}; "
                             f"accepted: {ACCEPTED}")
    wave_col, flux_col = by_role["wave"][0], by_role["flux"][0]
    width_col = by_role["width"][0] if by_role["width"] else None
    declared = _medium(table, wave_col)
    media = {m for m, _ in declared}
    if any(m.startswith("unknown") for m in media) or len(media) > 1:
        raise InputFileError(path, "air or vacuum declared inconsistently: " + "; ".join(
            f"{m} ({where})" for m, where in declared) + "; expected one of air, vacuum")
    if media:
        medium, declared_in = declared[0]
    elif wave_col == "wavelength_angstrom":
        medium, declared_in = "air", "the pipeline's column name wavelength_angstrom (air)"
    else:
        raise InputFileError(path, f"wavelength column {wave_col}: air or vacuum not declared; "
                             "add the word air or vacuum to its name (e.g. "
                             "wavelength_vacuum_angstrom) or 'wavelength_medium: vacuum' (or "
                             f"air) to the table meta; found columns {_describe(table)}; "
                             f"accepted: {ACCEPTED}")
    wave = _length_column_angstrom(table, wave_col, path, "wavelength")
    width = (None if width_col is None else
             _length_column_angstrom(table, width_col, path, "bin width"))
    flux, flux_unit = _flux_flambda(table, flux_col, wave, path)
    if medium == "vacuum":
        wave, width = _vacuum_to_air(wave, width)
    order = np.argsort(wave)
    name = str(table.meta.get("name", table.meta.get("object", Path(str(path)).stem)))
    source = Path(str(path)).name
    if "source" in table.meta:
        source += f" ({table.meta['source']})"
    info = {"wavelength_column": wave_col, "flux_column": flux_col, "flux_unit": flux_unit,
            "width_column": width_col, "medium": medium, "medium_declared_in": declared_in}
    try:
        return FluxTable(wave[order], flux[order], None if width is None else width[order],
                         name=name, source=source, info=info)
    except ValueError as exc:
        raise InputFileError(path, f"{exc} (columns {wave_col}, {flux_col}"
                             + (f", {width_col}" if width_col else "") + ")") from exc


def _vacuum_to_air(wave_angstrom, width_angstrom):
    """Vacuum to standard-air wavelengths (Ciddor 1996, :mod:`pipeline.core.airvac`); bin
    edges converted, widths recomputed."""
    if width_angstrom is None:
        return vacuum_to_air(wave_angstrom), None
    lo = vacuum_to_air(wave_angstrom - width_angstrom / 2)
    hi = vacuum_to_air(wave_angstrom + width_angstrom / 2)
    return 0.5 * (lo + hi), hi - lo


def read_flux_table(path):
    """Read a standard star's flux table (ECSV, CSV with ``#`` comments, or FITS table).

    See the module docstring for the columns, units and declarations accepted.

    Raises
    ------
    InputFileError
        When the file cannot be read or its columns do not fit (the message lists the
        columns found and what is accepted).
    """
    from astropy.table import Table

    path = Path(path)
    suffix = path.suffix.lower()
    fmt = {".csv": "ascii.csv", ".fits": "fits", ".fit": "fits"}.get(suffix, "ascii.ecsv")
    try:
        table = (Table.read(path, format=fmt, comment="#") if fmt == "ascii.csv"
                 else Table.read(path, format=fmt))
    except (OSError, ValueError, TypeError) as exc:
        raise InputFileError(path, f"cannot be read as {fmt} ({exc}); expected a standard-star "
                             f"flux table: {ACCEPTED}") from exc
    return interpret_flux_table(table, path=path)
