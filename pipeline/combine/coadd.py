"""Combining spectra already on one grid: exposures of one target (inverse-variance weighted
mean with outlier rejection), and two setups overlapping in wavelength (a relative flux
scale measured in the overlap, then the same weighted mean).

Pure functions on arrays; the grids, the velocity frame and the files are handled in
:mod:`pipeline.combine.steps`.

Examples
--------
>>> import numpy as np
>>> flux = np.array([[1.0, 2.0], [3.0, 2.0]])
>>> var = np.ones((2, 2))
>>> c = combine_exposures(flux, var, np.zeros((2, 2), np.uint8))
>>> c.flux, c.variance
(array([2., 2.]), array([0.5, 0.5]))
"""

from dataclasses import dataclass, field

import numpy as np

from pipeline.core.checks import as_2d
from pipeline.core.maskbits import MASK_DTYPE, MaskBit

__all__ = ["Combination", "combine_exposures", "OverlapScale", "overlap_scale", "splice"]


@dataclass(frozen=True)
class Combination:
    """An inverse-variance weighted mean of spectra on one grid.

    Attributes
    ----------
    flux, variance : ndarray, shape (n,)
        Weighted mean and its variance ``1 / sum(w)`` (NaN where no exposure has data).
    mask : ndarray of uint8, shape (n,)
        0 where at least one exposure contributes; else the OR of the exposures' bits
        (NO_COVERAGE where none covers the pixel).
    n_used : ndarray of int, shape (n,)
        Exposures contributing to each pixel.
    n_rejected : ndarray of int, shape (n,)
        Exposure pixels rejected as outliers at each pixel.
    info : dict
        ``n_rejected_total``, ``rejected_per_exposure`` (list), ``iterations``.
    """

    flux: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    n_used: np.ndarray
    n_rejected: np.ndarray
    info: dict = field(default_factory=dict)


def _weighted(flux, weight):
    total = weight.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(total > 0, (weight * np.where(weight > 0, flux, 0.0)).sum(axis=0)
                        / np.where(total > 0, total, 1.0), np.nan)
    return mean, total


def combine_exposures(flux, variance, mask, *, clip_sigma=5.0, max_iterations=3, min_for_clip=3):
    """Inverse-variance weighted mean of spectra on one grid, with outlier rejection.

    Parameters
    ----------
    flux, variance : ndarray, shape (n_exposures, n)
        Same unit and grid; variance > 0 where there is data.
    mask : ndarray of uint8, shape (n_exposures, n)
        Nonzero = not used.
    clip_sigma : float
        A pixel of one exposure is rejected when it deviates from the weighted mean of the
        *other* exposures by more than ``clip_sigma`` times the standard deviation of that
        difference (``sqrt(var_k + 1 / sum_{j != k} w_j)``), the largest deviation first.
    max_iterations : int
        Rounds of rejection (one pixel of each column at most per round).
    min_for_clip : int
        Fewest exposures with data at a pixel for rejection there: with two, neither can
        be told to be the outlier.

    Returns
    -------
    Combination

    Notes
    -----
    Leave-one-out comparison keeps a strong outlier from inflating the mean it is judged
    against (cosmic-ray residuals, unmasked bad columns).
    """
    flux = as_2d(flux, "flux", dtype=np.float64)
    variance = as_2d(variance, "variance", dtype=np.float64)
    mask = np.asarray(mask)
    if flux.shape != variance.shape or flux.shape != mask.shape:
        raise ValueError(f"`flux`, `variance` and `mask` must have one shape, got {flux.shape}, "
                         f"{variance.shape}, {mask.shape}")
    good = (mask == 0) & np.isfinite(flux) & np.isfinite(variance) & (variance > 0)
    with np.errstate(divide="ignore"):
        base_weight = np.where(good, 1.0 / np.where(good, variance, 1.0), 0.0)
    rejected = np.zeros_like(good)
    iterations = 0
    for iterations in range(1, int(max_iterations) + 1):
        weight = np.where(rejected, 0.0, base_weight)
        n_good = (weight > 0).sum(axis=0)
        total = weight.sum(axis=0)
        weighted_sum = (weight * np.where(weight > 0, flux, 0.0)).sum(axis=0)
        others = total[None, :] - weight
        with np.errstate(invalid="ignore", divide="ignore"):
            mean_others = (weighted_sum[None, :] - weight * np.where(weight > 0, flux, 0.0)) / others
            sigma = np.sqrt(variance + 1.0 / others)
            deviation = np.abs(flux - mean_others) / sigma
        deviation = np.where((weight > 0) & (others > 0) & (n_good[None, :] >= min_for_clip),
                             deviation, 0.0)
        worst = np.argmax(deviation, axis=0)
        columns = np.arange(flux.shape[1])
        hit = deviation[worst, columns] > clip_sigma
        if not hit.any():
            break
        rejected[worst[hit], columns[hit]] = True
    weight = np.where(rejected, 0.0, base_weight)
    mean, total = _weighted(flux, weight)
    with np.errstate(divide="ignore"):
        var = np.where(total > 0, 1.0 / np.where(total > 0, total, 1.0), np.nan)
    n_used = (weight > 0).sum(axis=0)
    out_mask = np.zeros(flux.shape[1], dtype=MASK_DTYPE)
    empty = n_used == 0
    if empty.any():
        bits = np.bitwise_or.reduce(mask.astype(MASK_DTYPE), axis=0)
        out_mask[empty] = bits[empty] | MASK_DTYPE(MaskBit.NO_COVERAGE) * (bits[empty] == 0)
    info = {"n_rejected_total": int(rejected.sum()),
            "rejected_per_exposure": [int(v) for v in rejected.sum(axis=1)],
            "iterations": iterations}
    return Combination(mean, var, out_mask, n_used, rejected.sum(axis=0), info)


