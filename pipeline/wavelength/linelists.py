"""Arc-lamp line lists shipped with the pipeline, with a source for every line.

The shipped list ``pipeline/data/arc_lines_air.csv`` is a copy of the
project's reference table of strong lamp lines (air wavelengths in standard
air, Angstrom; the ``source`` column names where each wavelength comes from
and ``note`` keeps the caveats: blends, high-excitation Ar I lines, natural-Hg
structure). Its sources are documented in ``pipeline/data/README.md``. Rows
whose source is ``memory`` were not verified against a stored source; they are
dropped by default.

Lamp names in the ``LAMPS`` header keyword (e.g. ``'HgAr,Ne'``) map to species
through the config section ``instrument.lamps``; :func:`species_for_lamps`
does that mapping.
"""

import csv
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from pipeline.core.errors import ConfigError, InputFileError

__all__ = ["LineList", "DEFAULT_LINE_LIST", "read_line_list", "parse_lamps", "species_for_lamps"]

#: The shipped list of arc-lamp lines (air wavelengths, Angstrom).
DEFAULT_LINE_LIST = Path(__file__).resolve().parents[1] / "data" / "arc_lines_air.csv"

_COLUMNS = ("species", "wavelength_air_angstrom", "relative_intensity", "source", "note")


@dataclass(frozen=True)
class LineList:
    """Lamp lines sorted by wavelength.

    Attributes
    ----------
    species : ndarray of str, shape (n,)
        E.g. ``'Ne I'``.
    wave_air_angstrom : ndarray of float, shape (n,), Angstrom
        Air wavelengths (standard air).
    relative_intensity : ndarray of float, shape (n,)
        As given by the source (``nan`` when blank); comparable only within one
        species and source.
    source : ndarray of str, shape (n,)
        Source keys (``;``-separated), see ``pipeline/data/README.md``.
    note : ndarray of str, shape (n,)
    info : dict
        ``path`` of the file, ``excluded_sources`` and ``n_excluded``.
    """

    species: np.ndarray
    wave_air_angstrom: np.ndarray
    relative_intensity: np.ndarray
    source: np.ndarray
    note: np.ndarray
    info: dict = field(default_factory=dict)

    def __len__(self):
        return len(self.wave_air_angstrom)

    def select(self, keep):
        """A new list with the lines where boolean ``keep`` is True."""
        keep = np.asarray(keep, dtype=bool)
        return LineList(self.species[keep], self.wave_air_angstrom[keep],
                        self.relative_intensity[keep], self.source[keep], self.note[keep],
                        dict(self.info))

    def in_range(self, lo_angstrom, hi_angstrom):
        """Lines with ``lo <= wavelength <= hi`` (Angstrom)."""
        w = self.wave_air_angstrom
        return self.select((w >= lo_angstrom) & (w <= hi_angstrom))

    def rank_weight(self):
        """Brightness rank within each species, 1 for the brightest, down to ~0.

        Lines of one species are ranked by ``relative_intensity`` (comparable only
        within a species and source); lines without an intensity get 0.5.

        Returns
        -------
        ndarray, shape (n,)
        """
        weight = np.full(len(self), 0.5)
        for sp in np.unique(self.species):
            idx = np.flatnonzero((self.species == sp) & np.isfinite(self.relative_intensity))
            if len(idx) == 0:
                continue
            order = np.argsort(-self.relative_intensity[idx], kind="stable")
            ranks = np.empty(len(idx))
            ranks[order] = np.arange(len(idx))
            weight[idx] = 1.0 - ranks / max(len(idx), 1)
        return weight


