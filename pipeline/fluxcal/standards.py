"""Standard stars: their flux tables, and which of their spectra to use.

A standard's flux table (read by :mod:`pipeline.fluxcal.flux_tables`) gives its flux
density at tabulated wavelengths (point samples) or as means over bins. :func:`table_flux_in_pixels`
integrates it over each spectral pixel. :func:`choose_standard_spectrum` picks the
spectrum of a standard-star frame that measures the sensitivity, and
:func:`standard_name_mismatch` says when the frame's OBJECT is not the table's star.
"""

import re
from dataclasses import dataclass, field

import numpy as np

from pipeline.core.checks import as_1d_float, same_shape

__all__ = ["FluxTable", "normalise_object_name", "table_flux_in_pixels",
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
    info : dict
        How it was read (columns, units, air or vacuum; see
        :func:`pipeline.fluxcal.flux_tables.read_flux_table`).
    """

    wave_angstrom: np.ndarray
    flux: np.ndarray
    bin_width_angstrom: np.ndarray = None
    name: str = ""
    source: str = ""
    info: dict = field(default_factory=dict)

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
