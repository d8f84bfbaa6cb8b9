"""Master bias: block-wise clipped combination, read noise from frame pairs, and the product.

:func:`combine_bias` combines overscan-corrected frames; :func:`assess_read_noise`
decides whether the measured read noise agrees with the configured one;
:func:`master_bias` returns everything the master-bias file holds (pixels in the
canonical orientation, mask, header cards, QA rows), so the rule's adapter only
reads and writes.
"""

import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from pipeline.core.errors import CalibrationError, CalibrationQualityWarning
from pipeline.core.maskbits import MASK_DTYPE, MaskBit
from pipeline.ccd.cards import finite_or
from pipeline.ccd.screening import PixelStatistics, pixel_problem, pixel_statistics
from pipeline.ccd.stacking import (NoiseModel, block_rows_for, clipped_mean,
                                   pair_difference_std, robust_std)

__all__ = ["BiasCombination", "combine_bias", "ReadNoiseCheck", "assess_read_noise",
           "MasterBias", "master_bias"]

#: rows used for the read-noise measurement (1 in this many)
_RN_ROW_STEP = 4


@dataclass(frozen=True)
class BiasCombination:
    """A master bias.

    Attributes
    ----------
    bias_adu : ndarray, shape (ny, nx), float32, ADU
        Sigma-clipped mean of the overscan-corrected frames (orientation of the inputs).
    variance_adu2 : ndarray, shape (ny, nx), float32, ADU^2
        ``read_noise_adu**2 / n_used``.
    n_used : ndarray, shape (ny, nx), int
        Frames kept at each pixel.
    read_noise_adu : float, ADU
        Read noise measured from differences of frame pairs (nan with one frame).
    info : dict
        ``n_frames``, ``pair_read_noise_adu`` (per pair), ``block_rows``,
        ``n_clipped`` (values rejected), ``mean_level_adu``, ``frame_statistics``
        (:class:`~pipeline.ccd.screening.PixelStatistics` of each input frame).
    """

    bias_adu: np.ndarray
    variance_adu2: np.ndarray
    n_used: np.ndarray
    read_noise_adu: float
    info: dict = field(default_factory=dict)


def combine_bias(frames, *, clip_sigma=3.0, clip_iterations=5, block_rows=128,
                 max_read_noise_pairs=3):
    """Combine bias frames block-wise by a sigma-clipped mean and measure the read noise.

    Parameters
    ----------
    frames : sequence of array-like, each shape (ny, nx), ADU
        Overscan-corrected, trimmed bias frames. Anything with ``shape`` and
        row slicing ``frame[r0:r1]`` works (e.g. lazy readers of FITS files),
        so only ``block_rows`` rows of each frame are in memory at a time.
    clip_sigma : float
        Values farther than ``clip_sigma`` times the read noise from a pixel's
        centre are rejected.
    clip_iterations : int
        Maximum clipping iterations for pixels with outliers.
    block_rows : int
        Rows combined at a time (lowered so that the block stack stays below
        64 MiB whatever the number of frames).
    max_read_noise_pairs : int
        Disjoint frame pairs (0-1, 2-3, ...) used to measure the read noise.

    Returns
    -------
    BiasCombination

    Notes
    -----
    The read noise is the robust standard deviation of the difference of two
    frames divided by sqrt(2), after removing each row's median difference
    (overscan-level noise would otherwise add to it); fixed bias structure
    cancels in the difference. Each pair's variance is accumulated over all
    blocks; the result is the median over pairs. The clipping threshold is
    ``clip_sigma`` times the read noise of the first pair, measured in a first
    pass over those two frames, so the result does not depend on ``block_rows``.

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> stack = (100 + 3 * rng.standard_normal((5, 64, 64))).astype(np.float32)
    >>> round(combine_bias(list(stack)).read_noise_adu, 1)
    3.0
    """
    frames = list(frames)
    if not frames:
        raise CalibrationError("no bias frame to combine")
    shape = tuple(frames[0].shape)
    for i, f in enumerate(frames):
        if tuple(f.shape) != shape:
            raise CalibrationError(f"bias frame {i} has shape {tuple(f.shape)}, expected {shape}")
    n = len(frames)
    # at most STACK_BYTES of stack at a time, so memory stays flat for any number of frames
    block = block_rows_for(block_rows, n, shape[1])
    pairs = [(i, i + 1) for i in range(0, n - 1, 2)][:max(int(max_read_noise_pairs), 0)]
    pair_ss = np.zeros(len(pairs))
    pair_count = np.zeros(len(pairs))

    def accumulate(j, a_rows, b_rows):
        # every _RN_ROW_STEP-th row: millions of pixels per pair are still measured
        a_rows, b_rows = a_rows[::_RN_ROW_STEP], b_rows[::_RN_ROW_STEP]
        std = pair_difference_std(a_rows, b_rows) / math.sqrt(2)
        if math.isfinite(std):
            pair_ss[j] += std ** 2 * a_rows.size
            pair_count[j] += a_rows.size

    # pass 0: the first pair alone sets the clipping threshold, so the result does not
    # depend on the block size (reads two frames, block by block)
    noise = None
    if pairs:
        pieces = []
        for r0 in range(0, shape[0], block):
            r1 = min(r0 + block, shape[0])
            first = np.asarray(frames[0][r0:r1], np.float32)
            rows = np.arange(r0, r1) % _RN_ROW_STEP == 0      # the same rows whatever the block
            d = first[rows] - np.asarray(frames[1][r0:r1], np.float32)[rows]
            pieces.append(d - np.median(d, axis=1, keepdims=True))
        std = robust_std(np.concatenate(pieces)) / math.sqrt(2)
        if math.isfinite(std) and std > 0:
            pair_ss[0], pair_count[0] = std ** 2, 1.0
            noise = NoiseModel(std)
    out = np.empty(shape, dtype=np.float32)
    used = np.empty(shape, dtype=np.int32)
    stack = np.empty((n, min(block, shape[0]), shape[1]), dtype=np.float32)
    stats = [PixelStatistics(0, 0, 0, np.inf, -np.inf)] * n
    for r0 in range(0, shape[0], block):
        r1 = min(r0 + block, shape[0])
        s = stack[:, : r1 - r0]
        for i, f in enumerate(frames):
            s[i] = f[r0:r1]
            stats[i] = stats[i] + pixel_statistics(s[i])
        for j, (a, b) in enumerate(pairs[1:], start=1):
            accumulate(j, s[a], s[b])
        out[r0:r1], used[r0:r1] = clipped_mean(s, sigma=clip_sigma, maxiters=clip_iterations,
                                                noise=noise)
    pair_rn = [math.sqrt(ss / c) for ss, c in zip(pair_ss, pair_count) if c > 0]
    read_noise = float(np.median(pair_rn)) if pair_rn else math.nan
    var_scale = read_noise ** 2 if math.isfinite(read_noise) else np.nan
    with np.errstate(divide="ignore", invalid="ignore"):
        variance = (var_scale / used).astype(np.float32)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)      # all-NaN output (a bad frame)
        mean_level = float(np.nanmean(out))
    info = {"n_frames": n, "pair_read_noise_adu": pair_rn, "block_rows": block,
            "n_clipped": int(n * used.size - used.sum()), "mean_level_adu": mean_level,
            "frame_statistics": stats}
    return BiasCombination(out, variance, used, read_noise, info)



