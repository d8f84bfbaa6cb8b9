"""CCD calibration: overscan, trim, orientation, master bias and flat, gain, variance, cosmic rays.

This is the only module that knows the raw readout. Everything it writes is in
the canonical orientation (numpy axis 1 = dispersion, wavelength increasing
with index; numpy axis 0 = along the slit) and records the way back to raw
pixels in the header:

``ORIENT_T``
    True when the trimmed raw array was transposed (dispersion along raw numpy axis 0).
``ORIENT_X`` / ``ORIENT_Y``
    True when canonical x / y runs opposite to the (transposed) raw order.
``TRIM_X0`` / ``TRIM_Y0``
    0-based raw column / row of the first data-section pixel.

A canonical pixel ``(y, x)`` of an ``(ny, nx)`` frame maps back to raw pixels
as follows: ``a = ny - 1 - y if ORIENT_Y else y``, ``b = nx - 1 - x if ORIENT_X
else x``; then ``(row, col) = (b, a) if ORIENT_T else (a, b)`` within the trimmed
array; add ``TRIM_Y0`` to the row and ``TRIM_X0`` to the column.

Pure functions work on numpy arrays (ADU or electrons as their names say); the
three ``*_file`` adapters read raw FITS, call them and write frames with
:func:`pipeline.core.frames.write_frame`. Master bias and flat are combined in row
blocks, so memory does not grow with the number of frames.

Mask bits (:mod:`pipeline.core.maskbits`) set here: BAD_PIXEL (deviant or dead flat
response, unstable bias), SATURATED (raw value at or above the saturation
level), COSMIC_RAY (van Dokkum 2001), UNILLUMINATED (outside the slit or too
little flat-lamp light), NONFINITE.

Raw keywords that describe the raw pixel grid are wrong after trimming and
reorientation, so no calibrated header carries them (:func:`pipeline.core.headers.is_raw_geometry_keyword`):
FITS WCS keywords of any convention (families indexed by axis, ``CTYPEn``,
``CDi_j``..., and names starting with ``WCS``), any other keyword family
indexed by raw axes (``XXXn`` present for two axes, or a matrix ``XXXi_j``),
names containing ``AXIS``, and section strings ``[x1:x2,y1:y2]``. The binning
keyword (raw axis order) is replaced by ``BINSPEC``/``BINSPAT``, the raw data
section by ``RAWDSEC``, and a raw ``SATURATE`` (ADU) by ``SATURADU``, the
saturation level in ADU that was used.
"""

import re

import logging
import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from pipeline.core import headers as hdr
from pipeline.core.errors import (CalibrationError, CalibrationQualityWarning, ConfigError,
                     InputFileError)
from pipeline.core.maskbits import MASK_DTYPE, MaskBit

__all__ = [
    "Orientation", "OverscanFit", "fit_overscan", "correct_and_trim",
    "BiasCombination", "combine_bias", "GainMeasurement", "measure_gain",
    "FlatCombination", "combine_flats", "FlatResponse", "normalise_flat",
    "find_cosmic_rays", "CalibratedFrame", "calibrate_ccd",
    "make_master_bias_file", "make_master_flat_file", "calibrate_frame_file",
    "OVERSCAN_DEFAULTS", "BIAS_DEFAULTS", "FLAT_DEFAULTS", "CALIBRATION_DEFAULTS",
]

log = logging.getLogger("pipeline.ccd.calibrate")

# mask bits as uint8 scalars, so in-place ORs keep the mask dtype
_BAD = MASK_DTYPE(MaskBit.BAD_PIXEL)
_SAT = MASK_DTYPE(MaskBit.SATURATED)
_CR = MASK_DTYPE(MaskBit.COSMIC_RAY)
_UNLIT = MASK_DTYPE(MaskBit.UNILLUMINATED)
_NONFINITE = MASK_DTYPE(MaskBit.NONFINITE)

#: Defaults of the config sections (the same values as config/schema.yaml).
OVERSCAN_DEFAULTS = {"method": "per_row", "polynomial_order": 3, "smooth_window_rows": 101,
                     "row_statistic": "clipped_mean", "clip_sigma": 3.0}
BIAS_DEFAULTS = {"clip_sigma": 3.0, "clip_iterations": 5, "block_rows": 128,
                 "read_noise_tolerance": 0.2, "max_read_noise_pairs": 3}
FLAT_DEFAULTS = {"clip_sigma": 3.0, "clip_iterations": 5, "block_rows": 128,
                 "lamp_knot_spacing_px": 40.0, "keep_slit_illumination": False,
                 "illumination_bin_px": 64, "illumination_knot_spacing_px": 5.0,
                 "min_slit_illumination": 0.3, "min_flat_snr": 20.0,
                 "min_response": 0.5, "max_response": 1.5, "deviant_sigma": 6.0,
                 "gain_tile_px": 32, "gain_tolerance": 0.2, "bad_pixel_sections": []}
CALIBRATION_DEFAULTS = {"use_measured_gain": True, "use_measured_read_noise": True,
                        "include_flat_error": True,
                        "cosmic_rays": {"enabled": True, "sigclip": 4.5, "sigfrac": 0.3,
                                        "objlim": 5.0, "niter": 2}}

# Keywords of the raw header that describe its storage, not the observation.
_STRUCTURAL = ("SIMPLE", "BITPIX", "NAXIS", "NAXIS1", "NAXIS2", "EXTEND", "BZERO", "BSCALE",
               "BLANK", "PCOUNT", "GCOUNT", "XTENSION", "CHECKSUM", "DATASUM", "BUNIT",
               "EXTNAME")


# ==================================================================================
# argument coercers
# ==================================================================================
def _as_2d_float(array, name):
    a = np.asarray(array)
    if a.ndim != 2:
        raise ValueError(f"`{name}` must be 2-D, got shape {a.shape}")
    return a.astype(np.float32, copy=False)


def _positive(value, name, *, allow_zero=False):
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"`{name}` must be a number, got {value!r}") from None
    if not math.isfinite(v) or v < 0 or (v == 0 and not allow_zero):
        raise ValueError(f"`{name}` must be {'>= 0' if allow_zero else '> 0'}, got {value!r}")
    return v


def _options(given, defaults, section):
    """Merge a config section with its defaults; unknown keys are a ConfigError."""
    given = dict(given or {})
    unknown = sorted(set(given) - set(defaults))
    if unknown:
        raise ConfigError(f"{section}: unknown key(s) {unknown}; expected some of "
                          f"{sorted(defaults)}")
    merged = {**defaults, **given}
    for key, value in defaults.items():
        if isinstance(value, dict):
            sub = dict(given.get(key) or {})
            bad = sorted(set(sub) - set(value))
            if bad:
                raise ConfigError(f"{section}.{key}: unknown key(s) {bad}; expected some of "
                                  f"{sorted(value)}")
            merged[key] = {**value, **sub}
    return merged


# ==================================================================================
# orientation
# ==================================================================================
@dataclass(frozen=True)
class Orientation:
    """How the trimmed raw array maps onto the canonical orientation.

    Parameters
    ----------
    transpose : bool
        Swap the raw numpy axes (dispersion runs along raw numpy axis 0 = FITS axis 2).
    flip_x : bool
        Reverse canonical x (wavelength decreases with raw pixel index).
    flip_y : bool
        Reverse canonical y (never needed by the instruments described so far).

    Examples
    --------
    >>> o = Orientation.from_instrument(dispersion_axis=2, wavelength_increases_with_pixel=False)
    >>> o.apply(np.arange(6).reshape(3, 2))
    array([[4, 2, 0],
           [5, 3, 1]])
    """

    transpose: bool
    flip_x: bool
    flip_y: bool = False

    @classmethod
    def from_instrument(cls, *, dispersion_axis, wavelength_increases_with_pixel):
        """Orientation for a FITS dispersion axis (1 or 2) and its direction."""
        if dispersion_axis not in (1, 2):
            raise ValueError(f"`dispersion_axis` must be 1 or 2 (FITS axis), got "
                             f"{dispersion_axis!r}")
        return cls(transpose=dispersion_axis == 2, flip_x=not bool(wavelength_increases_with_pixel))

    def apply(self, array):
        """Canonical view of a trimmed raw array (or a stack whose last two axes are)."""
        a = np.swapaxes(array, -1, -2) if self.transpose else array
        if self.flip_x:
            a = a[..., ::-1]
        if self.flip_y:
            a = a[..., ::-1, :]
        return a

    def invert(self, array):
        """Trimmed-raw-orientation view of a canonical array (inverse of :meth:`apply`)."""
        a = array
        if self.flip_y:
            a = a[..., ::-1, :]
        if self.flip_x:
            a = a[..., ::-1]
        return np.swapaxes(a, -1, -2) if self.transpose else a

    def canonical_shape(self, raw_shape):
        return tuple(raw_shape[::-1]) if self.transpose else tuple(raw_shape)

    def to_raw(self, y, x, *, shape, trim_y0=0, trim_x0=0):
        """Raw 0-based (row, column) of canonical pixel(s) ``(y, x)`` of a frame of ``shape``."""
        ny, nx = shape
        a = ny - 1 - np.asarray(y) if self.flip_y else np.asarray(y)
        b = nx - 1 - np.asarray(x) if self.flip_x else np.asarray(x)
        row, col = (b, a) if self.transpose else (a, b)
        return row + trim_y0, col + trim_x0

    def header_cards(self, *, trim_y0, trim_x0):
        return [("ORIENT_T", self.transpose, "raw array transposed to canonical"),
                ("ORIENT_X", self.flip_x, "canonical x reversed w.r.t. raw"),
                ("ORIENT_Y", self.flip_y, "canonical y reversed w.r.t. raw"),
                ("TRIM_X0", int(trim_x0), "0-based raw column of first data pixel"),
                ("TRIM_Y0", int(trim_y0), "0-based raw row of first data pixel")]


