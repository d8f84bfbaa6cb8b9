"""Rectification: resample a frame onto a straight slit and a wavelength grid.

Each detector row is resampled on its own, along the dispersion, from the
wavelengths its pixels see (the 2-D wavelength solution λ(y, x)) onto one
common wavelength grid. Rows stay rows, so after rectification lines of
constant wavelength are columns ("straight slit") and the spatial coordinate
is the detector row times the pixel scale along the slit.

Resampling model and flux conservation
--------------------------------------
The flux of an input pixel is spread uniformly over the wavelength interval
it covers (its edges are the mid-points between neighbouring pixel centres of
the solution). An output bin receives from each input pixel the fraction of
that pixel's interval it overlaps::

    out_j = sum_i w_ij * in_i,   w_ij = |bin_j ∩ pixel_i| / |pixel_i|

so the total flux of a row is kept exactly, and the flux between two
output-bin edges equals that of the input over the same wavelength interval
under the assumption of uniform flux within each input pixel. Where the
spectrum is resolved (smooth on the pixel scale) this is exact to 0.1 % for
any interval (tests/test_rectify.py); an interval that ends *inside* a line
unresolved by the pixels (sigma ~ 1 px) can be off by a fraction of one
pixel's line flux, since the data cannot say where in the pixel that flux
fell. Bin by bin, such a line is redistributed by up to ~20 % between
neighbouring bins; its total is kept.

Variance and covariance
-----------------------
The variance of each output pixel is ``sum_i w_ij**2 * var_i``, which is
exact for that pixel on its own. Neighbouring output pixels along the
dispersion share input pixels, so they are correlated:
``cov(out_j, out_k) = sum_i w_ij w_ik var_i``. Two consequences:

* the per-pixel variance is *smaller* than the input variance (for a bin as
  wide as a pixel, by a factor between 0.5 and 1 depending on the phase), and
  the rectified frame looks less noisy than it is;
* the variance of a sum of several output pixels *along the dispersion*
  computed by adding their variances underestimates the truth; the header
  keyword ``VARCORR`` gives the ratio (true variance of a long sum / sum of the
  per-pixel variances) for the whole frame, about 1.3-1.5 for bins as wide as
  a pixel.

Sums *along the slit* (extraction) combine different detector rows, which are
independent, so extracted spectra have correct variances per wavelength bin;
neighbouring bins of an extracted spectrum keep the correlation described
above.

Mask
----
An output pixel carries the OR of the mask bits of every input pixel that
contributes to it, so masked pixels stay masked (a masked pixel typically
marks two output pixels). Output bins not fully covered by the row's
wavelength range get ``NO_COVERAGE`` with data and variance 0; non-finite
input values are replaced by 0 and flagged ``NONFINITE``.

FITS WCS of the products (Greisen et al. 2006, A&A 446, 747)
-------------------------------------------------------------
Axis 1: ``CTYPE1 = 'AWAV'`` (linear air wavelength) or ``'AWAV-LOG'``
(logarithmic grid, λ = CRVAL1 exp(CDELT1 (p - CRPIX1) / CRVAL1)); ``'WAVE'``
and ``'WAVE-LOG'`` for vacuum. ``CUNIT1 = 'Angstrom'``. Axis 2 of rectified
frames: ``CTYPE2 = 'SLITPOS'`` (a linear coordinate), ``CUNIT2 = 'arcsec'``,
zero at the slit centre (the middle row), increasing with row index.
"""

from dataclasses import dataclass, field

import numpy as np

from pipeline.core.checks import as_2d, same_shape
from pipeline.core.grid import WavelengthGrid
from pipeline.core.maskbits import MASK_DTYPE, MaskBit
from pipeline.core.constants import SPEED_OF_LIGHT_KM_S as C_KMS

__all__ = ["WavelengthGrid", "RectifiedFrame", "wavelength_grid", "pixel_edges_angstrom",
           "resampling_weights", "resample_rows", "rectify", "slit_wcs_cards"]


_OVERLAP_EPS = 1e-6  # fractions below this are rounding at coincident edges, not overlap


def _round_sig(value, digits=3):
    if value <= 0:
        return value
    exponent = int(np.floor(np.log10(value))) - digits + 1
    return round(value / 10.0 ** exponent) * 10.0 ** exponent


