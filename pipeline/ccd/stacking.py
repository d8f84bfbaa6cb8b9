"""Sigma-clipped combination of frame stacks (shared by the master bias and flat) and robust noise figures.

The stacks are combined a block of rows at a time (at most :data:`STACK_BYTES` of
stack in memory), so memory does not grow with the number of frames.
"""

import math
import warnings
from dataclasses import dataclass

import numpy as np

__all__ = ["NoiseModel", "clipped_mean", "robust_std", "pair_difference_std",
           "block_rows_for", "STACK_BYTES", "TRUNCATION_4SIGMA"]

#: largest block stack (bytes); block_rows is lowered for many or long frames
STACK_BYTES = 64 * 2 ** 20


def block_rows_for(block_rows, n_frames, nx):
    """Rows per block: ``block_rows``, lowered so that ``n_frames`` float32 rows of ``nx``
    pixels stay within :data:`STACK_BYTES` (at least one row).

    >>> block_rows_for(128, 25, 4096)
    128
    >>> block_rows_for(128, 100, 4096)
    40
    """
    return max(min(int(block_rows), STACK_BYTES // (4 * int(n_frames) * int(nx))), 1)


@dataclass(frozen=True)
class NoiseModel:
    """Expected per-frame noise (ADU) of values near ``center`` (ADU / scale)."""

    read_noise_adu: float
    gain_e_per_adu: float = None   # None: read noise only
    scales: np.ndarray = None      # (n,) frames were divided by these

    def sigma(self, center, n):
        scales = np.ones(n) if self.scales is None else np.asarray(self.scales, float)
        shape = (n,) + (1,) * np.ndim(center)
        s = scales.reshape(shape).astype(np.float32)
        var = np.float32(self.read_noise_adu ** 2)
        if self.gain_e_per_adu:
            var = var + np.maximum(center * s, 0) / np.float32(self.gain_e_per_adu)
        return np.sqrt(var) / s


def _median_columns(sub, valid):
    """Median along axis 0; NaN-aware only for the columns that need it (faster)."""
    center = np.median(np.where(valid, sub, 0), axis=0)
    partial = ~valid.all(axis=0)
    if partial.any():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            center[partial] = np.nanmedian(np.where(valid[:, partial], sub[:, partial], np.nan),
                                           axis=0)
    return center


def _clip_columns(sub, *, sigma, maxiters, noise):
    """Iterative sigma clipping of ``sub`` (n, k); mean of the survivors.

    The first pass is centred on the median (robust against several
    outliers), later passes on the mean of the values kept, as the result is.
    The spread is the noise model's when given, else the MAD-based standard
    deviation about the median, then the standard deviation of the kept values.
    """
    valid = np.isfinite(sub)
    n = sub.shape[0]
    center = _median_columns(sub, valid)
    keep = valid
    for iteration in range(max(int(maxiters), 1)):
        dev = np.abs(sub - center[None, :])
        if noise is not None:
            spread = noise.sigma(center, n)
        elif iteration == 0:
            spread = 1.4826 * _median_columns(dev, valid)[None, :]
        else:
            k = np.maximum(keep.sum(axis=0), 2)
            spread = np.sqrt(np.where(keep, dev ** 2, 0).sum(axis=0) / (k - 1))[None, :]
        new_keep = valid & (dev <= sigma * spread)
        # never reject everything: keep what was valid then
        empty = ~new_keep.any(axis=0)
        if empty.any():
            new_keep[:, empty] = valid[:, empty]
        n_used = new_keep.sum(axis=0)
        total = np.where(new_keep, sub, 0).sum(axis=0, dtype=np.float64)
        with np.errstate(invalid="ignore", divide="ignore"):
            center = (total / n_used).astype(np.float32)
        if iteration > 0 and np.array_equal(new_keep, keep):
            break
        keep = new_keep
    return center, keep.sum(axis=0)


def clipped_mean(stack, *, sigma=3.0, maxiters=5, noise=None):
    """Sigma-clipped mean along axis 0 of a (n, ny, nx) float32 stack.

    Fast path: pixels with no value farther than ``sigma`` times the noise
    from the mean of the other n-2 values (minimum and maximum left out) take
    the plain mean. With a noise model, pixels with exactly one such value
    take the mean of the others when all of them lie within the threshold of
    that mean (converged). The few remaining pixels (several outliers,
    non-finite values) are clipped iteratively, starting about their median
    (:func:`_clip_columns`). With a noise model the threshold is ``sigma``
    times the expected noise; without one it is ``sigma`` times the sample
    standard deviation.

    Returns
    -------
    mean : ndarray (ny, nx), float32
    n_used : ndarray (ny, nx), int
    """
    n = stack.shape[0]
    if n == 1:
        return stack[0].astype(np.float32), np.isfinite(stack[0]).astype(np.int32)
    total = stack.sum(axis=0, dtype=np.float32)
    finite = np.isfinite(total)          # a NaN or inf anywhere in the column spoils the sum
    lo = stack.min(axis=0)
    hi = stack.max(axis=0)
    if n >= 3:
        center = (total - lo - hi) / np.float32(n - 2)
    else:
        center = total / np.float32(n)
    if noise is None:
        if n >= 4:
            dev = stack - center
            ss = np.einsum("i...,i...->...", dev, dev)
            ss -= (lo - center) ** 2 + (hi - center) ** 2
            spread = np.sqrt(np.maximum(ss, 0) / np.float32(n - 3))[None]
            del dev
        else:
            spread = None
    else:
        spread = noise.sigma(center, n)
    if spread is None:
        suspect = ~finite
    elif noise is not None and noise.scales is None:
        # the same noise for every frame: only the extremes can exceed the threshold
        limit = np.float32(sigma) * spread[0]
        suspect = ((hi - center) > limit) | ((center - lo) > limit) | ~finite
    else:
        dev = np.abs(stack - center)
        suspect = (dev > np.float32(sigma) * spread).any(axis=0) | ~finite
        del dev
        if noise is None:
            # a second outlier inflates the sample spread and hides itself: pixels whose
            # spread is well above the block's typical one take the careful path too
            typical = np.nanmedian(spread)
            suspect |= spread[0] > 2.0 * typical
    mean = total / np.float32(n)
    n_used = np.full(mean.shape, n, dtype=np.int32)
    if suspect.any():
        idx = np.nonzero(suspect)
        sub = stack[(slice(None),) + idx]
        careful = np.ones(sub.shape[1], bool)
        if noise is not None and n >= 4:
            # Most suspects hold one value beyond the threshold (a Gaussian tail or a
            # single hit). Drop it; keep the result when every remaining value lies
            # within the threshold of the new mean (the clipping has converged).
            # Everything else takes the careful median-started path.
            c0 = center[idx]
            limit = np.float32(sigma) * noise.sigma(c0, n)
            out = np.abs(sub - c0) > limit
            single = out.sum(axis=0) == 1
            if single.any():
                s1, o1 = sub[:, single], out[:, single]
                m1 = (np.where(o1, 0, s1).sum(axis=0, dtype=np.float64) / (n - 1)).astype(
                    np.float32)
                lim1 = np.float32(sigma) * noise.sigma(m1, n)
                lim1 = np.broadcast_to(lim1, s1.shape)
                inside = np.abs(s1 - m1) <= lim1
                ok = (inside == ~o1).all(axis=0)
                pos = np.nonzero(single)[0][ok]
                mean[tuple(i[pos] for i in idx)] = m1[ok]
                n_used[tuple(i[pos] for i in idx)] = n - 1
                careful[pos] = False
        if careful.any():
            rest = tuple(i[careful] for i in idx)
            m, k = _clip_columns(sub[:, careful], sigma=sigma, maxiters=maxiters, noise=noise)
            mean[rest] = m
            n_used[rest] = k
    return mean, n_used


def robust_std(values):
    """Gaussian-equivalent std: MAD on a subsample, then a 4-sigma clipped rms.

    The rms of a Gaussian truncated at +-4 sigma is 0.99946 of sigma (analytic);
    the result is divided by that factor.
    """
    v = np.asarray(values, dtype=np.float64).ravel()
    v = v[np.isfinite(v)]
    if v.size < 3:
        return math.nan
    step = max(v.size // 20000, 1)
    sample = v[::step]
    med = np.median(sample)
    mad = 1.4826 * np.median(np.abs(sample - med))
    if mad == 0:
        return 0.0
    kept = v[np.abs(v - med) <= 4.0 * mad]
    center = kept.mean()
    kept = kept[np.abs(kept - center) <= 4.0 * mad]
    rms = math.sqrt(np.mean((kept - kept.mean()) ** 2))
    return rms / TRUNCATION_4SIGMA


# rms of a unit Gaussian truncated at +-4: sqrt(1 - 2*4*phi(4) / (2*Phi(4) - 1)) (analytic)
TRUNCATION_4SIGMA = math.sqrt(1 - 8 * math.exp(-8) / math.sqrt(2 * math.pi)
                               / math.erf(4 / math.sqrt(2)))


def pair_difference_std(a, b):
    """Robust std (ADU) of ``a - b`` after removing each row's median difference."""
    d = np.asarray(a, dtype=np.float64) - np.asarray(b, dtype=np.float64)
    d -= np.median(d, axis=1, keepdims=True)
    return robust_std(d)

