"""The 2-D to 1-D reduction of one standard or science frame, as pure functions.

:func:`reduce_frame` runs, in this order: objects found on the native frame and
masked (:func:`pipeline.extraction.detect.object_mask`); the noise model
(:mod:`pipeline.extraction.variance`); the sky fit on the native pixels
(:func:`pipeline.extraction.sky.fit_sky`); the flexure on the sky pixels
(:mod:`pipeline.extraction.flexure`); the rectification of the sky-subtracted
frame, the sky model and the variance models with the same weights
(:mod:`pipeline.extraction.rectify`); tracing (:mod:`pipeline.extraction.trace`)
and extraction (:func:`pipeline.extraction.extract.extract`) of every object.

The option dictionaries are the config sections; their defaults
(``*_DEFAULTS``) are the values of ``config/schema.yaml`` (a test checks that).
"""

import warnings
from dataclasses import dataclass

import numpy as np

from pipeline.core.checks import as_2d, merge_options, same_shape
from pipeline.core.errors import ConfigError
from pipeline.core.maskbits import MASK_DTYPE
from pipeline.extraction import flexure as flx
from pipeline.extraction import rectify as rct
from pipeline.extraction import sky as sky_mod
from pipeline.extraction import trace as trc
from pipeline.extraction.detect import object_mask
from pipeline.extraction.extract import extract
from pipeline.extraction.variance import flat_term_by_column, variance_model_coefficients

__all__ = ["FrameReduction", "reduce_frame", "aperture_half_widths", "RECTIFICATION_DEFAULTS",
           "FLEXURE_DEFAULTS", "SKY_DEFAULTS", "TRACING_DEFAULTS", "EXTRACTION_DEFAULTS"]

#: Defaults of the config sections (the values of config/schema.yaml; tests/test_extract.py checks)
RECTIFICATION_DEFAULTS = {"wavelength_grid": "linear", "step_angstrom": None,
                          "velocity_step_kms": None, "start_angstrom": None,
                          "end_angstrom": None}
FLEXURE_DEFAULTS = {"enabled": True, "line_list": None, "use_unverified_lines": False,
                    "window_fwhm": 3.0, "max_shift_angstrom": 10.0, "min_line_snr": 10.0,
                    "blend_fwhm": 2.5, "warn_shift_px": 1.0}
SKY_DEFAULTS = {"knot_spacing_px": 0.6, "spatial_order": 0, "fit_illumination": True,
                "reject_sigma": 5.0, "max_iterations": 8, "object_snr_min": 5.0,
                "object_pad_fwhm": 1.5}
TRACING_DEFAULTS = {"fwhm_guess_arcsec": 1.2, "snr_min": 5.0, "max_objects": 5,
                    "own_trace_snr": 30.0, "n_bins": 24, "order": 3, "reject_sigma": 3.0,
                    "min_bin_snr": 5.0, "use_standard_reference": True}
EXTRACTION_DEFAULTS = {"aperture_fwhm": 1.5, "min_half_width_px": 3.0, "profile_knot_px": 0.5,
                       "profile_wave_order": 2, "profile_smooth_px": 31, "reject_sigma": 5.0,
                       "max_iterations": 20, "profile_error_fraction": 0.02,
                       "max_masked_profile": 0.5, "max_saturated_profile": 0.05}


@dataclass(frozen=True)
class FrameReduction:
    """Everything the 2-D to 1-D reduction of one frame produced.

    Attributes
    ----------
    rectified : pipeline.extraction.rectify.RectifiedFrame
        Sky-subtracted frame on the wavelength grid.
    sky : ndarray, shape (ny, n_pix), electron
        Rectified sky model.
    sky_variance : ndarray, shape (ny, n_pix), electron^2
        Variance of the sky model (correlated along the slit).
    background_variance : ndarray, shape (ny, n_pix), electron^2
        Noise-free variance of read noise and sky photons.
    signal_variance_factor : ndarray, shape (ny, n_pix)
        Variance per electron of object signal.
    signal_variance_quadratic : ndarray, shape (ny, n_pix)
        Flat-field variance term (see :func:`extract`).
    sky_region : ndarray of bool, shape (ny, n_pix)
        Pixels used as sky (objects masked).
    wave_map : ndarray, shape (ny, nx), Angstrom
        Flexure-corrected wavelength map of the native frame.
    flexure : pipeline.extraction.flexure.FlexureResult
    sky_info : dict
    traces : list of pipeline.extraction.trace.Trace
        Aperture 1 first.
    half_widths_px : list of float
    extractions : list of Extraction
    """

    rectified: object
    sky: np.ndarray
    sky_variance: np.ndarray
    background_variance: np.ndarray
    signal_variance_factor: np.ndarray
    signal_variance_quadratic: np.ndarray
    sky_region: np.ndarray
    wave_map: np.ndarray
    flexure: object
    sky_info: dict
    traces: list
    half_widths_px: list
    extractions: list