@dataclass(frozen=True)
class OverlapScale:
    """Relative flux scale of spectrum B to spectrum A in their overlap: ``A ≈ scale * B``.

    Attributes
    ----------
    scale, scale_err : float
    n_pixels : int
        Pixels of the overlap used.
    range_angstrom : tuple of float
    """

    scale: float
    scale_err: float
    n_pixels: int
    range_angstrom: tuple


def overlap_scale(wave, flux_a, var_a, good_a, flux_b, var_b, good_b):
    """Measure ``A / B`` over the pixels both cover: ratio of the summed fluxes (robust to
    noise at low S/N; the sums are over the same pixels), with its error from the variances.

    Examples
    --------
    >>> import numpy as np
    >>> w = np.arange(10.0)
    >>> s = overlap_scale(w, 2 * np.ones(10), np.ones(10), np.ones(10, bool),
    ...                   np.ones(10), np.ones(10), np.ones(10, bool))
    >>> round(s.scale, 6), s.n_pixels
    (2.0, 10)
    """
    both = good_a & good_b & np.isfinite(flux_a) & np.isfinite(flux_b)
    n = int(both.sum())
    if n < 5:
        return OverlapScale(np.nan, np.nan, n, (np.nan, np.nan))
    sum_a, sum_b = float(np.sum(flux_a[both])), float(np.sum(flux_b[both]))
    if sum_b == 0 or sum_a == 0:
        return OverlapScale(np.nan, np.nan, n, (float(wave[both][0]), float(wave[both][-1])))
    scale = sum_a / sum_b
    err = abs(scale) * np.sqrt(np.sum(var_a[both]) / sum_a ** 2 + np.sum(var_b[both]) / sum_b ** 2)
    return OverlapScale(float(scale), float(err), n, (float(wave[both][0]), float(wave[both][-1])))


def splice(flux_a, var_a, mask_a, flux_b, var_b, mask_b, *, scale_b=1.0):
    """One spectrum from two on the same grid: B scaled by ``scale_b`` onto A, then the
    inverse-variance weighted mean where both have data (each alone elsewhere).

    Returns
    -------
    Combination
    """
    flux = np.vstack([flux_a, np.asarray(flux_b, float) * scale_b])
    var = np.vstack([var_a, np.asarray(var_b, float) * scale_b ** 2])
    mask = np.vstack([mask_a, mask_b])
    return combine_exposures(flux, var, mask, max_iterations=1, min_for_clip=10 ** 9)