# ==================================================================================
# overscan
# ==================================================================================
@dataclass(frozen=True)
class OverscanFit:
    """The overscan level fitted along the readout.

    Attributes
    ----------
    level_adu : ndarray, shape (n_rows,), ADU
        Fitted level for each raw row of the overscan section.
    row_level_adu : ndarray, shape (n_rows,), ADU
        The robust per-row statistic the fit was made to.
    rows : slice
        Raw rows (0-based) that ``level_adu`` covers.
    info : dict
        ``method``, ``rms_adu`` (scatter of the row levels about the fit),
        ``n_rejected_rows``, ``mean_adu``.
    """

    level_adu: np.ndarray
    row_level_adu: np.ndarray
    rows: slice
    info: dict = field(default_factory=dict)


def _row_statistic(overscan_adu, statistic, clip_sigma):
    if statistic == "median":
        return np.median(overscan_adu, axis=1).astype(np.float64)
    if statistic == "clipped_mean":
        from astropy.stats import sigma_clip
        clipped = sigma_clip(overscan_adu.astype(np.float64), sigma=clip_sigma, axis=1,
                             maxiters=5, cenfunc="median", stdfunc="std")
        return np.ma.mean(clipped, axis=1).filled(np.nan)
    raise ValueError(f"`row_statistic` must be 'median' or 'clipped_mean', got {statistic!r}")


def fit_overscan(overscan_adu, *, method="per_row", polynomial_order=3,
                 smooth_window_rows=101, row_statistic="clipped_mean", clip_sigma=3.0,
                 first_row=0):
    """Fit the overscan level along the readout.

    The serial overscan holds a few columns at the end (or start) of each raw
    row. The per-row level is a robust statistic across those columns; it is
    then used as is, smoothed along the rows, or fitted by a low-order
    polynomial.

    Parameters
    ----------
    overscan_adu : ndarray, shape (n_rows, n_columns), ADU
        The overscan section of a raw frame.
    method : {'polynomial', 'smooth', 'per_row'}
        'polynomial': Chebyshev series of ``polynomial_order`` in the row index,
        fitted with iterative ``clip_sigma`` rejection of deviant rows.
        'smooth': running median over ``smooth_window_rows`` rows (rejects
        outliers), then a running mean over the same window.
        'per_row': the row statistic itself (noisiest; follows row-to-row jumps).
    polynomial_order : int
    smooth_window_rows : int
        Odd window length in raw rows.
    row_statistic : {'median', 'clipped_mean'}
        Statistic across the overscan columns of each row.
    clip_sigma : float
        Rejection threshold (polynomial fit; clipped mean).
    first_row : int
        0-based raw row of the first overscan row (recorded in ``rows``).

    Returns
    -------
    OverscanFit

    Examples
    --------
    >>> fit = fit_overscan(np.full((50, 8), 100.0), method="polynomial", polynomial_order=1)
    >>> round(float(fit.level_adu.mean()), 6)
    100.0
    """
    ov = np.asarray(overscan_adu, dtype=np.float64)
    if ov.ndim != 2 or ov.shape[1] < 1 or ov.shape[0] < 1:
        raise ValueError("`overscan_adu` must be 2-D with at least one column, got shape "
                         f"{ov.shape}")
    rows = ov.shape[0]
    level_rows = _row_statistic(ov, row_statistic, clip_sigma)
    good = np.isfinite(level_rows)
    if not good.any():
        raise ValueError("`overscan_adu` has no finite value")
    index = np.arange(rows, dtype=np.float64)
    n_rejected = 0
    if method == "per_row":
        level = np.where(good, level_rows, np.nanmedian(level_rows))
    elif method == "smooth":
        from scipy.ndimage import median_filter, uniform_filter1d
        window = int(smooth_window_rows)
        if window < 1:
            raise ValueError(f"`smooth_window_rows` must be >= 1, got {smooth_window_rows!r}")
        window = min(window | 1, rows if rows % 2 else max(rows - 1, 1))
        filled = np.where(good, level_rows, np.nanmedian(level_rows))
        running_median = median_filter(filled, size=window, mode="nearest")
        resid = filled - running_median
        mad = 1.4826 * np.median(np.abs(resid))
        outlier = np.abs(resid) > clip_sigma * max(mad, 1e-12)
        outlier |= ~good
        n_rejected = int(outlier.sum())
        cleaned = np.where(outlier, running_median, filled)
        level = uniform_filter1d(cleaned, size=window, mode="nearest")
    elif method == "polynomial":
        from astropy.modeling import fitting, models
        from astropy.stats import sigma_clip
        order = int(polynomial_order)
        if order < 0:
            raise ValueError(f"`polynomial_order` must be >= 0, got {polynomial_order!r}")
        order = min(order, max(int(good.sum()) - 1, 0))
        model = models.Chebyshev1D(order, domain=[0.0, max(rows - 1.0, 1.0)])
        fitter = fitting.FittingWithOutlierRemoval(fitting.LinearLSQFitter(), sigma_clip,
                                                   niter=5, sigma=clip_sigma)
        fitted, rejected = fitter(model, index[good], level_rows[good])
        n_rejected = int(np.sum(rejected)) + int((~good).sum())
        level = fitted(index)
    else:
        raise ValueError(f"`method` must be 'polynomial', 'smooth' or 'per_row', got {method!r}")
    resid = level_rows[good] - level[good]
    info = {"method": method, "rms_adu": float(np.sqrt(np.mean(resid ** 2))),
            "n_rejected_rows": n_rejected, "mean_adu": float(np.mean(level)),
            "row_statistic": row_statistic, "n_columns": int(ov.shape[1])}
    return OverscanFit(level.astype(np.float64), level_rows, slice(first_row, first_row + rows),
                       info)


def _overscan_level_for_rows(fit, data_rows):
    """The fitted level for the raw rows ``data_rows`` (a slice)."""
    if fit is None:
        return None
    if data_rows.start < fit.rows.start or data_rows.stop > fit.rows.stop:
        raise ValueError(f"the data section rows {data_rows.start + 1}..{data_rows.stop} "
                         f"are not all covered by the overscan rows {fit.rows.start + 1}.."
                         f"{fit.rows.stop}; expected a serial overscan beside every data row")
    return fit.level_adu[data_rows.start - fit.rows.start:data_rows.stop - fit.rows.start]


def correct_and_trim(raw_adu, *, data_section, overscan_section=None, orientation=None,
                     overscan_options=None):
    """Subtract the overscan level, trim to the data section, orient canonically.

    Parameters
    ----------
    raw_adu : ndarray, shape (ny_raw, nx_raw), ADU
        The raw pixel array as read (FITS axis 1 = numpy axis 1).
    data_section, overscan_section : pipeline.core.headers.Section
        1-based inclusive sections; ``overscan_section=None`` subtracts nothing.
    orientation : Orientation or None
        None keeps the raw orientation.
    overscan_options : dict
        Keyword options of :func:`fit_overscan`.

    Returns
    -------
    data_adu : ndarray, float32, ADU
        Overscan-corrected, trimmed and oriented.
    fit : OverscanFit or None
    """
    raw = _as_2d_float(raw_adu, "raw_adu")
    if not data_section.fits_in(raw.shape):
        raise ValueError(f"`data_section` {data_section} lies outside the raw array "
                         f"{raw.shape[1]} x {raw.shape[0]}")
    fit = None
    if overscan_section is not None:
        if not overscan_section.fits_in(raw.shape):
            raise ValueError(f"`overscan_section` {overscan_section} lies outside the raw "
                             f"array {raw.shape[1]} x {raw.shape[0]}")
        rs, cs = overscan_section.slices
        fit = fit_overscan(raw[rs, cs], first_row=rs.start, **(overscan_options or {}))
    rows, cols = data_section.slices
    data = raw[rows, cols]
    level = _overscan_level_for_rows(fit, rows)
    if level is not None:
        data = data - level[:, None].astype(np.float32)
    else:
        data = data.copy()
    if orientation is not None:
        data = np.ascontiguousarray(orientation.apply(data))
    return data.astype(np.float32, copy=False), fit


# ==================================================================================
# clipped combination (shared by bias and flat)
# ==================================================================================
@dataclass(frozen=True)
class _Noise:
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


def _clipped_mean(stack, *, sigma=3.0, maxiters=5, noise=None):
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


def _robust_std(values):
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
    return rms / _TRUNCATION_4SIGMA


# rms of a unit Gaussian truncated at +-4: sqrt(1 - 2*4*phi(4) / (2*Phi(4) - 1)) (analytic)
_TRUNCATION_4SIGMA = math.sqrt(1 - 8 * math.exp(-8) / math.sqrt(2 * math.pi)
                               / math.erf(4 / math.sqrt(2)))


def _pair_difference_std(a, b):
    """Robust std (ADU) of ``a - b`` after removing each row's median difference."""
    d = np.asarray(a, dtype=np.float64) - np.asarray(b, dtype=np.float64)
    d -= np.median(d, axis=1, keepdims=True)
    return _robust_std(d)