def aperture_half_widths(traces, *, aperture_fwhm, min_half_width_px):
    """Aperture half widths (rows): ``aperture_fwhm`` x FWHM, at least ``min_half_width_px``,
    narrowed to half the gap to a neighbour so apertures never overlap.

    Examples
    --------
    >>> from pipeline.extraction.trace import fixed_trace
    >>> tr = [fixed_trace([4000.0, 5000.0], y, 4.0, 10.0) for y in (20.0, 60.0)]
    >>> aperture_half_widths(tr, aperture_fwhm=1.5, min_half_width_px=3.0)
    [6.0, 6.0]
    """
    half = [max(aperture_fwhm * t.fwhm_px, min_half_width_px) for t in traces]
    for i, t in enumerate(traces):
        for j, u in enumerate(traces):
            if i == j:
                continue
            gap = abs(t.centre_px - u.centre_px)
            if half[i] > 0.5 * gap:
                warnings.warn(f"aperture {i + 1} narrowed from {half[i]:.1f} to {0.5 * gap:.1f} "
                              f"rows: aperture {j + 1} is {gap:.1f} rows away", trc.TracingWarning)
                half[i] = max(0.5 * gap, 1.0)
    return half


def reduce_frame(data, variance, mask, wave_map, *, line_wave_angstrom=(), line_species=None,
                 spatial_scale_arcsec_per_px=0.4, reference_trace=None, reference_name="",
                 rectification=None, flexure=None, sky=None, tracing=None, extraction=None):
    """Rectify, correct flexure, subtract the sky, trace and extract one frame.

    Parameters
    ----------
    data : ndarray, shape (ny, nx), electron
        Calibrated frame in canonical orientation.
    variance : ndarray, shape (ny, nx), electron^2
    mask : ndarray of uint8, shape (ny, nx)
    wave_map : ndarray, shape (ny, nx), Angstrom
        Wavelength of every pixel from the arc solution.
    line_wave_angstrom : array_like
        Night-sky line wavelengths (air) for the flexure.
    line_species : sequence of str, optional
    spatial_scale_arcsec_per_px : float
        Slit scale of one (binned) row.
    reference_trace : pipeline.extraction.trace.Trace, optional
        Bright reference whose shape faint objects borrow.
    reference_name : str
    rectification, flexure, sky, tracing, extraction : dict, optional
        Options of the config sections (defaults: ``*_DEFAULTS`` of this module, the schema's).

    Returns
    -------
    FrameReduction

    Notes
    -----
    Order of the steps: objects are found on the native frame and masked; the
    sky is fitted on the native pixels (:func:`pipeline.extraction.sky.fit_sky`); the
    flexure is measured on the sky pixels against the night-sky lines and the
    wavelength map corrected (the sky subtraction itself does not depend on
    it: the sky model is a function of the arc wavelengths); the
    sky-subtracted frame, the sky model and the variance models are rectified
    with the same weights; objects are traced and extracted on the rectified
    frame.
    """
    ro = merge_options(rectification, RECTIFICATION_DEFAULTS, "rectification")
    fo = merge_options(flexure, FLEXURE_DEFAULTS, "flexure")
    so = merge_options(sky, SKY_DEFAULTS, "sky")
    to = merge_options(tracing, TRACING_DEFAULTS, "tracing")
    eo = merge_options(extraction, EXTRACTION_DEFAULTS, "extraction")
    if ro["wavelength_grid"] not in ("linear", "log"):
        raise ConfigError(f"rectification.wavelength_grid = {ro['wavelength_grid']!r}; "
                          "expected 'linear' or 'log'")
    data = as_2d(data, "data", dtype=float)
    variance = as_2d(variance, "variance", dtype=float)
    mask = as_2d(mask, "mask", dtype=MASK_DTYPE)
    wave_map = as_2d(wave_map, "wave_map", dtype=float)
    same_shape([data, variance, mask, wave_map], ["data", "variance", "mask", "wave_map"])
    fwhm_px = to["fwhm_guess_arcsec"] / spatial_scale_arcsec_per_px

    sky_pixels, _ = object_mask(data, variance, mask, wave_map, fwhm_guess_px=fwhm_px,
                                    snr_min=so["object_snr_min"], pad_fwhm=so["object_pad_fwhm"],
                                    max_objects=to["max_objects"])
    # variance = a + b * signal over all good pixels (objects give the slope its lever arm)
    var_coef = variance_model_coefficients(data, variance, mask)
    model = sky_mod.fit_sky(data, variance, mask, wave_map, sky_pixels,
                            variance_coefficients=var_coef,
                            knot_spacing_px=so["knot_spacing_px"],
                            spatial_order=so["spatial_order"],
                            fit_illumination=so["fit_illumination"],
                            reject_sigma=so["reject_sigma"], max_iterations=so["max_iterations"])
    lines = np.atleast_1d(np.asarray(line_wave_angstrom, float))
    if fo["enabled"] and lines.size:
        flex = flx.measure_flexure(data, variance, mask, wave_map, sky_pixels & ~model.rejected,
                                   lines, line_species=line_species,
                                   window_fwhm=fo["window_fwhm"],
                                   max_shift_angstrom=fo["max_shift_angstrom"],
                                   min_snr=fo["min_line_snr"], blend_fwhm=fo["blend_fwhm"],
                                   warn_shift_px=fo["warn_shift_px"])
    else:
        from astropy.table import Table  # only for a disabled flexure

        flex = flx.FlexureResult(0.0, float("nan"), 0.0, Table(), "disabled", {})
    wave_corr = flx.apply_flexure(wave_map, flex.shift_px)
    d_ss, v_ss, m_ss = sky_mod.subtract_sky(data, variance, mask, model)

    grid = rct.wavelength_grid(wave_corr, step_angstrom=ro["step_angstrom"],
                               start_angstrom=ro["start_angstrom"],
                               end_angstrom=ro["end_angstrom"],
                               log=ro["wavelength_grid"] == "log",
                               velocity_step_kms=ro["velocity_step_kms"])
    rect = rct.rectify(d_ss, v_ss, m_ss, wave_corr, grid)
    wts = rect.weights
    sky_r = rct.resample_rows(model.sky, wts)
    sky_err_r = rct.resample_rows(np.sqrt(model.sky_variance), wts)  # fully correlated locally
    bkg_r = rct.resample_rows(model.background_variance, wts, power=2)
    wsum = wts.weight_sum
    _, b_coef, _ = model.info["variance_coefficients"]
    safe = np.where(wsum > 0, wsum, 1.0)
    gfac = b_coef * np.where(wsum > 0, wts.weight_sq_sum / safe, 0.0)
    # flat-field term per column (the flat's relative error changes along the dispersion);
    # the rectified pixel's term is the weighted mean of c over its input pixels
    c_col = flat_term_by_column(data, variance, mask, var_coef)
    c_r = rct.resample_rows(np.broadcast_to(c_col[None, :], data.shape), wts) / safe
    qfac = c_r * np.where(wsum > 0, wts.weight_sq_sum / safe ** 2, 0.0)
    sky_region = rct.resample_rows(sky_pixels.astype(float), wts) > 0.5 * wsum
    for arr in (sky_r, sky_err_r, bkg_r, gfac, qfac):
        arr[~wts.covered] = 0.0

    wave_grid = grid.centres_angstrom()
    traces = trc.trace_frame(rect.data, rect.variance, rect.mask, wave_grid,
                             fwhm_guess_px=fwhm_px, snr_min=to["snr_min"],
                             max_objects=to["max_objects"], own_trace_snr=to["own_trace_snr"],
                             n_bins=to["n_bins"], order=to["order"],
                             reject_sigma=to["reject_sigma"], min_bin_snr=to["min_bin_snr"],
                             reference=reference_trace if to["use_standard_reference"] else None,
                             reference_name=reference_name)
    half = aperture_half_widths(traces, aperture_fwhm=eo["aperture_fwhm"],
                        min_half_width_px=eo["min_half_width_px"])
    extractions = []
    for tr, h in zip(traces, half):
        extractions.append(extract(
            rect.data, rect.variance, rect.mask, tr.position_px(wave_grid), half_width_px=h,
            background_variance=bkg_r, signal_variance_factor=gfac,
            signal_variance_quadratic=qfac, sky=sky_r,
            sky_variance=sky_err_r ** 2, profile_knot_px=eo["profile_knot_px"],
            profile_wave_order=eo["profile_wave_order"],
            profile_smooth_px=eo["profile_smooth_px"], reject_sigma=eo["reject_sigma"],
            max_iterations=eo["max_iterations"],
            profile_error_fraction=eo["profile_error_fraction"],
            max_masked_profile=eo["max_masked_profile"],
            max_saturated_profile=eo["max_saturated_profile"]))
    return FrameReduction(rect, sky_r, sky_err_r ** 2, bkg_r, gfac, qfac, sky_region, wave_corr,
                          flex, model.info, traces, half, extractions)
