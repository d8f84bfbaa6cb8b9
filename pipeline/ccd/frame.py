"""Frame calibration: overscan, trim, orient, bias, gain, flat, variance, mask and cosmic rays."""

import warnings
from dataclasses import dataclass, field

import numpy as np

from pipeline.core.checks import as_2d, positive
from pipeline.core.errors import CalibrationQualityWarning
from pipeline.core.maskbits import MASK_DTYPE, MaskBit
from pipeline.ccd.cards import calibrated_header, standard_keyword_cards
from pipeline.ccd.cosmics import find_cosmic_rays
from pipeline.ccd.gain import choose_gain_and_read_noise
from pipeline.ccd.overscan import correct_and_trim
from pipeline.ccd.screening import pixel_problem, pixel_statistics

__all__ = ["CalibratedFrame", "calibrate_ccd", "FrameProduct", "cosmic_ray_search_wanted",
           "raw_noise_keywords", "noise_cards", "calibrate_raw_frame"]

# mask bits as uint8 scalars, so in-place ORs keep the mask dtype
_BAD = MASK_DTYPE(MaskBit.BAD_PIXEL)
_SAT = MASK_DTYPE(MaskBit.SATURATED)
_CR = MASK_DTYPE(MaskBit.COSMIC_RAY)
_NONFINITE = MASK_DTYPE(MaskBit.NONFINITE)


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
    raw = as_2d(raw_adu, "raw_adu", dtype=np.float32)
    gain = positive(gain_e_per_adu, "gain_e_per_adu")
    rn = positive(read_noise_e, "read_noise_e", allow_zero=True)
    # Whole-frame passes are what this costs at full size: each array below is made once
    # and then updated in place (the same float32 operations, in the same order).
    nonfinite_raw = ~np.isfinite(raw)
    any_nonfinite = bool(nonfinite_raw.any())
    raw_clean = np.where(nonfinite_raw, 0, raw) if any_nonfinite else raw
    data_adu, ov_fit = correct_and_trim(raw_clean, data_section=data_section,
                                        overscan_section=overscan_section,
                                        orientation=orientation,
                                        overscan_options=overscan_options)
    rows, cols = data_section.slices
    shape = data_adu.shape
    mask = np.zeros(shape, dtype=MASK_DTYPE)
    n_saturated = 0
    if saturation_adu is not None:
        saturated_raw = raw[rows, cols] >= saturation_adu
        n_saturated = int(np.count_nonzero(saturated_raw))
        if n_saturated:
            mask[np.ascontiguousarray(orientation.apply(saturated_raw))] |= _SAT
        del saturated_raw
    if any_nonfinite:
        mask[np.ascontiguousarray(orientation.apply(nonfinite_raw[rows, cols]))] |= _NONFINITE
    del nonfinite_raw, raw_clean
    for name, arr in (("bias_adu", bias_adu), ("bias_variance_adu2", bias_variance_adu2),
                      ("bias_mask", bias_mask), ("flat", flat), ("flat_variance", flat_variance),
                      ("flat_mask", flat_mask)):
        if arr is not None and np.shape(arr) != shape:
            raise ValueError(f"`{name}` has shape {np.shape(arr)}, expected {shape} (the "
                             "trimmed, oriented frame)")
    data = data_adu                       # a new array: electrons, then flat-fielded, in place
    var = np.empty(shape, dtype=np.float32)
    bias = None if bias_adu is None else np.asarray(bias_adu, dtype=np.float32)
    bias_var = None if bias_variance_adu2 is None else _finite_or_zero(
        np.asarray(bias_variance_adu2, np.float32))
    fl = None if flat is None else np.asarray(flat, dtype=np.float32)
    flat_var = None
    if fl is not None and include_flat_error and flat_variance is not None:
        flat_var = _finite_or_zero(np.asarray(flat_variance, np.float32))
    masks = [np.asarray(m, dtype=MASK_DTYPE) for m in (bias_mask, flat_mask if fl is not None
                                                        else None) if m is not None]
    # blocks of rows small enough to stay in the processor's cache between operations
    block = max(1, _BLOCK_PIXELS // shape[1])
    for r0 in range(0, shape[0], block):
        rs = slice(r0, min(r0 + block, shape[0]))
        _calibrate_rows(data[rs], var[rs], mask[rs], gain=gain, rn=rn,
                        bias=None if bias is None else bias[rs],
                        bias_var=None if bias_var is None else bias_var[rs],
                        flat=None if fl is None else fl[rs],
                        flat_var=None if flat_var is None else flat_var[rs],
                        masks=[m[rs] for m in masks])
    n_cosmic = 0
    if cosmic_rays:
        crmask = find_cosmic_rays(data, read_noise_e=max(rn, 1e-3),
                                  mask=(mask & (_BAD | _SAT | _NONFINITE)) != 0,
                                  **(cosmic_ray_options or {}))
        mask[crmask] |= _CR
        n_cosmic = int(crmask.sum())
    info = {"gain_e_per_adu": gain, "read_noise_e": rn, "n_saturated": n_saturated,
            "n_cosmic": n_cosmic, "overscan": None if ov_fit is None else ov_fit.info}
    return CalibratedFrame(data.astype(np.float32, copy=False),
                           var.astype(np.float32, copy=False), mask, info)


#: pixels per block of rows in :func:`calibrate_ccd` (~1 MB per float32 array)
_BLOCK_PIXELS = 2 ** 18


def _calibrate_rows(data, var, mask, *, gain, rn, bias, bias_var, flat, flat_var, masks):
    """Bias, gain, flat, variance and mask of a block of rows, in place (see calibrate_ccd).

    ``data`` holds overscan-corrected ADU on entry and flat-fielded electrons on return.
    """
    if bias is not None:
        data -= bias
    data *= np.float32(gain)
    np.maximum(data, np.float32(0), out=var)
    var += np.float32(rn ** 2)
    if bias_var is not None:
        var += bias_var * np.float32(gain ** 2)
    for m in masks:
        mask |= m
    if flat is not None:
        bad_flat = ~(flat > 0)                                # NaN and <= 0
        bad_flat |= np.isinf(flat)
        if bad_flat.any():
            flat = np.where(bad_flat, np.float32(1.0), flat)
            mask[bad_flat] |= _BAD
        fl2 = np.square(flat)
        data /= flat
        var /= fl2
        if flat_var is not None:
            term = np.square(data)
            term *= flat_var
            term /= fl2
            var += term
    bad_values = ~np.isfinite(data)
    bad_values |= ~np.isfinite(var)
    if bad_values.any():
        mask[bad_values] |= _NONFINITE
        data[bad_values] = 0
        var[bad_values] = np.float32(rn ** 2 if rn > 0 else 1.0)


def _finite_or_zero(values):
    """``numpy.nan_to_num(values)`` (NaN -> 0, inf -> the largest float), copying only when
    there is something to replace."""
    return values if np.isfinite(values).all() else np.nan_to_num(values)



@dataclass(frozen=True)
class FrameProduct:
    """Everything a calibrated-frame file holds.

    Attributes
    ----------
    frame : CalibratedFrame
    header : astropy.io.fits.Header
        Raw keywords (minus storage and raw-geometry ones), the standard keywords,
        orientation and the calibration cards (without provenance).
    noise : pipeline.ccd.gain.NoiseChoice
    cosmic_rays_searched : bool
    """

    frame: CalibratedFrame
    header: object
    noise: object
    cosmic_rays_searched: bool


def raw_noise_keywords(instrument):
    """Raw keywords that hold the gain and read noise (``instrument.*.keyword``).

    They describe the raw ADU; a calibrated frame in electrons does not carry them (its
    ``GAINUSED``/``RNUSED`` say what was used).

    >>> raw_noise_keywords({"gain_e_per_adu": {"keyword": "GAIN"}, "read_noise_e": {"value": 4.0}})
    ['GAIN']
    """
    names = []
    for quantity in ("gain_e_per_adu", "read_noise_e"):
        spec = instrument.get(quantity)
        if isinstance(spec, dict) and spec.get("keyword"):
            names.append(str(spec["keyword"]).upper())
    return names


def noise_cards(noise):
    """Header cards of the gain and read noise a frame was calibrated with, and their sources.

    >>> from pipeline.ccd.gain import NoiseChoice
    >>> [c[:2] for c in noise_cards(NoiseChoice(1.5, "measured", 3.25, "configured"))]
    [('GAINUSED', 1.5), ('GAINSRC', 'measured'), ('RNUSED', 3.25), ('RNSRC', 'configured')]
    """
    return [("GAINUSED", noise.gain_e_per_adu, "[e-/ADU] gain used to convert to electrons"),
            ("GAINSRC", noise.gain_source,
             "GAINUSED: master flat (measured) or configured"),
            ("RNUSED", noise.read_noise_e, "[e-] read noise used in the variance"),
            ("RNSRC", noise.read_noise_source,
             "RNUSED: master bias (measured) or configured")]


#: frame types whose cosmic rays are flagged (arcs never are: their lines are sharp)
COSMIC_RAY_FRAME_TYPES = ("standard", "science")


def cosmic_ray_search_wanted(frame_type, cosmic_rays):
    """Whether a frame of ``frame_type`` is searched for cosmic rays.

    >>> cosmic_ray_search_wanted("arc", {"enabled": True}), cosmic_ray_search_wanted("science", {})
    (False, True)
    """
    return bool((cosmic_rays or {}).get("enabled", True)) and frame_type in COSMIC_RAY_FRAME_TYPES


def calibrate_raw_frame(raw_adu, raw_header, layout, bias, flat, *, frame_type, instrument,
                        gain_e_per_adu, read_noise_e, keywords=None, use_measured_gain=True,
                        use_measured_read_noise=True, include_flat_error=True,
                        cosmic_rays=None, overscan_options=None,
                        default_read_noise_tolerance=0.2, name="frame"):
    """Calibrate one raw frame with its masters and build its header (rule ``calibrate_frame``).

    Parameters
    ----------
    raw_adu : ndarray, shape (ny_raw, nx_raw), ADU
    raw_header : astropy.io.fits.Header
        Primary + pixel-extension header of the raw frame.
    layout : pipeline.ccd.geometry.FrameLayout
    bias, flat : pipeline.core.frames.Frame
        Master bias (ADU) and master flat (canonical).
    frame_type : str
        'arc', 'standard' or 'science'.
    instrument : dict
        CCD part of the instrument config (saturation, keywords kept in the header).
    gain_e_per_adu, read_noise_e : float
        Configured values (from the raw header or the config).
    keywords : dict, optional
        ``instrument.keywords`` (standard keyword cards).
    use_measured_gain, use_measured_read_noise, include_flat_error, cosmic_rays
        The ``calibration`` config section.
    default_read_noise_tolerance : float
        Used when the master bias has no ``RNTOL``.
    name : str
        Names the product in warnings.

    Returns
    -------
    FrameProduct

    Raises
    ------
    ValueError
        When the data section holds no data (:func:`~pipeline.ccd.screening.pixel_problem`:
        constant, all zero, saturated or NaN almost everywhere), or the masters do not fit.
    """
    rows, cols = layout.data.slices
    problem = pixel_problem(pixel_statistics(np.asarray(raw_adu)[rows, cols],
                                             saturation=instrument.get("saturation_adu")),
                            what=f"{frame_type} frame")
    if problem:
        raise ValueError(f"{problem}; expected a {frame_type} frame with data: copy it again "
                         "from the telescope, or take it out of the raw folder")
    noise = choose_gain_and_read_noise(
        configured_gain_e_per_adu=gain_e_per_adu, configured_read_noise_e=read_noise_e,
        flat_gain_e_per_adu=float(flat.header.get("GAINMEAS", -1)),
        flat_gain_ok=bool(flat.header.get("GAINOK", False)),
        bias_read_noise_adu=float(bias.header.get("RNMEAS", -1)),
        read_noise_tolerance=float(bias.header.get("RNTOL", default_read_noise_tolerance)),
        use_measured_gain=use_measured_gain, use_measured_read_noise=use_measured_read_noise)
    if noise.message:
        warnings.warn(f"{name}: {noise.message}", CalibrationQualityWarning)
    cr = dict(cosmic_rays or {})
    do_cr = cosmic_ray_search_wanted(frame_type, cr)
    result = calibrate_ccd(
        raw_adu, data_section=layout.data, overscan_section=layout.overscan,
        orientation=layout.orientation, gain_e_per_adu=noise.gain_e_per_adu,
        read_noise_e=noise.read_noise_e, saturation_adu=instrument.get("saturation_adu"),
        bias_adu=bias.data, bias_variance_adu2=bias.variance, bias_mask=bias.mask,
        flat=flat.data, flat_variance=flat.variance, flat_mask=flat.mask,
        include_flat_error=include_flat_error, cosmic_rays=do_cr,
        cosmic_ray_options={k: v for k, v in cr.items() if k != "enabled"},
        overscan_options=overscan_options)
    header = calibrated_header(raw_header, layout, frame_type, instrument,
                               keep=[v for v in (keywords or {}).values() if isinstance(v, str)])
    for card in standard_keyword_cards(raw_header, keywords):
        header[card[0]] = card[1:]
    for key in raw_noise_keywords(instrument):
        header.remove(key, ignore_missing=True, remove_all=True)
    for key, value, comment in noise_cards(noise):
        header[key] = (value, comment)
    header["NSATUR"] = (result.info["n_saturated"], "saturated pixels")
    header["CRFLAGGD"] = (do_cr, "cosmic rays searched (van Dokkum 2001)")
    header["NCOSMIC"] = (result.info["n_cosmic"], "pixels flagged as cosmic rays")
    if result.info["overscan"]:
        header["OVSCLEV"] = (result.info["overscan"]["mean_adu"], "ADU mean overscan level")
        header["OVSCMETH"] = (result.info["overscan"]["method"], "overscan fit method")
    return FrameProduct(result, header, noise, do_cr)