@dataclass(frozen=True)
class ReadNoiseCheck:
    """The measured read noise against the configured one.

    Attributes
    ----------
    measured_adu : float, ADU
        nan when not measured (a single frame).
    measured_e : float, electron
        ``measured_adu`` times the configured gain.
    configured_e : float, electron
    tolerance : float
        Relative tolerance.
    within_tolerance : bool
    message : str
        Why the configured value will be used ('' when the measurement agrees).
    """

    measured_adu: float
    measured_e: float
    configured_e: float
    tolerance: float
    within_tolerance: bool
    message: str = ""


def assess_read_noise(measured_adu, *, gain_e_per_adu, configured_e, tolerance, n_frames=0):
    """Compare a measured read noise (ADU) with the configured one (electron).

    Examples
    --------
    >>> assess_read_noise(2.0, gain_e_per_adu=1.5, configured_e=3.1, tolerance=0.2).within_tolerance
    True
    >>> assess_read_noise(float("nan"), gain_e_per_adu=1.5, configured_e=3.1, tolerance=0.2,
    ...                   n_frames=1).message
    'read noise not measured (1 bias frame); the configured 3.100 e- will be used'
    """
    measured_e = measured_adu * gain_e_per_adu
    ok = bool(math.isfinite(measured_e) and abs(measured_e / configured_e - 1) <= tolerance)
    if not math.isfinite(measured_e):
        message = (f"read noise not measured ({n_frames} bias frame); the configured "
                   f"{configured_e:.3f} e- will be used")
    elif not ok:
        message = (f"measured read noise {measured_e:.3f} e- (with gain {gain_e_per_adu} e-/ADU) "
                   f"differs from the configured {configured_e:.3f} e- by "
                   f"{100 * (measured_e / configured_e - 1):+.1f}% (tolerance "
                   f"{100 * tolerance:.0f}%); the configured value will be used")
    else:
        message = ""
    return ReadNoiseCheck(float(measured_adu), float(measured_e), float(configured_e),
                          float(tolerance), ok, message)


