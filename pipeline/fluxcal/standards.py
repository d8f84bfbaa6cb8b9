"""Standard stars: their flux tables, and which of their spectra to use.

A standard's flux table (ECSV, or CSV with ``#`` comments) gives its flux density at
tabulated wavelengths (point samples) or as means over bins. :func:`table_flux_in_pixels`
integrates it over each spectral pixel. :func:`choose_standard_spectrum` picks the
spectrum of a standard-star frame that measures the sensitivity, and
:func:`standard_name_mismatch` says when the frame's OBJECT is not the table's star.
"""

import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from pipeline.core.checks import as_1d_float, same_shape
from pipeline.core.errors import InputFileError

__all__ = ["FluxTable", "read_flux_table", "normalise_object_name", "table_flux_in_pixels",
           "signal_to_noise", "choose_standard_spectrum", "standard_name_mismatch", "FLUX_UNIT"]

#: FITS unit string of the calibrated flux density.
FLUX_UNIT = "erg / (s cm2 Angstrom)"


@dataclass(frozen=True)
class FluxTable:
    """A standard star's tabulated flux density.

    Parameters
    ----------
    wave_angstrom : ndarray, shape (n,), Angstrom
        Strictly increasing wavelengths (air). With ``bin_width_angstrom``
        they are the centres of the bins.
    flux : ndarray, shape (n,), erg / s / cm2 / Angstrom
        Flux density at each wavelength (``bin_width_angstrom`` None: point
        samples of a function interpolated linearly between them) or mean over
        each bin (``bin_width_angstrom`` given).
    bin_width_angstrom : ndarray, shape (n,), Angstrom, or None
    name : str
        The star's name (from the table's meta data or the file name).
    source : str
        Where the table came from.
    """

    wave_angstrom: np.ndarray
    flux: np.ndarray
    bin_width_angstrom: np.ndarray = None
    name: str = ""
    source: str = ""

    def __post_init__(self):
        wave = as_1d_float(self.wave_angstrom, "wave_angstrom")
        flux = as_1d_float(self.flux, "flux")
        same_shape([wave, flux], ["wave_angstrom", "flux"])
        if wave.size < 2:
            raise ValueError(f"a flux table needs at least 2 rows, got {wave.size}")
        if not (np.all(np.isfinite(wave)) and np.all(np.isfinite(flux))):
            raise ValueError("`wave_angstrom` and `flux` must be finite")
        if np.any(np.diff(wave) <= 0):
            raise ValueError("`wave_angstrom` must be strictly increasing")
        if np.any(flux <= 0):
            raise ValueError("`flux` must be > 0 everywhere")
        object.__setattr__(self, "wave_angstrom", wave)
        object.__setattr__(self, "flux", flux)
        if self.bin_width_angstrom is not None:
            width = as_1d_float(self.bin_width_angstrom, "bin_width_angstrom")
            same_shape([wave, width], ["wave_angstrom", "bin_width_angstrom"])
            if not np.all(width > 0):
                raise ValueError("`bin_width_angstrom` must be > 0 everywhere")
            lo, hi = wave - width / 2, wave + width / 2
            if np.any(lo[1:] < hi[:-1] - 1e-6 * width[1:]):
                raise ValueError("bins of the flux table overlap; expected bins "
                                 "[centre - width/2, centre + width/2] that do not overlap")
            object.__setattr__(self, "bin_width_angstrom", width)


_FLUX_COLUMNS = ("flux_erg_s_cm2_angstrom", "flux_erg_s_cm2_a", "flux_lambda", "flux")
_WIDTH_COLUMNS = ("bin_width_angstrom", "bandwidth_angstrom", "width_angstrom")


