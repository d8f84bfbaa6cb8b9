"""Gain and read noise: photon-transfer gain of flat pairs, and which gain and read noise a frame uses.

The decisions live here as pure functions with their reasons: :func:`assess_gain`
(the master flat's measured gain against the configured one),
:func:`flat_noise_read_noise_adu` (read noise of the flat noise model) and
:func:`choose_gain_and_read_noise` (what ``calibrate_frame`` converts and weights with).
"""

import math
from dataclasses import dataclass, field

import numpy as np

from pipeline.core.checks import as_2d, positive
from pipeline.ccd.stacking import TRUNCATION_4SIGMA

__all__ = ["GainMeasurement", "measure_gain", "GainCheck", "assess_gain",
           "flat_noise_read_noise_adu", "NoiseChoice", "choose_gain_and_read_noise"]


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
    a = as_2d(flat_a_adu, "flat_a_adu", dtype=np.float32)
    b = as_2d(flat_b_adu, "flat_b_adu", dtype=np.float32)
    if a.shape != b.shape:
        raise ValueError(f"`flat_b_adu` must have the shape of `flat_a_adu` {a.shape}, "
                         f"got {b.shape}")
    rn = positive(read_noise_adu, "read_noise_adu", allow_zero=True)
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
    var /= TRUNCATION_4SIGMA ** 2
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
class GainCheck:
    """The gain measured on a set of flats against the configured gain.

    Attributes
    ----------
    measured_e_per_adu : float
        Median of the finite pair gains (nan when none).
    configured_e_per_adu : float
    tolerance : float
    within_tolerance : bool
    for_noise_model_e_per_adu : float
        The gain of the flat noise model: the measured one when within tolerance.
    message : str
        Why the configured value will be used ('' when the measurement agrees).
    """

    measured_e_per_adu: float
    configured_e_per_adu: float
    tolerance: float
    within_tolerance: bool
    for_noise_model_e_per_adu: float
    message: str = ""


def assess_gain(pair_gains, *, configured_e_per_adu, tolerance):
    """Combine the gains of flat pairs and compare with the configured gain.

    Examples
    --------
    >>> c = assess_gain([1.52, float("nan"), 1.50], configured_e_per_adu=1.45, tolerance=0.2)
    >>> round(c.measured_e_per_adu, 2), c.within_tolerance, c.for_noise_model_e_per_adu
    (1.51, True, 1.51)
    >>> assess_gain([], configured_e_per_adu=1.45, tolerance=0.2).for_noise_model_e_per_adu
    1.45
    """
    finite = [float(g) for g in pair_gains if math.isfinite(g)]
    measured = float(np.median(finite)) if finite else math.nan
    ok = bool(math.isfinite(measured) and abs(measured / configured_e_per_adu - 1) <= tolerance)
    if not math.isfinite(measured):
        message = (f"gain not measured (needs two flats of similar level); the configured "
                   f"{configured_e_per_adu} e-/ADU will be used")
    elif not ok:
        message = (f"measured gain {measured:.4f} e-/ADU differs from the configured "
                   f"{configured_e_per_adu} by {100 * (measured / configured_e_per_adu - 1):+.1f}% "
                   f"(tolerance {100 * tolerance:.0f}%); the configured value will be used")
    else:
        message = ""
    return GainCheck(measured, float(configured_e_per_adu), float(tolerance), ok,
                     measured if ok else float(configured_e_per_adu), message)


def flat_noise_read_noise_adu(bias_read_noise_adu, *, configured_e, configured_gain_e_per_adu):
    """Read noise (ADU) of the flat noise model.

    The master bias's measured value (``RNMEAS``, ADU: independent of the gain) when it
    was measured (> 0), else the configured read noise over the configured gain.

    >>> flat_noise_read_noise_adu(-1.0, configured_e=3.0, configured_gain_e_per_adu=1.5)
    2.0
    """
    value = float(bias_read_noise_adu) if bias_read_noise_adu is not None else -1.0
    return value if value > 0 else configured_e / configured_gain_e_per_adu


@dataclass(frozen=True)
class NoiseChoice:
    """The gain and read noise a calibrated frame uses, and where each came from.

    Attributes
    ----------
    gain_e_per_adu : float
    gain_source : {'measured', 'configured'}
    read_noise_e : float
    read_noise_source : {'measured', 'configured'}
    message : str
        Why a measured read noise was not used ('' otherwise).
    """

    gain_e_per_adu: float
    gain_source: str
    read_noise_e: float
    read_noise_source: str
    message: str = ""


def choose_gain_and_read_noise(*, configured_gain_e_per_adu, configured_read_noise_e,
                               flat_gain_e_per_adu=-1.0, flat_gain_ok=False,
                               bias_read_noise_adu=-1.0, read_noise_tolerance=0.2,
                               use_measured_gain=True, use_measured_read_noise=True):
    """Which gain and read noise to calibrate a frame with, and why.

    The gain is the master flat's measured value when ``use_measured_gain`` and the flat
    found it within tolerance (``flat_gain_ok``), else the configured value. The read
    noise is the master bias's measured value in ADU times that gain when
    ``use_measured_read_noise`` and within ``read_noise_tolerance`` of the configured
    value, else the configured value (with a message saying why).

    Examples
    --------
    >>> c = choose_gain_and_read_noise(configured_gain_e_per_adu=1.5, configured_read_noise_e=3.0,
    ...                                flat_gain_e_per_adu=1.6, flat_gain_ok=True,
    ...                                bias_read_noise_adu=2.0)
    >>> c.gain_e_per_adu, c.gain_source, round(c.read_noise_e, 3), c.read_noise_source
    (1.6, 'measured', 3.2, 'measured')
    >>> choose_gain_and_read_noise(configured_gain_e_per_adu=1.5, configured_read_noise_e=3.0,
    ...                            bias_read_noise_adu=4.0).read_noise_source
    'configured'
    """
    gain, gain_src = float(configured_gain_e_per_adu), "configured"
    if use_measured_gain and flat_gain_ok and float(flat_gain_e_per_adu) > 0:
        gain, gain_src = float(flat_gain_e_per_adu), "measured"
    rn, rn_src, message = float(configured_read_noise_e), "configured", ""
    rn_meas = float(bias_read_noise_adu) * gain
    if use_measured_read_noise and rn_meas > 0:
        if abs(rn_meas / rn - 1) <= read_noise_tolerance:
            rn, rn_src = rn_meas, "measured"
        else:
            message = (f"measured read noise {rn_meas:.3f} e- (master bias x gain {gain:.4f}) "
                       f"differs from the configured {rn:.3f} e- by more than "
                       f"{100 * read_noise_tolerance:.0f}%; the configured value is used")
    return NoiseChoice(gain, gain_src, rn, rn_src, message)
