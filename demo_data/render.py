"""Render light onto the binned canonical detector grid (expected electrons, no noise).

Every renderer works row by row on the *unbinned* slit rows (so line tilt and
curvature are followed exactly) and integrates over the *binned* pixel edges
along the dispersion; the result is summed over the binning along the slit.
Output arrays are binned canonical ``(nyb, nxb)``: ``y`` along the slit, ``x``
along increasing wavelength.
"""

import functools

import numpy as np
from scipy.special import ndtr

__all__ = ["Grid", "render_lines", "render_continuum", "box_gauss_cdf",
           "gaussian_row_weights"]

_SQRT2PI = np.sqrt(2 * np.pi)


class Grid:
    """Pixel geometry: physical size and binning (dispersion ``bx``, slit ``by``)."""

    def __init__(self, nx_phys, ny_phys, bx, by):
        self.nx_phys, self.ny_phys, self.bx, self.by = nx_phys, ny_phys, bx, by
        self.nxb, self.nyb = nx_phys // bx, ny_phys // by
        #: binned pixel edges along X, in unbinned coordinates
        self.x_edges = bx * np.arange(self.nxb + 1) - 0.5
        #: binned pixel centres along X, in unbinned coordinates
        self.x_centres = bx * np.arange(self.nxb) + 0.5 * (bx - 1)
        #: unbinned row centres along Y
        self.y_phys = np.arange(ny_phys, dtype=float)
        #: binned row centres along Y, in unbinned coordinates
        self.y_centres = by * np.arange(self.nyb) + 0.5 * (by - 1)

    def bin_rows(self, per_phys_row):
        """Sum ``(ny_phys, nxb)`` over the slit binning -> ``(nyb, nxb)``."""
        return per_phys_row.reshape(self.nyb, self.by, -1).sum(axis=1)


def _h(u, sigma):
    """Antiderivative of the Gaussian CDF: H(u) = u Phi(u/s) + s phi(u/s)."""
    z = u / sigma
    return u * ndtr(z) + sigma * np.exp(-0.5 * z * z) / _SQRT2PI


def box_gauss_cdf(t, width, sigma):
    """CDF of a boxcar of full ``width`` convolved with a Gaussian of ``sigma``.

    Exact: ``C(t) = [H(t + w/2) - H(t - w/2)] / w`` with ``H`` the antiderivative of
    the normal CDF. Integrating a line profile over a pixel ``[a, b]`` is then
    ``C(b - x0) - C(a - x0)``.
    """
    return (_h(t + 0.5 * width, sigma) - _h(t - 0.5 * width, sigma)) / width


def gaussian_row_weights(y_centre, sigma, y_rows):
    """Fraction of a Gaussian (centre, sigma; broadcastable) falling in each unit row."""
    y = np.asarray(y_rows, float)
    return ndtr((y + 0.5 - y_centre) / sigma) - ndtr((y - 0.5 - y_centre) / sigma)


def render_lines(optics, grid, wave_angstrom, rate_per_row, width_px, sigma_px, *,
                 flexure_x_px=0.0):
    """Render emission lines filling the slit width.

    Parameters
    ----------
    optics : demo_data.optics.GratingOptics
    grid : Grid
    wave_angstrom : ndarray, shape (n,) or (n, ny_phys)
        Line wavelengths (per unbinned row when 2-D, e.g. a rotating galaxy).
    rate_per_row : ndarray, shape (n, ny_phys)
        Expected electrons of each line in each unbinned row (whole exposure).
    width_px, sigma_px : ndarray, shape (n,)
        Slit-image width and Gaussian sigma of each line along X (unbinned px).
    flexure_x_px : float
        Shift of the pattern along X (unbinned px).

    Returns
    -------
    image : ndarray, shape (nyb, nxb), electron
    centres : ndarray, shape (n, ny_phys)
        Line centres ``X`` (unbinned px) in every unbinned row.
    """
    waves = np.asarray(wave_angstrom, float)
    n = waves.shape[0]
    if waves.ndim == 1:
        waves = np.broadcast_to(waves[:, None], (n, grid.ny_phys))
    rates = np.broadcast_to(np.asarray(rate_per_row, float), (n, grid.ny_phys))
    width = np.broadcast_to(np.asarray(width_px, float), (n,))
    sigma = np.broadcast_to(np.asarray(sigma_px, float), (n,))
    out = np.zeros((grid.ny_phys, grid.nxb))
    centres = np.full((n, grid.ny_phys), np.nan)
    for k in range(n):
        xc = optics.x_of_wavelength(waves[k], grid.y_phys, flexure_x_px=flexure_x_px)
        centres[k] = xc
        if not np.all(np.isfinite(xc)):
            continue
        reach = 0.5 * width[k] + 8.0 * sigma[k] + 2 * grid.bx
        lo = int(np.floor((np.min(xc) - reach + 0.5) / grid.bx))
        hi = int(np.ceil((np.max(xc) + reach + 0.5) / grid.bx))
        lo, hi = max(lo, 0), min(hi, grid.nxb)
        if hi <= lo:
            continue
        edges = grid.x_edges[lo:hi + 1]
        cdf = box_gauss_cdf(edges[None, :] - xc[:, None], width[k], sigma[k])
        out[:, lo:hi] += rates[k][:, None] * np.diff(cdf, axis=1)
    return grid.bin_rows(out), centres