def read_flux_table(path):
    """Read a standard star's flux table (ECSV; or CSV with ``#`` comments).

    Columns: ``wavelength_angstrom`` (air), one flux column
    (``flux_erg_s_cm2_angstrom``, or ``flux`` with a unit convertible to
    erg/s/cm2/A), and optionally ``bin_width_angstrom`` (then each flux is the
    mean over its bin). The star's name is the table's ``name``/``object``
    meta item or the file stem.

    Raises
    ------
    InputFileError
        Naming the file and the column that is missing or wrong.
    """
    from astropy import units as u
    from astropy.table import Table

    path = Path(path)
    fmt = "ascii.csv" if path.suffix.lower() == ".csv" else "ascii.ecsv"
    try:
        table = (Table.read(path, format=fmt, comment="#") if fmt == "ascii.csv"
                 else Table.read(path, format=fmt))
    except (OSError, ValueError, TypeError) as exc:
        raise InputFileError(path, f"cannot be read as {fmt} ({exc}); expected a standard-star "
                             "flux table with columns wavelength_angstrom and "
                             "flux_erg_s_cm2_angstrom") from exc
    if "wavelength_angstrom" not in table.colnames:
        raise InputFileError(path, f"column wavelength_angstrom missing (found {table.colnames}); "
                             "expected air wavelengths in Angstrom")
    flux_col = next((c for c in _FLUX_COLUMNS if c in table.colnames), None)
    if flux_col is None:
        raise InputFileError(path, f"no flux column (found {table.colnames}); expected one of "
                             f"{list(_FLUX_COLUMNS)} in erg/s/cm2/A")
    wave = np.asarray(table["wavelength_angstrom"], dtype=float)
    column = table[flux_col]
    flux = np.asarray(column, dtype=float)
    if column.unit is not None:
        try:
            flux = (flux * column.unit).to_value(
                u.Unit(FLUX_UNIT), equivalencies=u.spectral_density(wave * u.AA))
        except u.UnitConversionError as exc:
            raise InputFileError(path, f"column {flux_col} has unit {column.unit}, expected a "
                                 f"flux density convertible to {FLUX_UNIT}") from exc
    width_col = next((c for c in _WIDTH_COLUMNS if c in table.colnames), None)
    width = None if width_col is None else np.asarray(table[width_col], dtype=float)
    order = np.argsort(wave)
    name = str(table.meta.get("name", table.meta.get("object", path.stem)))
    source = path.name
    if "source" in table.meta:
        source += f" ({table.meta['source']})"
    try:
        return FluxTable(wave[order], flux[order],
                         None if width is None else width[order], name=name, source=source)
    except ValueError as exc:
        raise InputFileError(path, f"{exc} (column {flux_col}"
                             + (f", {width_col}" if width_col else "") + ")") from exc


def normalise_object_name(name):
    """Key used to match an OBJECT header value with a flux-table name.

    Upper case with spaces, underscores and hyphens removed, so 'TRS 17',
    'trs-17' and 'TRS_17' match.

    >>> normalise_object_name(' trs_17 ')
    'TRS17'
    """
    return re.sub(r"[\s_\-]+", "", str(name)).upper()


# ----------------------------------------------------------------------------
# the table's flux integrated over pixels
# ----------------------------------------------------------------------------

def _cumulative_linear(x_nodes, f_nodes, q):
    """Integral from x_nodes[0] to q of the piecewise-linear interpolant (exact)."""
    seg = np.diff(x_nodes)
    cum = np.concatenate([[0.0], np.cumsum(0.5 * (f_nodes[1:] + f_nodes[:-1]) * seg)])
    i = np.clip(np.searchsorted(x_nodes, q, side="right") - 1, 0, x_nodes.size - 2)
    t = q - x_nodes[i]
    slope = (f_nodes[i + 1] - f_nodes[i]) / seg[i]
    return cum[i] + f_nodes[i] * t + 0.5 * slope * t * t


def _cumulative_step(lo, hi, f, q):
    """Integral of a step function (value f on [lo, hi), bins sorted and not overlapping)
    and the length covered by bins, from -inf up to each q."""
    width = hi - lo
    cum_int = np.concatenate([[0.0], np.cumsum(f * width)])
    cum_len = np.concatenate([[0.0], np.cumsum(width)])
    i = np.searchsorted(lo, q, side="right") - 1
    j = np.clip(i, 0, lo.size - 1)
    part = np.where(i >= 0, np.clip(q - lo[j], 0.0, width[j]), 0.0)
    base = np.where(i >= 0, j, 0)
    return cum_int[base] + f[j] * part, cum_len[base] + part


