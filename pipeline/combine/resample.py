"""Flux-conserving resampling of a 1-D spectrum onto another grid, with its variance, mask
and the covariance it creates between neighbouring output pixels.

The resampling is exact integration of a piecewise-constant spectrum: each input pixel
spreads its flux density uniformly over its own width, and an output pixel receives the
average density over its width, i.e. ``f_out = W f_in`` with ``W[j, i]`` = (overlap of
output pixel j with input pixel i) / (width of output pixel j). The integral of the
spectrum over any range of whole output pixels equals that over the input (flux is
conserved), and the variance follows as ``var_out = W**2 var_in`` for the diagonal,
the full covariance being ``W diag(var_in) W.T``. Its ratio of the variance of a long
sum to the sum of the pixel variances (:func:`covariance_factor`) is what a user must
apply when binning or integrating, as ``VARCORR`` for the rectified frames.

Examples
--------
>>> import numpy as np
>>> old = np.array([0.0, 1.0, 2.0, 3.0])
>>> new = np.array([0.5, 1.5, 2.5])
>>> w = resampling_matrix(old, new)
>>> w.toarray()
array([[0.5, 0.5, 0. ],
       [0. , 0.5, 0.5]])
"""

from dataclasses import dataclass

import numpy as np
from scipy import sparse

from pipeline.core.checks import as_1d_float
from pipeline.core.maskbits import MASK_DTYPE, MaskBit

__all__ = ["Resampled", "resampling_matrix", "resample", "covariance_factor"]


@dataclass(frozen=True)
class Resampled:
    """A spectrum on a new grid.

    Attributes
    ----------
    flux : ndarray, shape (n,)
        Mean flux density over each output pixel (same unit as the input density).
    variance : ndarray, shape (n,)
        Diagonal of the output covariance.
    mask : ndarray of uint8, shape (n,)
        OR of the bits of every input pixel that overlaps the output pixel; output
        pixels not fully covered by input pixels get ``no_coverage_bit``.
    coverage : ndarray, shape (n,)
        Fraction of the output pixel's width covered by input pixels.
    covariance_factor : float
        See :func:`covariance_factor`.
    """

    flux: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    coverage: np.ndarray
    covariance_factor: float


def _edges(edges, name):
    edges = as_1d_float(edges, name)
    if edges.size < 2 or not np.all(np.diff(edges) > 0):
        raise ValueError(f"`{name}` must be at least 2 strictly increasing pixel edges")
    return edges


def resampling_matrix(old_edges, new_edges):
    """Sparse matrix W (n_new, n_old) of overlap fractions per output width.

    Parameters
    ----------
    old_edges : ndarray, shape (n_old + 1,)
    new_edges : ndarray, shape (n_new + 1,)
        Pixel edges, strictly increasing, same unit.
    """
    old = _edges(old_edges, "old_edges")
    new = _edges(new_edges, "new_edges")
    rows, cols, vals = [], [], []
    # for every output pixel, the range of input pixels that can overlap it
    first = np.clip(np.searchsorted(old, new[:-1], side="right") - 1, 0, old.size - 2)
    last = np.clip(np.searchsorted(old, new[1:], side="left") - 1, 0, old.size - 2)
    width_new = np.diff(new)
    for j in range(new.size - 1):
        i = np.arange(first[j], last[j] + 1)
        overlap = np.minimum(old[i + 1], new[j + 1]) - np.maximum(old[i], new[j])
        keep = overlap > 0
        rows.append(np.full(int(keep.sum()), j))
        cols.append(i[keep])
        vals.append(overlap[keep] / width_new[j])
    return sparse.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                             shape=(new.size - 1, old.size - 1))


def covariance_factor(matrix, variance, *, span=None):
    """Variance of a long sum of output pixels over the sum of their variances.

    ``sum(C) / trace(C)`` over the pixels with data, ``C = W diag(var) W.T``; 1 when the
    output pixels are independent (e.g. a pure shift by whole pixels), about 1.3-1.5 when
    pixels of similar width are resampled with arbitrary phase.

    Parameters
    ----------
    matrix : scipy.sparse matrix (n_new, n_old)
    variance : ndarray, shape (n_old,)
        Input variances (non-finite or masked: give 0).
    span : slice, optional
        Output pixels to sum over (default: all).
    """
    var = np.where(np.isfinite(variance), variance, 0.0)
    w = matrix if span is None else matrix[span]
    weighted = w.multiply(np.sqrt(var)[None, :]).tocsr()
    total = float(np.sum(np.asarray(weighted.sum(axis=0)).ravel() ** 2))
    diagonal = float(weighted.multiply(weighted).sum())
    return total / diagonal if diagonal > 0 else 1.0


def resample(flux, variance, mask, old_edges, new_edges):
    """Resample a flux density with its variance and mask onto new pixel edges.

    Parameters
    ----------
    flux : ndarray, shape (n_old,)
        Flux density (per unit of the edges' axis: per Angstrom for Angstrom edges).
    variance : ndarray, shape (n_old,)
    mask : ndarray of uint8, shape (n_old,)
        Bits of :mod:`pipeline.core.maskbits`; they spread to every output pixel the input
        pixel overlaps (flux and variance are resampled as they are: the caller decides
        what a masked pixel weighs).
    old_edges, new_edges : ndarray
        Pixel edges, shapes (n_old + 1,), (n_new + 1,).

    Notes
    -----
    Output pixels not fully covered by input pixels get NO_COVERAGE; non-finite input
    values count as zero flux with NONFINITE set.

    Returns
    -------
    Resampled
    """
    flux = as_1d_float(flux, "flux")
    variance = as_1d_float(variance, "variance")
    mask = np.asarray(mask)
    if not (flux.shape == variance.shape == mask.shape) or flux.size != np.size(old_edges) - 1:
        raise ValueError(f"`flux`, `variance`, `mask` must have shape ({np.size(old_edges) - 1},) "
                         f"like the input pixels, got {flux.shape}, {variance.shape}, {mask.shape}")
    w = resampling_matrix(old_edges, new_edges)
    coverage = np.asarray(w.sum(axis=1)).ravel()
    bad = ~np.isfinite(flux) | ~np.isfinite(variance)
    out_flux = w @ np.where(bad, 0.0, flux)
    out_var = (w.multiply(w)) @ np.where(bad, 0.0, variance)
    full = coverage > 1.0 - 1e-9
    with np.errstate(invalid="ignore", divide="ignore"):
        out_flux = np.where(coverage > 0, out_flux / np.where(coverage > 0, coverage, 1.0), np.nan)
        out_var = np.where(coverage > 0, out_var / np.where(coverage > 0, coverage, 1.0) ** 2,
                           np.nan)
    bits = mask.astype(MASK_DTYPE) | np.where(bad, MASK_DTYPE(MaskBit.NONFINITE), MASK_DTYPE(0))
    out_mask = np.zeros(w.shape[0], dtype=MASK_DTYPE)
    coo = w.tocoo()
    np.bitwise_or.at(out_mask, coo.row, bits[coo.col])
    out_mask[~full] |= MASK_DTYPE(MaskBit.NO_COVERAGE)
    factor = covariance_factor(w[full] if full.any() else w, np.where(bad, 0.0, variance))
    return Resampled(out_flux, out_var, out_mask, coverage, factor)