# ==================================================================================
# master bias
# ==================================================================================
#: rows used for the read-noise measurement (1 in this many)
_RN_ROW_STEP = 4
#: largest block stack (bytes); block_rows is lowered for many or long frames
_STACK_BYTES = 64 * 2 ** 20


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
        ``n_clipped`` (values rejected), ``mean_level_adu``.
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
    # at most _STACK_BYTES of stack at a time, so memory stays flat for any number of frames
    block = max(min(int(block_rows), _STACK_BYTES // (4 * n * shape[1])), 1)
    pairs = [(i, i + 1) for i in range(0, n - 1, 2)][:max(int(max_read_noise_pairs), 0)]
    pair_ss = np.zeros(len(pairs))
    pair_count = np.zeros(len(pairs))

    def accumulate(j, a_rows, b_rows):
        # every _RN_ROW_STEP-th row: millions of pixels per pair are still measured
        a_rows, b_rows = a_rows[::_RN_ROW_STEP], b_rows[::_RN_ROW_STEP]
        std = _pair_difference_std(a_rows, b_rows) / math.sqrt(2)
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
        std = _robust_std(np.concatenate(pieces)) / math.sqrt(2)
        if math.isfinite(std) and std > 0:
            pair_ss[0], pair_count[0] = std ** 2, 1.0
            noise = _Noise(std)
    out = np.empty(shape, dtype=np.float32)
    used = np.empty(shape, dtype=np.int32)
    stack = np.empty((n, min(block, shape[0]), shape[1]), dtype=np.float32)
    for r0 in range(0, shape[0], block):
        r1 = min(r0 + block, shape[0])
        s = stack[:, : r1 - r0]
        for i, f in enumerate(frames):
            s[i] = f[r0:r1]
        for j, (a, b) in enumerate(pairs[1:], start=1):
            accumulate(j, s[a], s[b])
        out[r0:r1], used[r0:r1] = _clipped_mean(s, sigma=clip_sigma, maxiters=clip_iterations,
                                                noise=noise)
    pair_rn = [math.sqrt(ss / c) for ss, c in zip(pair_ss, pair_count) if c > 0]
    read_noise = float(np.median(pair_rn)) if pair_rn else math.nan
    var_scale = read_noise ** 2 if math.isfinite(read_noise) else np.nan
    with np.errstate(divide="ignore", invalid="ignore"):
        variance = (var_scale / used).astype(np.float32)
    info = {"n_frames": n, "pair_read_noise_adu": pair_rn, "block_rows": block,
            "n_clipped": int(n * used.size - used.sum()),
            "mean_level_adu": float(np.nanmean(out))}
    return BiasCombination(out, variance, used, read_noise, info)


# ==================================================================================
# gain (photon transfer) and master flat
# ==================================================================================
@dataclass(frozen=True)
class GainMeasurement:
    """Gain from the photon transfer of a flat pair.

    Attributes
    ----------
    gain_e_per_adu : float, electron / ADU
        Median over tiles (nan when no tile qualified).
    info : dict
        ``n_tiles``, ``tile_gain_scatter`` (robust std of the tile values),
        ``mean_signal_adu``.
    """

    gain_e_per_adu: float
    info: dict = field(default_factory=dict)


def measure_gain(flat_a_adu, flat_b_adu, *, read_noise_adu, tile_px=32, mask=None,
                 min_signal_adu=None):
    """Gain from two bias-subtracted flats of similar level (photon transfer).

    Parameters
    ----------
    flat_a_adu, flat_b_adu : ndarray, shape (ny, nx), ADU
        Overscan- and bias-corrected flats of the same setup.
    read_noise_adu : float, ADU
    tile_px : int
        Side of the square tiles the frame is cut into.
    mask : ndarray of bool, shape (ny, nx), optional
        True where a pixel must not be used (saturated, bad); tiles with any
        such pixel are skipped.
    min_signal_adu : float, optional
        Tiles with a lower mean are skipped (default: 100 read-noise variances).

    Returns
    -------
    GainMeasurement

    Notes
    -----
    In each tile, ``d = a - r b`` with ``r = mean(a) / mean(b)`` removes the
    illumination and the pixel response, leaving noise of variance
    ``(mean(a) + r^2 mean(b)) / g + (1 + r^2) RN^2``; solving for ``g`` in each
    tile and taking the median over tiles gives the gain (the photon-transfer
    method, e.g. Janesick 2001, *Scientific Charge-Coupled Devices*, SPIE; from
    memory).
    """
    a = _as_2d_float(flat_a_adu, "flat_a_adu")
    b = _as_2d_float(flat_b_adu, "flat_b_adu")
    if a.shape != b.shape:
        raise ValueError(f"`flat_b_adu` must have the shape of `flat_a_adu` {a.shape}, "
                         f"got {b.shape}")
    rn = _positive(read_noise_adu, "read_noise_adu", allow_zero=True)
    t = max(int(tile_px), 4)
    ny, nx = (a.shape[0] // t) * t, (a.shape[1] // t) * t
    if ny == 0 or nx == 0:
        return GainMeasurement(math.nan, {"n_tiles": 0})
    min_signal = 100 * rn ** 2 if min_signal_adu is None else float(min_signal_adu)

    def tiles(x):
        return x[:ny, :nx].reshape(ny // t, t, nx // t, t).swapaxes(1, 2).reshape(-1, t * t)

    ta, tb = tiles(a).astype(np.float64), tiles(b).astype(np.float64)
    ok = np.isfinite(ta).all(axis=1) & np.isfinite(tb).all(axis=1)
    if mask is not None:
        ok &= ~tiles(np.asarray(mask, bool)).any(axis=1)
    ma, mb = ta.mean(axis=1), tb.mean(axis=1)
    ok &= (ma > min_signal) & (mb > min_signal)
    if not ok.any():
        return GainMeasurement(math.nan, {"n_tiles": 0})
    ta, tb, ma, mb = ta[ok], tb[ok], ma[ok], mb[ok]
    r = ma / mb
    d = ta - r[:, None] * tb
    d -= np.median(d, axis=1, keepdims=True)
    # robust variance per tile: 1.4826 MAD, then 4-sigma clipped variance
    mad = 1.4826 * np.median(np.abs(d), axis=1)
    keep = np.abs(d) <= 4 * mad[:, None]
    var = np.array([np.var(row[k], ddof=1) if k.sum() > 3 else np.nan for row, k in zip(d, keep)])
    var /= _TRUNCATION_4SIGMA ** 2
    excess = var - (1 + r ** 2) * rn ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        g = (ma + r ** 2 * mb) / excess
    g = g[np.isfinite(g) & (g > 0)]
    if g.size == 0:
        return GainMeasurement(math.nan, {"n_tiles": 0})
    gain = float(np.median(g))
    scatter = 1.4826 * float(np.median(np.abs(g - gain)))
    return GainMeasurement(gain, {"n_tiles": int(g.size), "tile_gain_scatter": scatter,
                                  "mean_signal_adu": float(np.mean(ma))})


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


def _flat_scale(frame):
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
    gain = _positive(gain_e_per_adu, "gain_e_per_adu")
    rn = _positive(read_noise_adu, "read_noise_adu", allow_zero=True)
    n = len(frames)
    if scales_adu is None:
        scales_adu = [_flat_scale(np.asarray(f[0:shape[0]], dtype=np.float32)) for f in frames]
    scales = np.asarray(scales_adu, dtype=np.float64)
    if not np.all(np.isfinite(scales) & (scales > 0)):
        raise CalibrationError(f"flat levels must be > 0, got {scales.tolist()} ADU; "
                               "expected lamp-illuminated frames")
    noise = _Noise(rn, gain, scales)
    block = max(min(int(block_rows), _STACK_BYTES // (4 * n * shape[1])), 1)
    out = np.empty(shape, dtype=np.float32)
    var = np.empty(shape, dtype=np.float32)
    used = np.empty(shape, dtype=np.int32)
    stack = np.empty((n, min(block, shape[0]), shape[1]), dtype=np.float32)
    for r0 in range(0, shape[0], block):
        r1 = min(r0 + block, shape[0])
        s = stack[:, : r1 - r0]
        for i, f in enumerate(frames):
            s[i] = np.asarray(f[r0:r1], dtype=np.float32) / np.float32(scales[i])
        mean, k = _clipped_mean(s, sigma=clip_sigma, maxiters=clip_iterations, noise=noise)
        sig = noise.sigma(np.where(np.isfinite(mean), mean, 0), n)
        with np.errstate(divide="ignore", invalid="ignore"):
            var[r0:r1] = (np.mean(sig ** 2, axis=0) / k).astype(np.float32)
        out[r0:r1], used[r0:r1] = mean, k
    info = {"n_frames": n, "scales_adu": scales.tolist(),
            "n_clipped": int(n * used.size - used.sum())}
    return FlatCombination(out, var, used, scales, info)


@dataclass(frozen=True)
class FlatResponse:
    """A normalised master flat.

    Attributes
    ----------
    response : ndarray, shape (ny, nx), float32
        Pixel-to-pixel response (times the slit illumination when kept),
        mean 1 over good illuminated pixels; 1 where the mask is set.
    variance : ndarray, shape (ny, nx), float32
        Variance of ``response``.
    mask : ndarray, shape (ny, nx), uint8
        BAD_PIXEL and UNILLUMINATED bits.
    lamp_shape : ndarray, shape (nx,)
        Smooth lamp spectrum divided out (units of the input).
    illumination : ndarray, shape (ny, nx), float32
        Smooth slit illumination (1 outside the slit); divided out unless kept.
    info : dict
        ``norm``, ``response_scatter``, ``n_bad``, ``n_unilluminated``,
        ``illuminated_rows``.
    """

    response: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    lamp_shape: np.ndarray
    illumination: np.ndarray
    info: dict = field(default_factory=dict)


def _knots_with_data(xs, knot_spacing, k=3):
    """Interior knots about ``knot_spacing`` apart, each interval holding data.

    ``xs`` is sorted. A candidate knot is kept only when at least two points
    lie between it and the previous kept knot and at least ``k + 1`` points
    lie beyond it, so the Schoenberg-Whitney conditions of the least-squares
    spline hold even across gaps left by rejected points.
    """
    lo, hi = xs[0], xs[-1]
    n_int = int((hi - lo) // max(float(knot_spacing), 1.0))
    if n_int < 2:
        return np.array([])
    kept = []
    last = lo
    for t in np.linspace(lo, hi, n_int + 1)[1:-1]:
        between = np.searchsorted(xs, t, "left") - np.searchsorted(xs, last, "right")
        beyond = xs.size - np.searchsorted(xs, t, "right")
        if between >= 2 and beyond >= k + 1:
            kept.append(t)
            last = t
    return np.array(kept)


def _spline_smooth(x, y, *, knot_spacing, sigma=3.0, maxiters=5, x_eval=None):
    """Cubic least-squares spline of y(x) with evenly spaced knots and clipping.

    ``x`` increasing; NaN in ``y`` are left out. Returns the spline at ``x_eval``
    (default ``x``), clamped to the range of ``x``.
    """
    from astropy.stats import sigma_clip
    from scipy.interpolate import LSQUnivariateSpline

    x = np.asarray(x, float)
    y = np.asarray(y, float)
    x_eval = x if x_eval is None else np.asarray(x_eval, float)
    finite = np.isfinite(y)
    good = finite.copy()
    if good.sum() < 5:
        fill = np.nanmedian(y) if good.any() else 1.0
        return np.full(x_eval.shape, fill)
    spline = None
    for _ in range(max(int(maxiters), 1)):
        xs, ys = x[good], y[good]
        k = min(3, xs.size - 1)
        spline = LSQUnivariateSpline(xs, ys, _knots_with_data(xs, knot_spacing, k), k=k)
        # every finite point is judged against the new fit (rejected ones may come back)
        resid = np.where(finite, y - spline(x), np.nan)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            clipped = sigma_clip(resid, sigma=sigma, maxiters=1, cenfunc="median",
                                 stdfunc="mad_std")
        new_good = finite & ~np.ma.getmaskarray(clipped)
        if np.array_equal(new_good, good) or new_good.sum() < 5:
            break
        good = new_good
    return spline(np.clip(x_eval, x[0], x[-1]))


def _subsample(values, limit=400_000):
    """Every k-th value, at most about ``limit`` (statistics of a few 1e5 values suffice)."""
    values = np.asarray(values).ravel()
    return values[::max(values.size // limit, 1)]


def _clipped_stats(values, **kwargs):
    """astropy sigma_clipped_stats without its warning about NaN (they are left out)."""
    from astropy.stats import sigma_clipped_stats
    from astropy.utils.exceptions import AstropyUserWarning

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AstropyUserWarning)
        warnings.simplefilter("ignore", RuntimeWarning)
        return sigma_clipped_stats(values, **kwargs)


#: floor of the response scatter in the deviance test (noise-free flats would flag everything)
_MIN_RESPONSE_SCATTER = 1e-3
#: slit-end rows whose profile misses the smooth illumination by more than this are unlit
_EDGE_MISFIT = 0.005
_MAX_EDGE_ROWS = 5


def normalise_flat(flat, variance=None, *, lamp_knot_spacing_px=40.0,
                   keep_slit_illumination=False, illumination_bin_px=64,
                   illumination_knot_spacing_px=5.0, min_slit_illumination=0.3,
                   min_flat_snr=20.0, min_response=0.5, max_response=1.5,
                   deviant_sigma=6.0):
    """Divide the lamp spectrum (and the slit illumination) out of a combined flat.

    Parameters
    ----------
    flat : ndarray, shape (ny, nx)
        Combined flat in canonical orientation (x = dispersion).
    variance : ndarray, shape (ny, nx), optional
        Its variance (for the S/N criterion and the response variance).
    lamp_knot_spacing_px : float, px
        Knot spacing of the cubic spline fitted to the lamp spectrum along x.
    keep_slit_illumination : bool
        Keep the slit illumination in the result (the response is then
        pixel response times illumination) instead of dividing it out.
    illumination_bin_px : int, px
        Width of the column bins in which the slit profile is measured.
    illumination_knot_spacing_px : float, px
        Knot spacing of the spline fitted along the slit to each bin's profile.
    min_slit_illumination : float
        Rows whose illumination is below this fraction of the slit's brightest
        level are UNILLUMINATED.
    min_flat_snr : float
        Pixels whose combined flat has a lower signal-to-noise ratio are
        UNILLUMINATED (too little lamp light).
    min_response, max_response : float
        Responses outside this range are BAD_PIXEL.
    deviant_sigma : float
        Responses farther from 1 than this many robust standard deviations are BAD_PIXEL.

    Returns
    -------
    FlatResponse

    Notes
    -----
    1. Row profile ``p(y)`` = median along x; rows above ``min_slit_illumination``
       of its 95th percentile are illuminated.
    2. Lamp spectrum: each column's clipped mean of ``flat / p(y)`` over the
       illuminated rows, smoothed along x by a cubic spline with clipping.
    3. Slit illumination: ``flat / lamp`` medianed in column bins, each bin's
       profile smoothed along y by a spline (deviant rows, e.g. dead columns,
       rejected), interpolated linearly in x. Lit rows at the slit ends whose
       profile misses the spline by more than 0.5 % (at most 5 per end) are
       treated as unilluminated: the spline cannot follow the steep edge.
    4. Response = ``flat / (lamp * illumination)`` (or ``flat / lamp``),
       divided by its clipped mean over good illuminated pixels. Large-scale
       response structure ends up in the smooth models, not in the response.

    Examples
    --------
    >>> yy, xx = np.mgrid[0:40, 0:300]
    >>> flat = (500.0 + xx) * np.where((yy > 3) & (yy < 36), 1.0, 0.0)
    >>> r = normalise_flat(flat, min_flat_snr=0)
    >>> bool(np.allclose(r.response[r.mask == 0], 1.0, atol=1e-3))
    True
    """
    from scipy.interpolate import interp1d

    f = _as_2d_float(flat, "flat").astype(np.float64)
    ny, nx = f.shape
    var = None if variance is None else np.asarray(variance, dtype=np.float64)
    if var is not None and var.shape != f.shape:
        raise ValueError(f"`variance` must have the shape of `flat` {f.shape}, got {var.shape}")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        profile = np.nanmedian(f, axis=1)
        top = np.nanpercentile(profile, 95)
        if not np.isfinite(top) or top <= 0:
            raise CalibrationError("the combined flat has no positive signal; expected "
                                   "lamp-illuminated frames")
        rows_lit = profile > min_slit_illumination * top
        p_norm = profile / np.nanmean(profile[rows_lit])
        ratio = f[rows_lit] / p_norm[rows_lit, None]
        _, lamp_raw, _ = _clipped_stats(ratio, axis=0, sigma=3.0, maxiters=3,
                                             cenfunc="median", stdfunc="mad_std")
        lamp_raw = np.asarray(lamp_raw, float)
    x = np.arange(nx, dtype=float)
    lamp = _spline_smooth(x, lamp_raw, knot_spacing=lamp_knot_spacing_px)
    lamp = np.where(lamp > 0, lamp, np.nan)
    r = f / lamp[None, :]
    # slit illumination in column bins
    width = max(int(illumination_bin_px), 1)
    edges = np.arange(0, nx + width, width)
    edges[-1] = nx
    edges = np.unique(np.clip(edges, 0, nx))
    centres, profiles, misfits = [], [], []
    y = np.arange(ny, dtype=float)
    lit_idx = np.nonzero(rows_lit)[0]
    for c0, c1 in zip(edges[:-1], edges[1:]):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            prof = np.nanmedian(r[:, c0:c1], axis=1)
        smooth = np.ones(ny)
        if lit_idx.size >= 5:
            smooth[lit_idx[0]:lit_idx[-1] + 1] = _spline_smooth(
                y[lit_idx], prof[lit_idx], knot_spacing=illumination_knot_spacing_px,
                x_eval=y[lit_idx[0]:lit_idx[-1] + 1])
        centres.append(0.5 * (c0 + c1 - 1))
        profiles.append(smooth)
        with np.errstate(divide="ignore", invalid="ignore"):
            misfits.append(np.abs(prof / smooth - 1))
    profiles = np.array(profiles).T  # (ny, nbins)
    # Slit ends: the smooth profile cannot follow the steep edge. Lit rows at either end
    # whose profile misses the fit by more than _EDGE_MISFIT (median over the bins) are
    # treated as unilluminated, at most _MAX_EDGE_ROWS rows per end.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        row_misfit = np.nanmedian(np.array(misfits), axis=0)
    n_edge = 0
    if lit_idx.size > 2 * _MAX_EDGE_ROWS:
        for order in (lit_idx[:_MAX_EDGE_ROWS], lit_idx[::-1][:_MAX_EDGE_ROWS]):
            for row in order:
                if not row_misfit[row] > _EDGE_MISFIT:
                    break
                rows_lit[row] = False
                n_edge += 1
        lit_idx = np.nonzero(rows_lit)[0]
    if len(centres) == 1:
        illum = np.repeat(profiles, nx, axis=1)
    else:
        illum = interp1d(centres, profiles, axis=1, bounds_error=False,
                         fill_value=(profiles[:, 0], profiles[:, -1]))(x)
    illum_level = np.nanmean(illum[rows_lit]) if rows_lit.any() else 1.0
    illum = illum / illum_level
    model = lamp[None, :] * (illum if not keep_slit_illumination else 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        response = f / model
        resp_var = None if var is None else var / model ** 2
    unlit = ~rows_lit[:, None] | (illum < min_slit_illumination) | ~np.isfinite(response)
    if var is not None:
        with np.errstate(divide="ignore", invalid="ignore"):
            snr = f / np.sqrt(var)
        unlit |= ~(snr >= min_flat_snr)
    unlit = np.broadcast_to(unlit, f.shape).copy()
    good = ~unlit
    if not good.any():
        raise CalibrationError("no illuminated pixel in the combined flat; check "
                               "flat.min_slit_illumination and flat.min_flat_snr")
    sample = _subsample(response[good])
    norm, _, _ = _clipped_stats(sample, sigma=3.0, maxiters=5)
    response = response / norm
    if resp_var is not None:
        resp_var = resp_var / norm ** 2
    _, med, scatter = _clipped_stats(sample / norm, sigma=5.0, maxiters=5,
                                     cenfunc="median", stdfunc="mad_std")
    bad = good & ((response < min_response) | (response > max_response)
                  | (np.abs(response - 1.0) > deviant_sigma * max(scatter, _MIN_RESPONSE_SCATTER)))
    mask = np.zeros(f.shape, dtype=MASK_DTYPE)
    mask[unlit] |= _UNLIT
    mask[bad] |= _BAD
    flagged = mask != 0
    response = np.where(flagged, 1.0, response).astype(np.float32)
    if resp_var is None:
        resp_var = np.zeros(f.shape)
    resp_var = np.where(flagged | ~np.isfinite(resp_var), 0.0, resp_var).astype(np.float32)
    info = {"norm": float(norm), "response_scatter": float(scatter),
            "n_bad": int(bad.sum()), "n_unilluminated": int(unlit.sum()),
            "illuminated_rows": [int(lit_idx[0]), int(lit_idx[-1])] if lit_idx.size else [],
            "n_edge_rows_unlit": n_edge,
            "keep_slit_illumination": bool(keep_slit_illumination)}
    return FlatResponse(response, resp_var, mask, lamp, illum.astype(np.float32), info)


# ==================================================================================
# cosmic rays and the calibrated frame
# ==================================================================================
def find_cosmic_rays(data_e, *, read_noise_e, mask=None, sigclip=4.5, sigfrac=0.3,
                     objlim=5.0, niter=2):
    """Flag cosmic-ray hits by the Laplacian method (van Dokkum 2001, PASP 113, 1420).

    Uses astroscrappy's implementation of L.A.Cosmic.

    Parameters
    ----------
    data_e : ndarray, shape (ny, nx), electron
        Bias-subtracted frame (sky not subtracted).
    read_noise_e : float, electron
    mask : ndarray of bool, shape (ny, nx), optional
        Pixels to ignore (bad, saturated).
    sigclip, sigfrac, objlim : float
        Detection limit (in sigma), neighbour limit (fraction of sigclip) and
        the contrast limit between the Laplacian and the fine structure
        (van Dokkum 2001, section 3).
    niter : int
        Detection iterations.

    Returns
    -------
    ndarray of bool, shape (ny, nx)
        True at cosmic-ray pixels.
    """
    import astroscrappy

    data = _as_2d_float(data_e, "data_e")
    rn = _positive(read_noise_e, "read_noise_e")
    # Hits within a few pixels of the frame edge are missed by the filters' edge handling:
    # detect on a mirror-padded copy (measured on simulated frames: recall 94-97% -> 98-100%).
    pad = min(_CR_PAD, *(n - 1 for n in data.shape))
    padded = np.ascontiguousarray(np.pad(data, pad, mode="reflect"))
    inmask = None
    if mask is not None:
        inmask = np.ascontiguousarray(np.pad(np.asarray(mask, bool), pad, mode="reflect"))
    flags, _ = astroscrappy.detect_cosmics(
        padded, inmask=inmask, gain=1.0, readnoise=rn, satlevel=np.inf, sigclip=sigclip,
        sigfrac=sigfrac, objlim=objlim, niter=int(niter), sepmed=True, cleantype="meanmask",
        fsmode="median", verbose=False)
    flags = np.asarray(flags, dtype=bool)
    return flags[pad:flags.shape[0] - pad, pad:flags.shape[1] - pad] if pad else flags


#: mirror padding (px) around a frame for the cosmic-ray search
_CR_PAD = 6


@dataclass(frozen=True)
class CalibratedFrame:
    """A CCD-calibrated frame in canonical orientation.

    Attributes
    ----------
    data_e : ndarray, shape (ny, nx), float32, electron
    variance_e2 : ndarray, shape (ny, nx), float32, electron^2
    mask : ndarray, shape (ny, nx), uint8
    info : dict
        ``gain_e_per_adu``, ``read_noise_e``, ``n_saturated``, ``n_cosmic``,
        ``overscan`` (fit info).
    """

    data_e: np.ndarray
    variance_e2: np.ndarray
    mask: np.ndarray
    info: dict = field(default_factory=dict)


def calibrate_ccd(raw_adu, *, data_section, overscan_section, orientation, gain_e_per_adu,
                  read_noise_e, saturation_adu=np.inf, bias_adu=None, bias_variance_adu2=None,
                  bias_mask=None, flat=None, flat_variance=None, flat_mask=None,
                  include_flat_error=True, cosmic_rays=False, cosmic_ray_options=None,
                  overscan_options=None):
    """Overscan, trim, orient, bias, gain, flat, variance, mask and cosmic rays.

    Parameters
    ----------
    raw_adu : ndarray, shape (ny_raw, nx_raw), ADU
    data_section, overscan_section : pipeline.core.headers.Section (overscan may be None)
    orientation : Orientation
    gain_e_per_adu : float, electron / ADU
    read_noise_e : float, electron
    saturation_adu : float, ADU
        Raw values at or above it are SATURATED.
    bias_adu, bias_variance_adu2 : ndarray, shape (ny, nx), canonical, optional
        Master bias (ADU) and its variance.
    bias_mask, flat_mask : ndarray of uint8, optional
        ORed into the frame's mask.
    flat, flat_variance : ndarray, shape (ny, nx), optional
        Normalised response and its variance.
    include_flat_error : bool
        Add the flat's variance term.
    cosmic_rays : bool
        Run :func:`find_cosmic_rays`.

    Returns
    -------
    CalibratedFrame

    Notes
    -----
    ``e = g (raw - overscan - bias)``; ``data = e / flat``;
    ``var = (RN^2 + max(e, 0) + g^2 var_bias) / flat^2 + data^2 var_flat / flat^2``.
    """
    raw = _as_2d_float(raw_adu, "raw_adu")
    gain = _positive(gain_e_per_adu, "gain_e_per_adu")
    rn = _positive(read_noise_e, "read_noise_e", allow_zero=True)
    nonfinite_raw = ~np.isfinite(raw)
    saturated_raw = np.zeros(raw.shape, bool) if saturation_adu is None else (raw >= saturation_adu)
    raw_clean = np.where(nonfinite_raw, 0, raw) if nonfinite_raw.any() else raw
    data_adu, ov_fit = correct_and_trim(raw_clean, data_section=data_section,
                                        overscan_section=overscan_section,
                                        orientation=orientation,
                                        overscan_options=overscan_options)
    rows, cols = data_section.slices
    saturated = np.ascontiguousarray(orientation.apply(saturated_raw[rows, cols]))
    nonfinite = np.ascontiguousarray(orientation.apply(nonfinite_raw[rows, cols]))
    shape = data_adu.shape
    mask = np.zeros(shape, dtype=MASK_DTYPE)
    mask[saturated] |= _SAT
    mask[nonfinite] |= _NONFINITE
    for name, arr in (("bias_adu", bias_adu), ("bias_variance_adu2", bias_variance_adu2),
                      ("bias_mask", bias_mask), ("flat", flat), ("flat_variance", flat_variance),
                      ("flat_mask", flat_mask)):
        if arr is not None and np.shape(arr) != shape:
            raise ValueError(f"`{name}` has shape {np.shape(arr)}, expected {shape} (the "
                             "trimmed, oriented frame)")
    if bias_adu is not None:
        data_adu = data_adu - np.asarray(bias_adu, dtype=np.float32)
    electrons = data_adu * np.float32(gain)
    var = np.float32(rn ** 2) + np.maximum(electrons, 0)
    if bias_variance_adu2 is not None:
        bias_var = np.nan_to_num(np.asarray(bias_variance_adu2, np.float32))
        var = var + bias_var * np.float32(gain ** 2)
    if bias_mask is not None:
        mask |= np.asarray(bias_mask, dtype=MASK_DTYPE)
    if flat is not None:
        fl = np.asarray(flat, dtype=np.float32)
        bad_flat = ~np.isfinite(fl) | (fl <= 0)
        fl = np.where(bad_flat, 1.0, fl).astype(np.float32)
        data = electrons / fl
        var = var / fl ** 2
        if include_flat_error and flat_variance is not None:
            var = var + data ** 2 * np.nan_to_num(np.asarray(flat_variance, np.float32)) / fl ** 2
        mask[bad_flat] |= _BAD
        if flat_mask is not None:
            mask |= np.asarray(flat_mask, dtype=MASK_DTYPE)
    else:
        data = electrons
    bad_values = ~np.isfinite(data) | ~np.isfinite(var)
    if bad_values.any():
        mask[bad_values] |= _NONFINITE
        data = np.where(bad_values, 0, data)
        var = np.where(bad_values, np.float32(rn ** 2 if rn > 0 else 1.0), var)
    n_cosmic = 0
    if cosmic_rays:
        crmask = find_cosmic_rays(data, read_noise_e=max(rn, 1e-3),
                                  mask=(mask & (_BAD | _SAT | _NONFINITE)) != 0,
                                  **(cosmic_ray_options or {}))
        mask[crmask] |= _CR
        n_cosmic = int(crmask.sum())
    info = {"gain_e_per_adu": gain, "read_noise_e": rn, "n_saturated": int(saturated.sum()),
            "n_cosmic": n_cosmic, "overscan": None if ov_fit is None else ov_fit.info}
    return CalibratedFrame(data.astype(np.float32), var.astype(np.float32), mask, info)


# ==================================================================================
# FITS adapters
# ==================================================================================
@dataclass(frozen=True)
class _Layout:
    data: hdr.Section
    overscan: object   # Section or None
    orientation: Orientation
    binning: tuple     # along FITS axes 1, 2
    dispersion_axis: int

    @property
    def trim_y0(self):
        return self.data.y1 - 1

    @property
    def trim_x0(self):
        return self.data.x1 - 1

    def binning_cards(self):
        bx, by = self.binning
        spec, spat = (bx, by) if self.dispersion_axis == 1 else (by, bx)
        return [("BINSPEC", int(spec), "binning along the dispersion (canonical x)"),
                ("BINSPAT", int(spat), "binning along the slit (canonical y)")]


def _layout(header, instrument, *, path):
    sections = instrument.get("sections", {}) or {}
    data = hdr.section_from_header(header, sections.get("data"), path=path, name="data")
    ov_spec = sections.get("overscan") or {}
    overscan = None
    if ov_spec.get("keyword") or ov_spec.get("value"):
        overscan = hdr.section_from_header(header, ov_spec, path=path, name="overscan")
    axis = int(instrument.get("dispersion_axis", 1))
    orientation = Orientation.from_instrument(
        dispersion_axis=axis,
        wavelength_increases_with_pixel=instrument.get("wavelength_increases_with_pixel", True))
    binning = (1, 1)
    keyword = instrument.get("binning_keyword")
    if keyword and header.get(keyword) is not None:
        try:
            binning = hdr.parse_binning(header[keyword], name=keyword)
        except ValueError as exc:
            raise InputFileError(path, str(exc)) from None
    shape = hdr.raw_shape(header)
    for name, section in (("data", data), ("overscan", overscan)):
        if section is not None and not section.fits_in(shape):
            raise InputFileError(path, f"{name} section {section} lies outside the "
                                 f"{shape[1]} x {shape[0]} pixel array (NAXIS1 x NAXIS2)")
    return _Layout(data, overscan, orientation, binning, axis)


def _overscan_kwargs(overscan):
    o = _options(overscan, OVERSCAN_DEFAULTS, "overscan")
    return {"method": o["method"], "polynomial_order": o["polynomial_order"],
            "smooth_window_rows": o["smooth_window_rows"], "row_statistic": o["row_statistic"],
            "clip_sigma": o["clip_sigma"]}


def _open_pixels(path, extension):
    from astropy.io import fits
    hdul = fits.open(path, memmap=False, mode="readonly")
    for index, h in enumerate(hdul):
        if (isinstance(extension, int) and index == extension) or \
                (isinstance(extension, str) and h.name.upper() == extension.upper()) or \
                (isinstance(extension, str) and extension.isdigit() and index == int(extension)):
            return hdul, h
    hdul.close()
    raise InputFileError(path, f"HDU {extension!r} missing; expected the raw pixels there")


def _read_raw(path, instrument):
    """Header (primary + pixel extension), raw pixels as float32 and the layout."""
    ext = instrument.get("pixel_extension", 0)
    header = hdr.read_raw_header(path, extension=ext)
    hdul, hdu = _open_pixels(path, ext)
    try:
        raw = np.asarray(hdu.data, dtype=np.float32)
    except Exception as exc:
        raise InputFileError(path, f"pixels of HDU {ext!r} cannot be read ({exc})") from None
    finally:
        hdul.close()
    return header, raw, _layout(header, instrument, path=path)


class _RawRows:
    """Overscan-corrected, trimmed rows of a raw frame read on demand (raw orientation).

    ``reader[r0:r1]`` reads only raw rows ``r0..r1`` of the data section from
    the file; the overscan level is fitted once, reading the file in row
    blocks. Optionally subtracts a bias (raw orientation) and marks values at
    or above ``saturation_adu`` as NaN.
    """

    def __init__(self, path, instrument, overscan_options, *, block_rows=256,
                 bias_raw=None, saturation_adu=None):
        self.path = str(path)
        ext = instrument.get("pixel_extension", 0)
        self.header = hdr.read_raw_header(path, extension=ext)
        self.layout = _layout(self.header, instrument, path=path)
        self._hdul, self._hdu = _open_pixels(path, ext)
        self.bias_raw = bias_raw
        self.saturation_adu = saturation_adu
        rows, cols = self.layout.data.slices
        self._rows, self._cols = rows, cols
        self.shape = (rows.stop - rows.start, cols.stop - cols.start)
        self.overscan_fit = None
        self.n_saturated = 0
        ov = self.layout.overscan
        if ov is not None:
            ors, ocs = ov.slices
            pieces = []
            for r0 in range(ors.start, ors.stop, block_rows):
                r1 = min(r0 + block_rows, ors.stop)
                # whole rows: reading a column slice goes row by row and is much slower
                pieces.append(np.asarray(self._hdu.section[r0:r1, :], dtype=np.float32)[:, ocs])
            try:
                self.overscan_fit = fit_overscan(np.concatenate(pieces), first_row=ors.start,
                                                 **overscan_options)
                self._level = _overscan_level_for_rows(self.overscan_fit, rows).astype(np.float32)
            except ValueError as exc:
                self.close()
                raise InputFileError(path, f"overscan {ov}: {exc}") from None
        else:
            self._level = np.zeros(self.shape[0], np.float32)

    def __getitem__(self, item):
        if not isinstance(item, slice) or item.step not in (None, 1):
            raise TypeError("rows are read by a contiguous slice")
        r0, r1, _ = item.indices(self.shape[0])
        raw = np.asarray(self._hdu.section[self._rows.start + r0:self._rows.start + r1, :],
                         dtype=np.float32)[:, self._cols]
        out = raw - self._level[r0:r1, None]
        if self.bias_raw is not None:
            out -= self.bias_raw[r0:r1]
        if self.saturation_adu is not None:
            sat = raw >= self.saturation_adu
            if sat.any():
                out[sat] = np.nan
        return out

    def close(self):
        self._hdul.close()


def _write_qa(table_rows, names, meta, path):
    from astropy.table import Table
    table = Table(rows=table_rows or None, names=names) if table_rows else Table(names=names)
    table.meta.update(meta)
    Path(path).parent.mkdir(parents=True, exist_ok=True)
    table.write(path, format="ascii.ecsv", overwrite=True)



def _configured_keyword_names(instrument):
    """Raw keywords the instrument configuration names (never dropped as geometry)."""
    names = set()
    for value in list((instrument.get("keywords") or {}).values()) \
            + list(instrument.get("setup_keywords") or []) \
            + list(instrument.get("readout_keywords") or []) \
            + [instrument.get("frame_type_keyword")]:
        if isinstance(value, str):
            names.add(value.upper())
    return names


def _frame_header(raw_header, layout, frame_type, instrument, *, keep=()):
    """Raw keywords minus structural and raw-geometry ones, plus the orientation cards.

    ``keep``: raw keywords kept whatever their name (e.g. those of ``instrument.keywords``)."""
    from astropy.io import fits
    header = fits.Header()
    config_section_keys = {spec.get("keyword") for spec in
                           (instrument.get("sections") or {}).values() if spec}
    binning_key = instrument.get("binning_keyword")
    keep = (_configured_keyword_names(instrument) | {str(k).upper() for k in keep if k}) \
        - {str(binning_key).upper()}
    present = set(raw_header.keys())
    for card in raw_header.cards:
        if card.keyword in _STRUCTURAL or card.keyword in config_section_keys:
            continue
        if card.keyword in ("COMMENT", "HISTORY", "") or card.keyword == binning_key:
            continue
        if card.keyword == "SATURATE" or hdr.is_raw_geometry_keyword(
                card.keyword, card.value, header_keywords=present, keep=keep):
            continue
        header[card.keyword] = (card.value, card.comment)
    if instrument.get("saturation_adu") is not None:
        header["SATURADU"] = (float(instrument["saturation_adu"]),
                              "ADU raw saturation level used")
    for card in layout.orientation.header_cards(trim_y0=layout.trim_y0, trim_x0=layout.trim_x0):
        header[card[0]] = card[1:]
    for card in layout.binning_cards():
        header[card[0]] = card[1:]
    header["FRAMETYP"] = (frame_type, "frame type assigned by the night inventory")
    header["RAWDSEC"] = (str(layout.data), "raw data section trimmed to (1-based)")
    return header


#: Standard keyword written into every calibrated frame -> key of ``instrument.keywords``
#: naming the raw keyword it is copied from. Steps after ``calibrate_frame`` read only
#: these standard names (DEVELOPERS.md, Conventions).
STANDARD_KEYWORDS = {"OBJECT": "object", "EXPTIME": "exposure_time_s", "DATE-OBS": "date_obs",
                     "AIRMASS": "airmass", "RA": "ra_deg", "DEC": "dec_deg",
                     "GRATING": "grating", "GRTILT": "grating_tilt_deg",
                     "SLITWID": "slit_width_arcsec", "FILTER": "filter", "LAMPS": "lamps"}


def standard_keyword_cards(raw_header, keywords):
    """Cards of the standard keywords, copied from the configured raw keywords.

    Parameters
    ----------
    raw_header : astropy.io.fits.Header
        Raw header (primary + pixel extension).
    keywords : dict or None
        ``instrument.keywords``: quantity -> raw keyword name; a quantity not
        configured is read from its standard name.

    Returns
    -------
    list of (keyword, value, comment)
        One card per standard keyword whose configured raw keyword is present
        (the raw card itself is kept too, under its own name).
    """
    keywords = keywords or {}
    cards = []
    for standard, quantity in STANDARD_KEYWORDS.items():
        source = keywords.get(quantity) or standard
        if source not in raw_header:
            continue
        comment = raw_header.comments[source]
        if source != standard:
            comment = f"from {source}" + (f": {comment}" if comment else "")
        cards.append((standard, raw_header[source], comment[:46]))
    return cards


def known_defects_mask(sections, layout):
    """Canonical bool mask of known detector defects.

    Parameters
    ----------
    sections : list of str
        FITS-style sections ``[x1:x2,y1:y2]`` in UNBINNED raw detector pixels
        (1-based inclusive, FITS axis 1 first), converted with the frame's binning.
    layout : _Layout
        Data section, binning and orientation of the frame.

    Returns
    -------
    ndarray of bool, shape (ny, nx) canonical
    """
    rows, cols = layout.data.slices
    raw = np.zeros((rows.stop - rows.start, cols.stop - cols.start), bool)
    bx, by = layout.binning
    for text in sections or []:
        sec = hdr.parse_section(text, name="flat.bad_pixel_sections")
        x1, x2 = (sec.x1 - 1) // bx, (sec.x2 - 1) // bx      # 0-based binned raw columns
        y1, y2 = (sec.y1 - 1) // by, (sec.y2 - 1) // by
        c0, c1 = max(x1 - cols.start, 0), min(x2 - cols.start + 1, raw.shape[1])
        r0, r1 = max(y1 - rows.start, 0), min(y2 - rows.start + 1, raw.shape[0])
        if c0 < c1 and r0 < r1:
            raw[r0:r1, c0:c1] = True
    return np.ascontiguousarray(layout.orientation.apply(raw))


def _configured(header, instrument, name, *, path):
    return hdr.keyword_or_value(header, instrument.get(name), path=path, name=name)


def _as_list(value):
    return [value] if isinstance(value, (str, Path)) else list(value)


def make_master_bias_file(*, frames, master, qa, instrument, overscan=None, bias=None):
    """Master bias of one readout mode from raw bias files (rule ``master_bias``).

    Parameters
    ----------
    frames : list of str
        Raw bias files (all of the same readout mode).
    master : str
        Output frame: PRIMARY = bias in ADU (canonical orientation), UNCERT =
        its variance (ADU^2), MASK = BAD_PIXEL where fewer than half the frames
        survived clipping. Header: ``NFRAMES``, ``RNMEAS`` (ADU), ``RNMEASE``
        (e-, with the configured gain), ``RNOK`` (within ``RNTOL`` of the
        configured value), orientation and trim keywords.
    qa : str
        ECSV: one row per frame (overscan level and scatter); the measured and
        configured read noise in the table meta.
    instrument : dict
        CCD part of the instrument config (sections, gain, read noise,
        saturation, dispersion axis and direction, pixel extension, binning keyword).
    overscan, bias : dict
        The ``overscan`` and ``bias`` config sections.
    """
    from pipeline.core.frames import Frame, write_frame
    from pipeline.core.provenance import stamp

    paths = _as_list(frames)
    if not paths:
        raise CalibrationError(f"{master}: no bias frame given")
    ov_opts = _overscan_kwargs(overscan)
    opts = _options(bias, BIAS_DEFAULTS, "bias")
    readers = []
    try:
        for p in paths:
            readers.append(_RawRows(p, instrument, ov_opts))
        shapes = {r.shape for r in readers}
        if len(shapes) > 1:
            raise CalibrationError(f"{master}: bias frames differ in trimmed shape "
                                   f"{sorted(shapes)}; expected one readout mode")
        result = combine_bias(readers, clip_sigma=opts["clip_sigma"],
                              clip_iterations=opts["clip_iterations"],
                              block_rows=opts["block_rows"],
                              max_read_noise_pairs=opts["max_read_noise_pairs"])
    finally:
        for r in readers:
            r.close()
    first = readers[0]
    layout = first.layout
    gain_conf = _configured(first.header, instrument, "gain_e_per_adu", path=first.path)
    rn_conf = _configured(first.header, instrument, "read_noise_e", path=first.path)
    rn_e = result.read_noise_adu * gain_conf
    tol = float(opts["read_noise_tolerance"])
    rn_ok = bool(math.isfinite(rn_e) and abs(rn_e / rn_conf - 1) <= tol)
    if not math.isfinite(rn_e):
        warnings.warn(f"{master}: read noise not measured ({len(paths)} bias frame); "
                      f"the configured {rn_conf:.3f} e- will be used", CalibrationQualityWarning)
    elif not rn_ok:
        warnings.warn(f"{master}: measured read noise {rn_e:.3f} e- (with gain {gain_conf} e-/ADU) "
                      f"differs from the configured {rn_conf:.3f} e- by "
                      f"{100 * (rn_e / rn_conf - 1):+.1f}% (tolerance {100 * tol:.0f}%); "
                      "the configured value will be used", CalibrationQualityWarning)
    used = layout.orientation.apply(result.n_used)
    mask = np.where(used < max(1, len(paths) / 2), _BAD, 0).astype(MASK_DTYPE)
    data = np.ascontiguousarray(layout.orientation.apply(result.bias_adu))
    nonfinite = ~np.isfinite(data)
    mask[nonfinite] |= _NONFINITE
    variance = np.ascontiguousarray(layout.orientation.apply(result.variance_adu2))
    if not np.isfinite(variance).all():
        variance = np.where(np.isfinite(variance), variance, np.float32(
            (rn_conf / gain_conf) ** 2)).astype(np.float32)
    header = _frame_header(first.header, layout, "master_bias", instrument)
    for key in ("OBJECT", "EXPTIME", "DATE-OBS", "IMAGETYP"):
        if key in header:
            header.remove(key)
    header["NFRAMES"] = (len(paths), "bias frames combined")
    header["RNMEAS"] = (_finite_or(result.read_noise_adu), "ADU measured read noise (pairs)")
    header["RNMEASE"] = (_finite_or(rn_e), "e- measured read noise, configured gain")
    header["RNCONF"] = (rn_conf, "e- configured read noise")
    header["GAINCONF"] = (gain_conf, "e-/ADU configured gain")
    header["RNOK"] = (rn_ok, "RNMEASE within RNTOL of RNCONF")
    header["RNTOL"] = (tol, "relative read-noise tolerance")
    header["BIASLEV"] = (result.info["mean_level_adu"], "ADU mean residual level")
    stamp(header, inputs=paths)
    write_frame(Frame(np.where(nonfinite, 0, data).astype(np.float32), variance, mask, header,
                      unit="adu"), master)
    rows = [(Path(r.path).name, (r.overscan_fit.info["mean_adu"] if r.overscan_fit else 0.0),
             (r.overscan_fit.info["rms_adu"] if r.overscan_fit else 0.0)) for r in readers]
    meta = {"read_noise_adu": _finite_or(result.read_noise_adu),
            "read_noise_e_configured_gain": _finite_or(rn_e),
            "read_noise_configured_e": rn_conf, "gain_configured_e_per_adu": gain_conf,
            "read_noise_within_tolerance": rn_ok, "tolerance": tol,
            "pair_read_noise_adu": [float(v) for v in result.info["pair_read_noise_adu"]],
            "n_frames": len(paths), "n_clipped": result.info["n_clipped"],
            "mean_level_adu": result.info["mean_level_adu"], "block_rows": opts["block_rows"],
            "overscan_method": ov_opts["method"]}
    _write_qa(rows, ["frame", "overscan_level_adu", "overscan_rms_adu"], meta, qa)
    log.info("master bias %s: %d frames, read noise %.3f ADU = %.3f e- (configured %.3f e-)",
             master, len(paths), result.read_noise_adu, rn_e, rn_conf)
    return master


def _finite_or(value, default=-1.0):
    return float(value) if value is not None and math.isfinite(value) else default


def _read_master(path, *, kind):
    from pipeline.core.frames import read_frame
    try:
        return read_frame(path)
    except InputFileError:
        raise
    except Exception as exc:
        raise InputFileError(path, f"cannot read the master {kind} ({exc})") from None


def make_master_flat_file(*, frames, bias, master, qa, instrument, overscan=None, flat=None):
    """Master flat of one setup from raw flats (rule ``master_flat``).

    Parameters
    ----------
    frames : list of str
        Raw flat files of one setup.
    bias : str
        Master bias of their readout mode.
    master : str
        Output frame: PRIMARY = normalised response (canonical), UNCERT = its
        variance, MASK = UNILLUMINATED and BAD_PIXEL bits; extension LAMP = the
        smooth lamp spectrum divided out. Header: ``NFRAMES``, ``GAINMEAS``
        (e-/ADU, photon transfer; -1 when not measurable), ``GAINOK``,
        ``FLATNORM``.
    qa : str
        ECSV: a row per flat (``kind='frame'``: level, saturated pixels) and
        per gain pair (``kind='pair'``: mean tile signal, gain, tiles); the
        measured and configured gain and the mask counts in the meta.
    instrument : dict
        CCD part of the instrument config.
    overscan, flat : dict
        The ``overscan`` and ``flat`` config sections.
    """
    from astropy.io import fits

    from pipeline.core.frames import Frame, write_frame
    from pipeline.core.provenance import stamp

    paths = _as_list(frames)
    if not paths:
        raise CalibrationError(f"{master}: no flat frame given")
    ov_opts = _overscan_kwargs(overscan)
    opts = _options(flat, FLAT_DEFAULTS, "flat")
    mbias = _read_master(bias, kind="bias")
    saturation = instrument.get("saturation_adu")
    readers = []
    try:
        for p in paths:
            reader = _RawRows(p, instrument, ov_opts, saturation_adu=saturation)
            orient = reader.layout.orientation
            if orient.canonical_shape(reader.shape) != mbias.shape:
                reader.close()
                raise CalibrationError(
                    f"{p}: trimmed shape {orient.canonical_shape(reader.shape)} (canonical) "
                    f"differs from the master bias {bias} {mbias.shape}; expected the same "
                    "readout mode")
            reader.bias_raw = np.ascontiguousarray(orient.invert(mbias.data))
            readers.append(reader)
        first = readers[0]
        layout = first.layout
        gain_conf = _configured(first.header, instrument, "gain_e_per_adu", path=first.path)
        rn_conf = _configured(first.header, instrument, "read_noise_e", path=first.path)
        rn_adu = float(mbias.header.get("RNMEAS", -1))   # measured in ADU: gain-independent
        if not rn_adu > 0:
            rn_adu = rn_conf / gain_conf
        # pass 1: each flat whole (one at a time, two for the gain pairs)
        levels, n_sat = [], []
        for r in readers:
            frame = r[0:r.shape[0]]
            levels.append(_flat_scale(frame))
            n_sat.append(int(np.isnan(frame).sum()))
        del frame
        order = np.argsort(levels)
        pair_gains, pair_rows = [], []
        for j in range(0, len(order) - 1, 2):
            a, b = int(order[j]), int(order[j + 1])
            fa, fb = readers[a][0:readers[a].shape[0]], readers[b][0:readers[b].shape[0]]
            bad = ~np.isfinite(fa) | ~np.isfinite(fb)
            fa, fb = np.where(bad, 0, fa), np.where(bad, 0, fb)
            g = measure_gain(fa, fb, read_noise_adu=rn_adu, tile_px=opts["gain_tile_px"],
                             mask=bad)
            pair_gains.append(g.gain_e_per_adu)
            pair_rows.append((Path(paths[a]).name, Path(paths[b]).name, g.gain_e_per_adu,
                              g.info.get("n_tiles", 0), g.info.get("mean_signal_adu", math.nan)))
        finite_gains = [g for g in pair_gains if math.isfinite(g)]
        gain_meas = float(np.median(finite_gains)) if finite_gains else math.nan
        gtol = float(opts["gain_tolerance"])
        gain_ok = bool(math.isfinite(gain_meas) and abs(gain_meas / gain_conf - 1) <= gtol)
        if not math.isfinite(gain_meas):
            warnings.warn(f"{master}: gain not measured (needs two flats of similar level); "
                          f"the configured {gain_conf} e-/ADU will be used",
                          CalibrationQualityWarning)
        elif not gain_ok:
            warnings.warn(f"{master}: measured gain {gain_meas:.4f} e-/ADU differs from the "
                          f"configured {gain_conf} by {100 * (gain_meas / gain_conf - 1):+.1f}% "
                          f"(tolerance {100 * gtol:.0f}%); the configured value will be used",
                          CalibrationQualityWarning)
        gain_for_noise = gain_meas if gain_ok else gain_conf
        comb = combine_flats(readers, gain_e_per_adu=gain_for_noise, read_noise_adu=rn_adu,
                             clip_sigma=opts["clip_sigma"],
                             clip_iterations=opts["clip_iterations"],
                             block_rows=opts["block_rows"], scales_adu=levels)
    finally:
        for r in readers:
            r.close()
    orient = layout.orientation
    combined = np.ascontiguousarray(orient.apply(comb.flat))
    comb_var = np.ascontiguousarray(orient.apply(comb.variance))
    resp = normalise_flat(
        combined, comb_var, lamp_knot_spacing_px=opts["lamp_knot_spacing_px"],
        keep_slit_illumination=opts["keep_slit_illumination"],
        illumination_bin_px=opts["illumination_bin_px"],
        illumination_knot_spacing_px=opts["illumination_knot_spacing_px"],
        min_slit_illumination=opts["min_slit_illumination"], min_flat_snr=opts["min_flat_snr"],
        min_response=opts["min_response"], max_response=opts["max_response"],
        deviant_sigma=opts["deviant_sigma"])
    mask = resp.mask | (mbias.mask & _BAD)
    defects = known_defects_mask(opts["bad_pixel_sections"], layout)
    mask[defects] |= _BAD
    response = np.where(defects, np.float32(1), resp.response).astype(np.float32)
    variance = np.where(defects, np.float32(0), resp.variance).astype(np.float32)
    header = _frame_header(first.header, layout, "master_flat", instrument)
    for key in ("OBJECT", "EXPTIME", "DATE-OBS", "IMAGETYP"):
        if key in header:
            header.remove(key)
    header["NFRAMES"] = (len(paths), "flat frames combined")
    header["GAINMEAS"] = (_finite_or(gain_meas), "e-/ADU measured gain (photon transfer)")
    header["GAINCONF"] = (gain_conf, "e-/ADU configured gain")
    header["GAINOK"] = (gain_ok, "measured gain within tolerance")
    header["RNADU"] = (rn_adu, "ADU read noise used for the flat noise model")
    header["FLATNORM"] = (resp.info["norm"], "normalisation of the response")
    header["FLATILLU"] = (bool(opts["keep_slit_illumination"]), "slit illumination kept")
    stamp(header, inputs=paths, calibrations=[bias])
    lamp_hdu = fits.ImageHDU(resp.lamp_shape.astype(np.float32), name="LAMP")
    lamp_hdu.header["COMMENT"] = "smooth lamp spectrum divided out, along canonical x"
    header["NDEFECT"] = (int(defects.sum()), "pixels of flat.bad_pixel_sections")
    write_frame(Frame(response, variance, mask.astype(MASK_DTYPE), header, unit=""),
                master, extra_hdus=[lamp_hdu])
    # one row per flat (kind 'frame': its level) and per gain pair (kind 'pair': the
    # mean signal of the tiles used, the pair's gain and number of tiles)
    rows = [("frame", Path(p).name, lev, ns, "", math.nan, 0)
            for p, lev, ns in zip(paths, levels, n_sat)]
    rows += [("pair", a, lev, 0, b, g, nt) for a, b, g, nt, lev in pair_rows]
    meta = {"gain_measured_e_per_adu": _finite_or(gain_meas),
            "gain_configured_e_per_adu": gain_conf, "gain_within_tolerance": gain_ok,
            "gain_tolerance": gtol, "read_noise_adu": rn_adu,
            "read_noise_e_measured_gain": _finite_or(rn_adu * gain_meas),
            "n_frames": len(paths), "n_bad": int(((mask & _BAD) != 0).sum()),
            "n_known_defects": int(defects.sum()),
            "n_unilluminated": resp.info["n_unilluminated"], "norm": resp.info["norm"],
            "response_scatter": resp.info["response_scatter"],
            "illuminated_rows": resp.info["illuminated_rows"], "n_clipped": comb.info["n_clipped"]}
    _write_qa(rows, ["kind", "frame", "level_adu", "n_saturated", "pair_with",
                     "pair_gain_e_per_adu", "pair_tiles"], meta, qa)
    log.info("master flat %s: %d frames, gain %.4f e-/ADU (configured %s), %d bad (%d of them "
             "known defects), %d unilluminated pixels", master, len(paths), gain_meas, gain_conf,
             int(((mask & _BAD) != 0).sum()), int(defects.sum()), resp.info["n_unilluminated"])
    return master


def calibrate_frame_file(*, raw, bias, flat, calibrated, frame_type, instrument, overscan=None,
                         calibration=None, keywords=None):
    """CCD-calibrate one arc, standard or science frame (rule ``calibrate_frame``).

    Parameters
    ----------
    raw : str
        Raw frame (never modified).
    bias, flat : str
        Master bias (its readout mode) and master flat (its setup).
    calibrated : str
        Output frame in electrons, canonical orientation, with variance and mask.
    frame_type : str
        'arc', 'standard' or 'science'; cosmic rays are flagged on the latter two.
    instrument : dict
        CCD part of the instrument config.
    overscan, calibration : dict
        The ``overscan`` and ``calibration`` config sections.
    keywords : dict, optional
        ``instrument.keywords``. The values of the configured raw keywords are
        written under the standard names of :data:`STANDARD_KEYWORDS`
        (OBJECT, EXPTIME, DATE-OBS, AIRMASS, RA, DEC, GRATING, GRTILT, SLITWID,
        FILTER, LAMPS), which are the only names later steps read.

    Notes
    -----
    The gain is the master flat's measured value (``GAINMEAS``) when
    ``calibration.use_measured_gain`` and the flat found it within tolerance,
    else the configured value; the read noise is the master bias's measured
    value in ADU times that gain when ``use_measured_read_noise`` and within
    tolerance, else the configured value. Header keywords ``GAIN`` and
    ``RDNOISE`` record what was used, ``GAINSRC``/``RDNSSRC`` where it came from.
    """
    from pipeline.core.frames import Frame, write_frame
    from pipeline.core.provenance import stamp

    opts = _options(calibration, CALIBRATION_DEFAULTS, "calibration")
    ov_opts = _overscan_kwargs(overscan)
    header, raw_adu, layout = _read_raw(raw, instrument)
    mbias = _read_master(bias, kind="bias")
    mflat = _read_master(flat, kind="flat")
    gain = _configured(header, instrument, "gain_e_per_adu", path=raw)
    gain_src = "configured"
    if opts["use_measured_gain"] and mflat.header.get("GAINOK", False) \
            and float(mflat.header.get("GAINMEAS", -1)) > 0:
        gain, gain_src = float(mflat.header["GAINMEAS"]), "measured"
    rn = _configured(header, instrument, "read_noise_e", path=raw)
    rn_src = "configured"
    rn_meas = float(mbias.header.get("RNMEAS", -1)) * gain
    if opts["use_measured_read_noise"] and rn_meas > 0:
        tol = float(mbias.header.get("RNTOL", BIAS_DEFAULTS["read_noise_tolerance"]))
        if abs(rn_meas / rn - 1) <= tol:
            rn, rn_src = rn_meas, "measured"
        else:
            warnings.warn(f"{calibrated}: measured read noise {rn_meas:.3f} e- (master bias "
                          f"{Path(bias).name} x gain {gain:.4f}) differs from the configured "
                          f"{rn:.3f} e- by more than {100 * tol:.0f}%; the configured value is "
                          "used", CalibrationQualityWarning)
    shape = layout.orientation.canonical_shape(layout.data.shape)
    for name, m in (("bias", mbias), ("flat", mflat)):
        if m.shape != shape:
            raise CalibrationError(f"{raw}: trimmed frame {shape} does not match the master "
                                   f"{name} {bias if name == 'bias' else flat} {m.shape}")
    cr = opts["cosmic_rays"]
    do_cr = bool(cr.get("enabled", True)) and frame_type in ("standard", "science")
    try:
        result = calibrate_ccd(
            raw_adu, data_section=layout.data, overscan_section=layout.overscan,
            orientation=layout.orientation, gain_e_per_adu=gain, read_noise_e=rn,
            saturation_adu=instrument.get("saturation_adu"), bias_adu=mbias.data,
            bias_variance_adu2=mbias.variance, bias_mask=mbias.mask, flat=mflat.data,
            flat_variance=mflat.variance, flat_mask=mflat.mask,
            include_flat_error=opts["include_flat_error"], cosmic_rays=do_cr,
            cosmic_ray_options={k: cr[k] for k in ("sigclip", "sigfrac", "objlim", "niter")},
            overscan_options=ov_opts)
    except ValueError as exc:
        raise InputFileError(raw, str(exc)) from None
    out_header = _frame_header(header, layout, frame_type, instrument,
                               keep=[v for v in (keywords or {}).values() if isinstance(v, str)])
    for card in standard_keyword_cards(header, keywords):
        out_header[card[0]] = card[1:]
    out_header["GAIN"] = (gain, "e-/ADU gain used to convert to electrons")
    out_header["GAINSRC"] = (gain_src, "where GAIN came from")
    out_header["RDNOISE"] = (rn, "e- read noise used in the variance")
    out_header["RDNSSRC"] = (rn_src, "where RDNOISE came from")
    out_header["NSATUR"] = (result.info["n_saturated"], "saturated pixels")
    out_header["CRFLAGGD"] = (do_cr, "cosmic rays searched (van Dokkum 2001)")
    out_header["NCOSMIC"] = (result.info["n_cosmic"], "pixels flagged as cosmic rays")
    if result.info["overscan"]:
        out_header["OVSCLEV"] = (result.info["overscan"]["mean_adu"], "ADU mean overscan level")
        out_header["OVSCMETH"] = (result.info["overscan"]["method"], "overscan fit method")
    stamp(out_header, inputs=[raw], calibrations=[bias, flat])
    write_frame(Frame(result.data_e, result.variance_e2, result.mask, out_header,
                      unit="electron"), calibrated)
    log.info("calibrated %s (%s): gain %.4f (%s), read noise %.3f e- (%s), %d saturated, "
             "%d cosmic-ray pixels", raw, frame_type, gain, gain_src, rn, rn_src,
             result.info["n_saturated"], result.info["n_cosmic"])
    return calibrated