def table_flux_in_pixels(table, edges_angstrom):
    """Mean of a tabulated flux density over each pixel.

    Parameters
    ----------
    table : FluxTable
    edges_angstrom : array_like, shape (n + 1,), Angstrom
        Pixel edges (see :func:`pixel_edges`), increasing.

    Returns
    -------
    flux : ndarray, shape (n,), erg / s / cm2 / Angstrom
        ``(1 / Delta lambda) * integral of F over the pixel``; NaN where the
        pixel is not entirely covered by the table.

    Notes
    -----
    Point-sampled tables are integrated exactly as the piecewise-linear
    function through their points (a cumulative integral evaluated at the
    pixel edges, quadratic inside a table interval), so a pixel that spans
    several table points, or a fraction of one interval, gets the right
    mean - not the value at its centre. Binned tables are integrated as the
    step function they describe. In both cases the sum of ``flux * Delta
    lambda`` over pixels equals the table's integral over the same range.

    Examples
    --------
    >>> t = FluxTable([0.0, 10.0], [1.0, 11.0])
    >>> table_flux_in_pixels(t, [0.0, 2.0, 10.0])
    array([2., 7.])
    """
    edges = as_1d_float(edges_angstrom, "edges_angstrom")
    if edges.size < 2 or np.any(np.diff(edges) <= 0):
        raise ValueError("`edges_angstrom` must be increasing with at least 2 values")
    width = np.diff(edges)
    if table.bin_width_angstrom is None:
        lo_tab, hi_tab = table.wave_angstrom[0], table.wave_angstrom[-1]
        cum = _cumulative_linear(table.wave_angstrom, table.flux, np.clip(edges, lo_tab, hi_tab))
        mean = np.diff(cum) / width
        inside = (edges[:-1] >= lo_tab - 1e-9) & (edges[1:] <= hi_tab + 1e-9)
    else:
        lo = table.wave_angstrom - table.bin_width_angstrom / 2
        hi = table.wave_angstrom + table.bin_width_angstrom / 2
        integral, covered = _cumulative_step(lo, hi, table.flux, edges)
        mean = np.diff(integral) / width
        inside = np.diff(covered) >= width * (1 - 1e-6)
    return np.where(inside, mean, np.nan)


def signal_to_noise(values, variance, mask):
    """Median signal-to-noise ratio per pixel over good pixels (0 when there is none).

    >>> signal_to_noise(np.array([100.0, 400.0]), np.array([100.0, 400.0]), np.zeros(2))
    15.0
    """
    values, variance, mask = np.asarray(values), np.asarray(variance), np.asarray(mask)
    good = (mask == 0) & np.isfinite(values) & (variance > 0)
    if not good.any():
        return 0.0
    return float(np.median(values[good] / np.sqrt(variance[good])))


def choose_standard_spectrum(spectra):
    """The spectrum of a standard-star frame that measures the sensitivity.

    Parameters
    ----------
    spectra : sequence of objects with ``values``, ``variance`` and ``mask``
        Every spectrum extracted from the frame (the standard and any other
        object on the slit).

    Returns
    -------
    int
        Index of the spectrum with the highest median S/N per pixel (the
        standard is the brightest object on its frame); the first on a tie.

    Raises
    ------
    ValueError
        When ``spectra`` is empty.

    Examples
    --------
    >>> from types import SimpleNamespace as S
    >>> faint = S(values=np.full(4, 100.0), variance=np.full(4, 100.0), mask=np.zeros(4))
    >>> bright = S(values=np.full(4, 1e4), variance=np.full(4, 1e4), mask=np.zeros(4))
    >>> choose_standard_spectrum([faint, bright])
    1
    """
    spectra = list(spectra)
    if not spectra:
        raise ValueError("`spectra` is empty; expected at least one extracted spectrum")
    snr = [signal_to_noise(s.values, s.variance, s.mask) for s in spectra]
    return int(np.argmax(snr))


def standard_name_mismatch(object_name, table_name):
    """A message when a frame's OBJECT names another star than its flux table, else ''.

    Names are compared with :func:`normalise_object_name`.

    >>> standard_name_mismatch("TRS 17", "trs-17")
    ''
    >>> standard_name_mismatch("TRS 18", "TRS-17")
    "OBJECT 'TRS 18' differs from the flux table's star 'TRS-17'"
    """
    if normalise_object_name(object_name) == normalise_object_name(table_name):
        return ""
    return f"OBJECT {object_name!r} differs from the flux table's star {table_name!r}"