def wavelength_grid(wave_map, *, step_angstrom=None, start_angstrom=None, end_angstrom=None,
                    log=False, velocity_step_kms=None, vacuum=False):
    """Choose the output wavelength grid for a 2-D wavelength solution.

    Parameters
    ----------
    wave_map : ndarray, shape (ny, nx), Angstrom
        Wavelength of every pixel centre.
    step_angstrom : float, optional
        Linear grid step. Default: the median dispersion of the middle row,
        rounded to 3 significant digits (so frames of one setup share a grid).
    start_angstrom, end_angstrom : float, optional
        Grid limits. Default: the middle row's range, widened to whole steps
        (start on a multiple of the step, so frames of a setup align).
    log : bool
        Logarithmic grid (constant velocity step).
    velocity_step_kms : float, optional
        Step of a log grid in km/s. Default: the median dispersion of the
        middle row expressed as a velocity, rounded to 3 significant digits.
    vacuum : bool
        Label the grid as vacuum wavelengths.

    Returns
    -------
    WavelengthGrid
    """
    wave_map = as_2d(wave_map, "wave_map", dtype=np.float64)
    row = wave_map[wave_map.shape[0] // 2]
    good = np.isfinite(row)
    if good.sum() < 2:
        raise ValueError("`wave_map` middle row has fewer than 2 finite wavelengths")
    row = row[good]
    lo = float(row.min()) if start_angstrom is None else float(start_angstrom)
    hi = float(row.max()) if end_angstrom is None else float(end_angstrom)
    if not hi > lo:
        raise ValueError(f"grid end {hi} must exceed start {lo} (Angstrom)")
    if not log:
        step = (_round_sig(float(np.median(np.abs(np.diff(row)))))
                if step_angstrom is None else float(step_angstrom))
        if start_angstrom is None:
            lo = np.floor(lo / step) * step
        if end_angstrom is None:
            hi = np.ceil(hi / step) * step
        n_pix = int(np.floor((hi - lo) / step + 1e-9)) + 1
        return WavelengthGrid(float(lo), float(step), n_pix, log=False, vacuum=vacuum)
    if velocity_step_kms is None:
        dlnl = np.median(np.abs(np.diff(np.log(row))))
        velocity_step_kms = _round_sig(float(dlnl * C_KMS))
    step = float(velocity_step_kms) / C_KMS
    llo, lhi = np.log(lo), np.log(hi)
    if start_angstrom is None:
        llo = np.floor(llo / step) * step
    if end_angstrom is None:
        lhi = np.ceil(lhi / step) * step
    n_pix = int(np.floor((lhi - llo) / step + 1e-9)) + 1
    return WavelengthGrid(float(np.exp(llo)), step, n_pix, log=True, vacuum=vacuum)


# -- resampling ----------------------------------------------------------------------
def pixel_edges_angstrom(wave_map):
    """Wavelengths of the pixel edges along each row.

    Parameters
    ----------
    wave_map : ndarray, shape (ny, nx), Angstrom
        Wavelength of every pixel centre; must increase along each row.

    Returns
    -------
    ndarray, shape (ny, nx + 1), Angstrom
        Mid-points between neighbouring centres; the outer edges are
        extrapolated by half the neighbouring step.

    Raises
    ------
    ValueError
        When a row is not strictly increasing or not finite.
    """
    wave_map = as_2d(wave_map, "wave_map", dtype=np.float64)
    if wave_map.shape[1] < 2:
        raise ValueError(f"`wave_map` needs at least 2 pixels along x, got shape {wave_map.shape}")
    if not np.all(np.isfinite(wave_map)):
        raise ValueError("`wave_map` contains non-finite wavelengths")
    steps = np.diff(wave_map, axis=1)
    if np.any(steps <= 0):
        bad = int(np.argwhere(steps <= 0)[0][0])
        raise ValueError(f"`wave_map` row {bad} does not increase with x; the canonical "
                         "orientation has wavelength increasing along numpy axis 1")
    edges = np.empty((wave_map.shape[0], wave_map.shape[1] + 1))
    edges[:, 1:-1] = 0.5 * (wave_map[:, 1:] + wave_map[:, :-1])
    edges[:, 0] = wave_map[:, 0] - 0.5 * steps[:, 0]
    edges[:, -1] = wave_map[:, -1] + 0.5 * steps[:, -1]
    return edges


@dataclass(frozen=True)
class ResamplingWeights:
    """Sparse weights of the row-by-row resampling (see module notes).

    Attributes
    ----------
    index : ndarray of int, shape (k, ny, n_out)
        Input column of each of the ``k`` possible contributors.
    weight : ndarray, shape (k, ny, n_out)
        Fraction of that input pixel going to the output pixel (0 for none).
    covered : ndarray of bool, shape (ny, n_out)
        Output bin lies fully inside the row's wavelength range.
    """

    index: np.ndarray
    weight: np.ndarray
    covered: np.ndarray

    @property
    def weight_sum(self):
        """Sum of weights per output pixel, shape (ny, n_out) (≈ bin width / pixel width)."""
        return self.weight.sum(axis=0)

    @property
    def weight_sq_sum(self):
        """Sum of squared weights per output pixel, shape (ny, n_out)."""
        return (self.weight ** 2).sum(axis=0)


def resampling_weights(wave_map, grid):
    """Weights that take each row of a frame onto ``grid``.

    Parameters
    ----------
    wave_map : ndarray, shape (ny, nx), Angstrom
        Wavelength of every pixel centre (increasing along x).
    grid : WavelengthGrid

    Returns
    -------
    ResamplingWeights
    """
    edges_in = pixel_edges_angstrom(wave_map)
    ny, nx1 = edges_in.shape
    nx = nx1 - 1
    edges_out = grid.edges_angstrom()
    ramp = np.arange(nx1, dtype=np.float64)
    # Fractional input-edge coordinate of each output edge: pixel i spans [i, i + 1].
    u = np.empty((ny, edges_out.size))
    for y in range(ny):
        u[y] = np.interp(edges_out, edges_in[y], ramp, left=np.nan, right=np.nan)
    lo, hi = u[:, :-1], u[:, 1:]
    covered = np.isfinite(lo) & np.isfinite(hi)
    lo = np.where(covered, lo, 0.0)
    hi = np.where(covered, hi, 0.0)
    first = np.clip(np.floor(lo).astype(np.int64), 0, nx - 1)
    k_max = int(np.max(np.ceil(hi - first), initial=1)) if covered.any() else 1
    k_max = max(k_max, 1)
    index = first[None] + np.arange(k_max)[:, None, None]
    overlap = (np.minimum(hi[None], index + 1.0) - np.maximum(lo[None], index.astype(float)))
    weight = np.where((index < nx) & covered[None], np.clip(overlap, 0.0, None), 0.0)
    weight[weight < _OVERLAP_EPS] = 0.0
    index = np.clip(index, 0, nx - 1)
    return ResamplingWeights(index, weight, covered)


def resample_rows(values, weights, *, power=1):
    """Apply resampling weights to an image.

    Parameters
    ----------
    values : ndarray, shape (ny, nx)
        Image to resample (non-finite values count as 0).
    weights : ResamplingWeights
    power : {1, 2}
        1 for fluxes (and fully correlated errors), 2 for variances of
        independent pixels.

    Returns
    -------
    ndarray, shape (ny, n_out)
    """
    values = as_2d(values, "values", dtype=np.float64)
    if power not in (1, 2):
        raise ValueError(f"`power` must be 1 or 2, got {power!r}")
    clean = np.where(np.isfinite(values), values, 0.0)
    rows = np.arange(clean.shape[0])[None, :, None]
    w = weights.weight if power == 1 else weights.weight ** 2
    return np.sum(w * clean[rows, weights.index], axis=0)


def _resample_mask(mask, weights):
    rows = np.arange(mask.shape[0])[None, :, None]
    contrib = np.where(weights.weight > 0, mask[rows, weights.index], 0).astype(MASK_DTYPE)
    out = np.bitwise_or.reduce(contrib, axis=0).astype(MASK_DTYPE)
    out[~weights.covered] |= MASK_DTYPE(MaskBit.NO_COVERAGE)
    return out


@dataclass(frozen=True)
class RectifiedFrame:
    """A frame resampled onto (slit row, wavelength grid).

    Attributes
    ----------
    data : ndarray, shape (ny, n_pix), same unit as the input (electron)
    variance : ndarray, shape (ny, n_pix), unit squared
    mask : ndarray of uint8, shape (ny, n_pix)
    grid : WavelengthGrid
    weights : ResamplingWeights
        Kept so that other images (sky model, variance models) can be
        resampled in exactly the same way.
    info : dict
        ``variance_correlation`` (VARCORR, see module notes),
        ``masked_fraction``, ``covered_fraction``.
    """

    data: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    grid: WavelengthGrid
    weights: ResamplingWeights = field(repr=False)
    info: dict = field(default_factory=dict)


def rectify(data, variance, mask, wave_map, grid):
    """Resample data, variance and mask of a frame onto a wavelength grid.

    Parameters
    ----------
    data : ndarray, shape (ny, nx), electron
        Calibrated frame, canonical orientation.
    variance : ndarray, shape (ny, nx), electron^2
    mask : ndarray of uint8, shape (ny, nx)
        Bits of :mod:`pipeline.core.maskbits`.
    wave_map : ndarray, shape (ny, nx), Angstrom
        Wavelength of every pixel centre (the 2-D solution, flexure-corrected).
    grid : WavelengthGrid

    Returns
    -------
    RectifiedFrame

    Notes
    -----
    Flux-conserving row-by-row resampling; see the module docstring for the
    weights, the mask rule and the covariance between output pixels.

    Examples
    --------
    >>> wave = np.tile(5000.0 + np.arange(6.0), (2, 1))
    >>> r = rectify(np.ones((2, 6)), np.ones((2, 6)), np.zeros((2, 6), 'u1'), wave,
    ...             WavelengthGrid(5001.0, 2.0, 2))
    >>> r.data
    array([[2., 2.],
           [2., 2.]])
    """
    data = as_2d(data, "data", dtype=np.float64)
    variance = as_2d(variance, "variance", dtype=np.float64)
    mask = as_2d(mask, "mask", dtype=MASK_DTYPE)
    wave_map = as_2d(wave_map, "wave_map", dtype=np.float64)
    same_shape([data, variance, mask, wave_map], ["data", "variance", "mask", "wave_map"])
    if not isinstance(grid, WavelengthGrid):
        raise TypeError(f"`grid` must be a WavelengthGrid, got {type(grid).__name__}")
    nonfinite = ~(np.isfinite(data) & np.isfinite(variance))
    in_mask = mask | np.where(nonfinite, MASK_DTYPE(MaskBit.NONFINITE), MASK_DTYPE(0))
    weights = resampling_weights(wave_map, grid)
    out_data = resample_rows(np.where(nonfinite, 0.0, data), weights)
    out_var = resample_rows(np.where(nonfinite, 0.0, np.clip(variance, 0.0, None)), weights,
                            power=2)
    out_mask = _resample_mask(in_mask.astype(MASK_DTYPE), weights)
    out_data[~weights.covered] = 0.0
    out_var[~weights.covered] = 0.0
    # Ratio of the exact variance of a long sum along x to the sum of per-pixel variances.
    col_sum = np.zeros_like(data)
    rows = np.broadcast_to(np.arange(data.shape[0])[None, :, None], weights.index.shape)
    np.add.at(col_sum, (rows, weights.index), weights.weight)
    v_in = np.where(nonfinite, 0.0, np.clip(variance, 0.0, None))
    exact = float(np.sum(col_sum ** 2 * v_in))
    approx = float(np.sum(out_var))
    info = {
        "variance_correlation": float(exact / approx) if approx > 0 else float("nan"),
        "masked_fraction": float(np.mean(out_mask != 0)),
        "covered_fraction": float(np.mean(weights.covered)),
    }
    return RectifiedFrame(out_data, out_var, out_mask, grid, weights, info)


def slit_wcs_cards(ny, arcsec_per_px, *, axis=2):
    """FITS WCS cards of the spatial axis of a rectified frame.

    Position along the slit in arcsec, 0 at the middle row, increasing with row.
    """
    return [
        (f"CTYPE{axis}", "SLITPOS", "position along the slit"),
        (f"CUNIT{axis}", "arcsec", "unit of the slit position"),
        (f"CRPIX{axis}", (ny + 1) / 2.0, "middle row (1-based)"),
        (f"CRVAL{axis}", 0.0, "slit position at CRPIX, arcsec"),
        (f"CDELT{axis}", float(arcsec_per_px), "arcsec per row"),
    ]