def read_line_list(path=None, *, species=None, exclude_sources=("memory",)):
    """Read a line list (CSV with the columns of the shipped file).

    Parameters
    ----------
    path : str or Path, optional
        Default: the shipped ``pipeline/data/arc_lines_air.csv``.
    species : sequence of str, optional
        Keep only these species (e.g. ``['Hg I', 'Ar I', 'Ne I']``).
    exclude_sources : sequence of str
        Drop lines whose source (any of the ``;``-separated keys) is one of these.

    Returns
    -------
    LineList
        Sorted by wavelength.

    Raises
    ------
    InputFileError
        When the file cannot be read, a column is missing or a wavelength is not a number.
    ConfigError
        When a requested species has no line in the file.

    Examples
    --------
    >>> ne = read_line_list(species=["Ne I"])
    >>> bool(ne.wave_air_angstrom.min() > 3500)
    True
    """
    path = Path(path) if path is not None else DEFAULT_LINE_LIST
    try:
        with open(path, newline="") as stream:
            rows = list(csv.DictReader(line for line in stream if not line.startswith("#")))
    except OSError as exc:
        raise InputFileError(path, f"cannot read the line list ({exc})") from None
    if rows:
        missing = [c for c in _COLUMNS if c not in rows[0]]
        if missing:
            raise InputFileError(path, f"line list lacks column(s) {', '.join(missing)}; "
                                 f"expected {', '.join(_COLUMNS)}")
    excluded = {s.strip() for s in exclude_sources}
    kept, n_excluded = [], 0
    for lineno, row in enumerate(rows, start=2):
        keys = {k.strip() for k in row["source"].split(";")}
        if keys & excluded:
            n_excluded += 1
            continue
        try:
            wave = float(row["wavelength_air_angstrom"])
        except ValueError:
            raise InputFileError(path, f"row {lineno}: wavelength_air_angstrom = "
                                 f"{row['wavelength_air_angstrom']!r}; expected a number") from None
        intensity = float(row["relative_intensity"]) if row["relative_intensity"].strip() else np.nan
        kept.append((row["species"].strip(), wave, intensity, row["source"].strip(),
                     (row["note"] or "").strip()))
    if species is not None:
        wanted = [s.strip() for s in species]
        present = {k[0] for k in kept}
        unknown = [s for s in wanted if s not in present]
        if unknown:
            raise ConfigError(f"species {', '.join(unknown)} not in line list {path} "
                              f"(it has {', '.join(sorted(present))})")
        kept = [k for k in kept if k[0] in wanted]
    kept.sort(key=lambda k: k[1])
    cols = list(zip(*kept)) if kept else [(), (), (), (), ()]
    return LineList(np.array(cols[0], dtype=str), np.array(cols[1], dtype=float),
                    np.array(cols[2], dtype=float), np.array(cols[3], dtype=str),
                    np.array(cols[4], dtype=str),
                    {"path": str(path), "excluded_sources": sorted(excluded),
                     "n_excluded": n_excluded})


def parse_lamps(text):
    """Split a ``LAMPS`` header value such as ``'HgAr,Ne'`` or ``'HgAr+Ne'`` into items."""
    return [item for item in re.split(r"[,+;\s]+", str(text or "").strip()) if item]


def species_for_lamps(lamps, lamp_map, *, path="<header>", keyword="LAMPS"):
    """Species lit by the lamps named in a header value.

    Parameters
    ----------
    lamps : str
        Header value, e.g. ``'HgAr,Ne'``.
    lamp_map : dict
        Config ``instrument.lamps``: lamp item -> list of species.
    path, keyword : str
        Used in error messages.

    Returns
    -------
    list of str
        Species in the order they first appear, without repeats.

    Raises
    ------
    InputFileError
        When the value is empty or names a lamp missing from ``lamp_map``.
    """
    items = parse_lamps(lamps)
    if not items:
        raise InputFileError(path, f"keyword {keyword} = {lamps!r}; expected the arc lamps "
                             f"switched on, e.g. 'HgAr,Ne' (known lamps: {', '.join(lamp_map)})")
    lookup = {str(k).lower(): v for k, v in lamp_map.items()}
    unknown = [i for i in items if i.lower() not in lookup]
    if unknown:
        raise InputFileError(path, f"keyword {keyword} = {lamps!r}: lamp(s) {', '.join(unknown)} "
                             f"not in config instrument.lamps (known: {', '.join(lamp_map)}); "
                             "add them with the species they show")
    species = []
    for item in items:
        for sp in lookup[item.lower()]:
            if sp not in species:
                species.append(sp)
    return species
