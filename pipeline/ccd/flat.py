"""Master flat: clipped combination of lamp flats, photon-transfer gain, and the product.

:func:`combine_flats` combines bias-subtracted flats (each divided by its level) a
block of rows at a time; :func:`master_flat` measures the gain on pairs of flats,
combines, normalises (:func:`pipeline.ccd.flat_response.normalise_flat`) and returns
everything the master-flat file holds, so the rule's adapter only reads and writes.
"""

import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from pipeline.core.checks import positive
from pipeline.core.errors import CalibrationError, CalibrationQualityWarning
from pipeline.core.maskbits import MASK_DTYPE, MaskBit
from pipeline.ccd.cards import finite_or
from pipeline.ccd.flat_response import normalise_flat
from pipeline.ccd.gain import assess_gain, flat_noise_read_noise_adu, measure_gain
from pipeline.ccd.geometry import known_defects_mask
from pipeline.ccd.screening import MAX_NONFINITE_FRACTION, pixel_problem, pixel_statistics
from pipeline.ccd.stacking import NoiseModel, block_rows_for, clipped_mean

__all__ = ["FlatCombination", "flat_scale", "combine_flats", "flat_problem", "MasterFlat",
           "master_flat",
           "FLAT_QA_COLUMNS"]

_BAD = MASK_DTYPE(MaskBit.BAD_PIXEL)


@dataclass(frozen=True)
class FlatCombination:
    """Combined flat (still holding the lamp spectrum and slit illumination).

    Attributes
    ----------
    flat : ndarray, shape (ny, nx), float32
        Clipped mean of the flats, each divided by its scale (so ~1 at the scale pixels).
    variance : ndarray, shape (ny, nx), float32
        Expected variance of ``flat`` from photon and read noise.
    n_used : ndarray, shape (ny, nx), int
    scales_adu : ndarray, shape (n,), ADU
        The level each flat was divided by.
    info : dict
    """

    flat: np.ndarray
    variance: np.ndarray
    n_used: np.ndarray
    scales_adu: np.ndarray
    info: dict = field(default_factory=dict)