def wavelength_edges(optics, grid, *, flexure_x_px=0.0):
    """Wavelength at the binned pixel edges along X for every unbinned row, ``(ny_phys, nxb + 1)``.

    Cached for the last few (optics, grid, flexure) combinations; the returned
    array is read-only.
    """
    return _wavelength_edges(optics, grid.nx_phys, grid.ny_phys, grid.bx, grid.by,
                             float(flexure_x_px))


@functools.lru_cache(maxsize=3)
def _wavelength_edges(optics, nx_phys, ny_phys, bx, by, flexure_x_px):
    grid = Grid(nx_phys, ny_phys, bx, by)
    edges = optics.wavelength_of(grid.x_edges[None, :], grid.y_phys[:, None],
                                 flexure_x_px=flexure_x_px)
    edges.setflags(write=False)
    return edges


def render_continuum(optics, grid, spectrum, row_weight, *, flexure_x_px=0.0, lsf_sigma_angstrom=0.0,
                     wave_edges=None):
    """Render a continuous spectrum.

    Parameters
    ----------
    spectrum : callable
        ``spectrum(wave_angstrom) -> electrons per Angstrom`` for the whole exposure
        and the whole slit (before ``row_weight``).
    row_weight : ndarray, shape (ny_phys,) or (ny_phys, nxb)
        Fraction of the light in each unbinned row (may depend on the column,
        e.g. a drifting trace).
    lsf_sigma_angstrom : float
        Gaussian smoothing of the spectrum before pixel integration (the
        instrumental profile); 0 = none.
    wave_edges : ndarray, optional
        Precomputed :func:`wavelength_edges`.

    Returns
    -------
    image : ndarray, shape (nyb, nxb), electron
    counts_per_row : ndarray, shape (ny_phys, nxb)
        Electrons per unbinned row before the row weights (i.e. the spectrum
        integrated over each pixel's wavelength range in that row).

    Notes
    -----
    The counts in a pixel are the exact integral of the (smoothed) spectrum
    between the wavelengths of the pixel's two edges, computed from a
    cumulative trapezoid integral on a 0.2-A grid.
    """
    if wave_edges is None:
        wave_edges = wavelength_edges(optics, grid, flexure_x_px=flexure_x_px)
    lam_lo = np.nanmin(wave_edges) - 6 * lsf_sigma_angstrom - 2.0
    lam_hi = np.nanmax(wave_edges) + 6 * lsf_sigma_angstrom + 2.0
    step = 0.2
    fine = np.arange(lam_lo, lam_hi + step, step)
    values = np.asarray(spectrum(fine), float)
    if lsf_sigma_angstrom > 0:
        half = int(np.ceil(5 * lsf_sigma_angstrom / step))
        k = np.exp(-0.5 * (np.arange(-half, half + 1) * step / lsf_sigma_angstrom) ** 2)
        values = np.convolve(values, k / k.sum(), mode="same")
        # the edges of the fine grid are outside the detector; 'same' mode is safe there
    cum = np.concatenate([[0.0], np.cumsum(0.5 * (values[1:] + values[:-1]) * step)])
    cdf = np.interp(wave_edges, fine, cum)
    counts = np.diff(cdf, axis=1)
    weights = np.asarray(row_weight, float)
    if weights.ndim == 1:
        weights = weights[:, None]
    return grid.bin_rows(counts * weights), counts