@dataclass(frozen=True)
class MasterBias:
    """Everything the master-bias product holds.

    Attributes
    ----------
    data_adu, variance_adu2 : ndarray, shape (ny, nx), float32, canonical
    mask : ndarray, shape (ny, nx), uint8
        BAD_PIXEL where fewer than half the frames survived; NONFINITE.
    cards : list of (keyword, value, comment)
        The master-bias header cards (``NFRAMES``, ``RNMEAS``, ...).
    check : ReadNoiseCheck
    combination : BiasCombination
        Orientation of the inputs (raw).
    used_names : list of str
        The frames combined (those holding data).
    """

    data_adu: np.ndarray
    variance_adu2: np.ndarray
    mask: np.ndarray
    cards: list
    check: ReadNoiseCheck
    combination: BiasCombination
    used_names: list


def master_bias(frames, *, orientation, gain_e_per_adu, read_noise_e, clip_sigma=3.0,
                clip_iterations=5, block_rows=128, read_noise_tolerance=0.2,
                max_read_noise_pairs=3, names=None, name="master bias"):
    """Master bias from overscan-corrected, trimmed frames (raw orientation).

    Parameters
    ----------
    frames : sequence of array-like, shape (ny, nx), ADU
        See :func:`combine_bias` (row-sliceable readers keep memory flat).
    orientation : pipeline.ccd.geometry.Orientation
    gain_e_per_adu, read_noise_e : float
        Configured gain and read noise.
    read_noise_tolerance : float
        Relative tolerance of the measured read noise.
    names : sequence of str, optional
        Names of the frames (messages; default ``bias frame <i>``).
    name : str
        Names the product in warnings (``CalibrationQualityWarning`` when the read noise
        is not measured or out of tolerance, or when a frame holds no data and is left out).

    Raises
    ------
    CalibrationError
        When no frame holds data (:func:`~pipeline.ccd.screening.pixel_problem`).

    Returns
    -------
    MasterBias
    """
    frames = list(frames)
    names = list(names) if names is not None else [f"bias frame {i}" for i in range(len(frames))]
    options = dict(clip_sigma=clip_sigma, clip_iterations=clip_iterations, block_rows=block_rows,
                   max_read_noise_pairs=max_read_noise_pairs)
    result = combine_bias(frames, **options)
    problems = [(i, pixel_problem(st, what="bias frame"))
                for i, st in enumerate(result.info["frame_statistics"])]
    problems = [(i, text) for i, text in problems if text]
    if problems:
        if len(problems) == len(frames):
            raise CalibrationError(f"{name}: no usable bias frame: " + "; ".join(
                f"{names[i]}: {text}" for i, text in problems)
                + "; expected bias frames with data: copy them again from the telescope")
        for i, text in problems:
            warnings.warn(f"{name}: {names[i]} left out: {text}", CalibrationQualityWarning)
        bad = {i for i, _ in problems}
        frames = [f for i, f in enumerate(frames) if i not in bad]
        names = [nm for i, nm in enumerate(names) if i not in bad]
        result = combine_bias(frames, **options)
    check = assess_read_noise(result.read_noise_adu, gain_e_per_adu=gain_e_per_adu,
                              configured_e=read_noise_e, tolerance=float(read_noise_tolerance),
                              n_frames=len(frames))
    if check.message:
        warnings.warn(f"{name}: {check.message}", CalibrationQualityWarning)
    used = orientation.apply(result.n_used)
    mask = np.where(used < max(1, len(frames) / 2), MASK_DTYPE(MaskBit.BAD_PIXEL),
                    0).astype(MASK_DTYPE)
    data = np.ascontiguousarray(orientation.apply(result.bias_adu))
    nonfinite = ~np.isfinite(data)
    mask[nonfinite] |= MASK_DTYPE(MaskBit.NONFINITE)
    variance = np.ascontiguousarray(orientation.apply(result.variance_adu2))
    if not np.isfinite(variance).all():
        variance = np.where(np.isfinite(variance), variance, np.float32(
            (read_noise_e / gain_e_per_adu) ** 2)).astype(np.float32)
    cards = [
        ("NFRAMES", len(frames), "bias frames combined"),
        ("NLEFTOUT", len(problems), "bias frames left out (no data)"),
        ("RNMEAS", finite_or(result.read_noise_adu), "ADU measured read noise (pairs)"),
        ("RNMEASE", finite_or(check.measured_e), "e- measured read noise, configured gain"),
        ("RNCONF", read_noise_e, "e- configured read noise"),
        ("GAINCONF", gain_e_per_adu, "e-/ADU configured gain"),
        ("RNOK", check.within_tolerance, "RNMEASE within RNTOL of RNCONF"),
        ("RNTOL", check.tolerance, "relative read-noise tolerance"),
        ("BIASLEV", result.info["mean_level_adu"], "ADU mean residual level"),
    ]
    return MasterBias(np.where(nonfinite, 0, data).astype(np.float32), variance, mask, cards,
                      check, result, names)