def flat_scale(frame):
    """Robust level of a flat: median of its brighter half of pixels (ADU)."""
    f = frame[np.isfinite(frame)]
    if f.size == 0:
        return math.nan
    step = max(f.size // 200000, 1)
    sample = f[::step]
    cut = np.percentile(sample, 50)
    bright = sample[sample >= cut]
    return float(np.median(bright))


def combine_flats(frames, *, gain_e_per_adu, read_noise_adu, clip_sigma=3.0,
                  clip_iterations=5, block_rows=128, scales_adu=None):
    """Combine bias-subtracted flats by a sigma-clipped mean, block-wise.

    Parameters
    ----------
    frames : sequence of array-like, each shape (ny, nx), ADU
        Bias-subtracted flats; NaN marks pixels not to use (saturated). Row
        slicing ``frame[r0:r1]`` is all that is needed.
    gain_e_per_adu : float, electron / ADU
        For the noise model used in clipping and for the variance.
    read_noise_adu : float, ADU
    scales_adu : sequence of float, optional
        Level of each flat (default: :func:`_flat_scale` of each, reading it whole).

    Returns
    -------
    FlatCombination

    Notes
    -----
    Each flat is divided by its level, so lamp-brightness changes do not
    count as outliers. A value is rejected when it lies farther than
    ``clip_sigma`` times its expected noise ``sqrt(s c / g + RN^2) / s`` from the
    pixel's centre ``c`` (``s`` the frame's scale).
    """
    frames = list(frames)
    if not frames:
        raise CalibrationError("no flat frame to combine")
    shape = tuple(frames[0].shape)
    for i, f in enumerate(frames):
        if tuple(f.shape) != shape:
            raise CalibrationError(f"flat frame {i} has shape {tuple(f.shape)}, expected {shape}")
    gain = positive(gain_e_per_adu, "gain_e_per_adu")
    rn = positive(read_noise_adu, "read_noise_adu", allow_zero=True)
    n = len(frames)
    if scales_adu is None:
        scales_adu = [flat_scale(np.asarray(f[0:shape[0]], dtype=np.float32)) for f in frames]
    scales = np.asarray(scales_adu, dtype=np.float64)
    if not np.all(np.isfinite(scales) & (scales > 0)):
        raise CalibrationError(f"flat levels must be > 0, got {scales.tolist()} ADU; "
                               "expected lamp-illuminated frames")
    noise = NoiseModel(rn, gain, scales)
    block = block_rows_for(block_rows, n, shape[1])
    out = np.empty(shape, dtype=np.float32)
    var = np.empty(shape, dtype=np.float32)
    used = np.empty(shape, dtype=np.int32)
    stack = np.empty((n, min(block, shape[0]), shape[1]), dtype=np.float32)
    for r0 in range(0, shape[0], block):
        r1 = min(r0 + block, shape[0])
        s = stack[:, : r1 - r0]
        for i, f in enumerate(frames):
            s[i] = np.asarray(f[r0:r1], dtype=np.float32) / np.float32(scales[i])
        mean, k = clipped_mean(s, sigma=clip_sigma, maxiters=clip_iterations, noise=noise)
        sig = noise.sigma(np.where(np.isfinite(mean), mean, 0), n)
        with np.errstate(divide="ignore", invalid="ignore"):
            var[r0:r1] = (np.mean(sig ** 2, axis=0) / k).astype(np.float32)
        out[r0:r1], used[r0:r1] = mean, k
    info = {"n_frames": n, "scales_adu": scales.tolist(),
            "n_clipped": int(n * used.size - used.sum())}
    return FlatCombination(out, var, used, scales, info)



def flat_problem(stats, level_adu):
    """Why a bias-subtracted flat holds no usable lamp light ('' when it does).

    ``stats``: :func:`~pipeline.ccd.screening.pixel_statistics` of the flat, whose
    saturated pixels are NaN; ``level_adu``: :func:`flat_scale`.

    >>> from pipeline.ccd.screening import PixelStatistics
    >>> flat_problem(PixelStatistics(100, 0, 0, -3.0, 4.0), -0.5)
    'no lamp light: level -0.5 ADU above the bias'
    """
    text = pixel_problem(stats, what="flat")
    if text and stats.n_nonfinite > MAX_NONFINITE_FRACTION * stats.n:
        return text + "; saturated pixels count here"
    if not text and not level_adu > 0:
        text = f"no lamp light: level {level_adu:.3g} ADU above the bias"
    return text


#: columns of the master-flat QA table: a row per flat (kind 'frame': its level) and per
#: gain pair (kind 'pair': the mean signal of the tiles used, the pair's gain and tiles)
FLAT_QA_COLUMNS = ["kind", "frame", "level_adu", "n_saturated", "pair_with",
                   "pair_gain_e_per_adu", "pair_tiles"]


@dataclass(frozen=True)
class MasterFlat:
    """Everything the master-flat product holds.

    Attributes
    ----------
    response, variance : ndarray, shape (ny, nx), float32, canonical
    mask : ndarray, shape (ny, nx), uint8
    lamp_shape : ndarray, shape (nx,)
        Smooth lamp spectrum divided out.
    cards : list of (keyword, value, comment)
    qa_rows : list of tuple
        Rows of the QA table (:data:`FLAT_QA_COLUMNS`).
    qa_meta : dict
    info : dict
        ``gain`` (:class:`~pipeline.ccd.gain.GainCheck`), ``n_bad``, ``n_known_defects``,
        ``n_unilluminated``.
    """

    response: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    lamp_shape: np.ndarray
    cards: list
    qa_rows: list
    qa_meta: dict
    info: dict = field(default_factory=dict)


def master_flat(frames, *, names, layout, bias_mask, bias_read_noise_adu, gain_e_per_adu,
                read_noise_e, clip_sigma=3.0, clip_iterations=5, block_rows=128,
                lamp_knot_spacing_px=40.0, keep_slit_illumination=False, illumination_bin_px=64,
                illumination_knot_spacing_px=5.0, min_slit_illumination=0.3, min_flat_snr=20.0,
                min_response=0.5, max_response=1.5, deviant_sigma=6.0, gain_tile_px=32,
                gain_tolerance=0.2, bad_pixel_sections=(), name="master flat"):
    """Master flat of one setup from bias-subtracted flats (raw orientation).

    Parameters
    ----------
    frames : sequence of array-like, shape (ny, nx), ADU
        Overscan- and bias-corrected flats, NaN at saturated pixels; ``frame[r0:r1]``
        row slicing and ``shape`` are all that is used (lazy readers keep memory low).
    names : sequence of str
        File names of the flats (QA table).
    layout : pipeline.ccd.geometry.FrameLayout
        Orientation and binning of the frames.
    bias_mask : ndarray of uint8, canonical
        The master bias's mask (its BAD_PIXEL bits are kept).
    bias_read_noise_adu : float
        ``RNMEAS`` of the master bias (<= 0 when not measured).
    gain_e_per_adu, read_noise_e : float
        Configured gain and read noise.
    Other keywords
        The ``flat`` config section (:func:`combine_flats`, :func:`normalise_flat`,
        :func:`~pipeline.ccd.gain.measure_gain`, :func:`~pipeline.ccd.geometry.known_defects_mask`).

    Returns
    -------
    MasterFlat

    Notes
    -----
    Flats are paired by level (sorted, neighbours paired) for the photon-transfer gain;
    the median of the pair gains is compared with the configured gain
    (:func:`~pipeline.ccd.gain.assess_gain`) and used for the noise model of the
    combination when within ``gain_tolerance``.
    """
    frames = list(frames)
    rn_adu = flat_noise_read_noise_adu(bias_read_noise_adu, configured_e=read_noise_e,
                                       configured_gain_e_per_adu=gain_e_per_adu)
    names = list(names)
    # pass 1: each flat whole (one at a time, two for the gain pairs); flats without data
    # (screening.pixel_problem, or no lamp light above the bias) are left out
    levels, n_sat, problems = [], [], []
    for i, f in enumerate(frames):
        frame = f[0:f.shape[0]]
        levels.append(flat_scale(frame))
        n_sat.append(int(np.isnan(frame).sum()))
        text = flat_problem(pixel_statistics(frame), levels[-1])
        if text:
            problems.append((i, text))
        del frame
    if problems:
        if len(problems) == len(frames):
            raise CalibrationError(f"{name}: no usable flat: " + "; ".join(
                f"{names[i]}: {text}" for i, text in problems)
                + "; expected lamp flats with data: copy them again from the telescope")
        for i, text in problems:
            warnings.warn(f"{name}: {names[i]} left out: {text}", CalibrationQualityWarning)
        bad = {i for i, _ in problems}
        keep = [i for i in range(len(frames)) if i not in bad]
        frames, names = [frames[i] for i in keep], [names[i] for i in keep]
        levels, n_sat = [levels[i] for i in keep], [n_sat[i] for i in keep]
    order = np.argsort(levels)
    pair_gains, pair_rows = [], []
    for j in range(0, len(order) - 1, 2):
        a, b = int(order[j]), int(order[j + 1])
        fa, fb = frames[a][0:frames[a].shape[0]], frames[b][0:frames[b].shape[0]]
        bad = ~np.isfinite(fa) | ~np.isfinite(fb)
        fa, fb = np.where(bad, 0, fa), np.where(bad, 0, fb)
        g = measure_gain(fa, fb, read_noise_adu=rn_adu, tile_px=gain_tile_px, mask=bad)
        del fa, fb, bad
        pair_gains.append(g.gain_e_per_adu)
        pair_rows.append((names[a], names[b], g.gain_e_per_adu, g.info.get("n_tiles", 0),
                          g.info.get("mean_signal_adu", math.nan)))
    check = assess_gain(pair_gains, configured_e_per_adu=gain_e_per_adu,
                        tolerance=float(gain_tolerance))
    if check.message:
        warnings.warn(f"{name}: {check.message}", CalibrationQualityWarning)
    comb = combine_flats(frames, gain_e_per_adu=check.for_noise_model_e_per_adu,
                         read_noise_adu=rn_adu, clip_sigma=clip_sigma,
                         clip_iterations=clip_iterations, block_rows=block_rows,
                         scales_adu=levels)
    orient = layout.orientation
    resp = normalise_flat(
        np.ascontiguousarray(orient.apply(comb.flat)),
        np.ascontiguousarray(orient.apply(comb.variance)),
        lamp_knot_spacing_px=lamp_knot_spacing_px,
        keep_slit_illumination=keep_slit_illumination, illumination_bin_px=illumination_bin_px,
        illumination_knot_spacing_px=illumination_knot_spacing_px,
        min_slit_illumination=min_slit_illumination, min_flat_snr=min_flat_snr,
        min_response=min_response, max_response=max_response, deviant_sigma=deviant_sigma)
    mask = resp.mask | (np.asarray(bias_mask, MASK_DTYPE) & _BAD)
    defects = known_defects_mask(list(bad_pixel_sections or []), layout)
    mask[defects] |= _BAD
    response = np.where(defects, np.float32(1), resp.response).astype(np.float32)
    variance = np.where(defects, np.float32(0), resp.variance).astype(np.float32)
    gain_meas = check.measured_e_per_adu
    n_bad = int(((mask & _BAD) != 0).sum())
    cards = [
        ("NFRAMES", len(frames), "flat frames combined"),
        ("NLEFTOUT", len(problems), "flat frames left out (no data)"),
        ("GAINMEAS", finite_or(gain_meas), "e-/ADU measured gain (photon transfer)"),
        ("GAINCONF", gain_e_per_adu, "e-/ADU configured gain"),
        ("GAINOK", check.within_tolerance, "measured gain within tolerance"),
        ("RNADU", rn_adu, "ADU read noise used for the flat noise model"),
        ("FLATNORM", resp.info["norm"], "normalisation of the response"),
        ("FLATILLU", bool(keep_slit_illumination), "slit illumination kept"),
        ("NDEFECT", int(defects.sum()), "pixels of flat.bad_pixel_sections"),
    ]
    rows = [("frame", nm, lev, ns, "", math.nan, 0) for nm, lev, ns in zip(names, levels, n_sat)]
    rows += [("pair", a, lev, 0, b, g, nt) for a, b, g, nt, lev in pair_rows]
    meta = {"gain_measured_e_per_adu": finite_or(gain_meas),
            "gain_configured_e_per_adu": gain_e_per_adu,
            "gain_within_tolerance": check.within_tolerance,
            "gain_tolerance": check.tolerance, "read_noise_adu": rn_adu,
            "read_noise_e_measured_gain": finite_or(rn_adu * gain_meas),
            "n_frames": len(frames), "n_bad": n_bad, "n_known_defects": int(defects.sum()),
            "n_unilluminated": resp.info["n_unilluminated"], "norm": resp.info["norm"],
            "response_scatter": resp.info["response_scatter"],
            "illuminated_rows": resp.info["illuminated_rows"], "n_clipped": comb.info["n_clipped"]}
    info = {"gain": check, "n_bad": n_bad, "n_known_defects": int(defects.sum()),
            "n_unilluminated": resp.info["n_unilluminated"]}
    return MasterFlat(response, variance, mask.astype(MASK_DTYPE), resp.lamp_shape, cards, rows,
                      meta, info)
