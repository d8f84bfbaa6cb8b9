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
from dataclasses import dataclass, field

import numpy as np

from pipeline.core.checks import as_2d, merge_options, same_shape
from pipeline.core.errors import ConfigError
from pipeline.core.maskbits import MASK_DTYPE
from pipeline.extraction import detect
from pipeline.extraction import flexure as flx
from pipeline.extraction import rectify as rct
from pipeline.extraction import sky as sky_mod
from pipeline.extraction import trace as trc
from pipeline.extraction.detect import object_mask
from pipeline.extraction.extract import extract
from pipeline.extraction.variance import flat_term_by_column, variance_model_coefficients

__all__ = ["FrameReduction", "ObjectsOnSlit", "reduce_frame", "extract_objects",
           "aperture_half_widths", "choose_target", "extracted_snr", "sky_fraction",
           "extraction_verdicts", "object_order", "RECTIFICATION_DEFAULTS",
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
                    "min_bin_snr": 5.0, "use_standard_reference": True,
                    "residual_factor": 1.5, "min_fwhm_seeing": 0.5, "min_extracted_snr": 2.5,
                    "max_sky_fraction": 0.5,
                    "target_offset_arcsec": 0.0, "target_offset_keyword": None}
EXTRACTION_DEFAULTS = {"aperture_fwhm": 1.5, "min_half_width_px": 3.0, "profile_knot_px": 0.5,
                       "profile_wave_order": 2, "profile_smooth_px": 31, "reject_sigma": 5.0,
                       "max_iterations": 20, "profile_error_fraction": 0.02,
                       "max_masked_profile": 0.5, "max_saturated_profile": 0.05,
                       "systematic_fraction": 0.0}


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
        The target first (when there is an object), then the other objects on the
        slit by decreasing detection S/N.
    half_widths_px : list of float
    extractions : list of Extraction
    roles : tuple of str
        ``'target'`` or ``'other'``, one per trace.
    objects_info : dict
        ``expected_target_row_px``, ``residual_level`` and ``profile_noise`` (of the
        collapsed profile), ``seeing_px``, ``not_sources`` (one dict per candidate
        that is not a source: ``row_px``, ``snr``, ``fwhm_px``, ``reason``).
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
    roles: tuple = ()
    objects_info: dict = field(default_factory=dict)


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


def _candidate_row(detection, reason):
    return {"row_px": float(detection.position_px), "snr": float(detection.snr),
            "fwhm_px": float(detection.fwhm_px), "reason": reason}


def choose_target(positions_px, expected_px):
    """Index of the target: the object nearest the expected slit position (None if none).

    Examples
    --------
    >>> choose_target([180.0, 104.0, 40.0], 110.0)
    1
    >>> choose_target([], 110.0) is None
    True
    """
    positions = np.asarray(positions_px, float)
    if positions.size == 0:
        return None
    return int(np.argmin(np.abs(positions - float(expected_px))))


def extracted_snr(extraction):
    """Total S/N of an extracted spectrum: sum of the good fluxes / sqrt(sum of variances)."""
    good = (extraction.mask == 0) & (extraction.variance > 0)
    if not good.any():
        return 0.0
    return float(np.sum(extraction.flux[good]) / np.sqrt(np.sum(extraction.variance[good])))


def sky_fraction(extraction, *, n_continuum=4):
    """Share of an extracted spectrum that has the spectrum of the night sky, and its S/N.

    The flux is fitted as ``alpha * sky + c(lambda)`` (``sky``: the sky model summed over
    the aperture; ``c``: Legendre polynomial of ``n_continuum`` terms) by weighted least
    squares; the night-sky lines pin ``alpha``. Returns ``(alpha * sum(sky) / sum(flux),
    alpha / sigma(alpha))`` over the good pixels ((0, 0) when it cannot be fitted).

    Notes
    -----
    Light that varies from row to row in proportion to the sky (slit-illumination errors,
    slit defects the sky model does not follow) comes out of an extraction with the sky's
    spectrum, lines included; a source's own spectrum does not follow the sky lines.
    """
    from numpy.polynomial import legendre

    good = (extraction.mask == 0) & (extraction.variance > 0) & np.isfinite(extraction.flux)
    sky = np.asarray(extraction.sky, float)
    if good.sum() < n_continuum + 10 or not np.any(sky[good] > 0):
        return 0.0, 0.0
    u = np.linspace(-1.0, 1.0, sky.size)[good]
    design = np.column_stack([sky[good], legendre.legvander(u, n_continuum - 1)])
    w = 1.0 / np.sqrt(extraction.variance[good])
    coef, *_ = np.linalg.lstsq(design * w[:, None], extraction.flux[good] * w, rcond=None)
    try:
        cov = np.linalg.inv((design * w[:, None]).T @ (design * w[:, None]))
    except np.linalg.LinAlgError:
        return 0.0, 0.0
    total = float(np.sum(extraction.flux[good]))
    alpha, err = float(coef[0]), float(np.sqrt(max(cov[0, 0], 0.0)))
    share = alpha * float(np.sum(sky[good])) / total if total > 0 else np.inf
    return share, (alpha / err if err > 0 else 0.0)


def extraction_verdicts(extractions, target, *, min_extracted_snr, max_sky_fraction,
                        min_sky_snr=3.0):
    """Why each extracted object other than the target is not a source ('' = it is one).

    An object detected above the threshold whose extracted spectrum has a total S/N below
    ``min_extracted_snr`` contradicts its detection; one whose light is mostly the night
    sky's spectrum (:func:`sky_fraction` above ``max_sky_fraction``, its coefficient
    detected at ``min_sky_snr``) is a sky-fit residual. The target is always kept.
    """
    out = []
    for i, ex in enumerate(extractions):
        reason = ""
        if i != target:
            snr = extracted_snr(ex)
            share, share_snr = sky_fraction(ex)
            if snr < min_extracted_snr:
                reason = (f"extracted spectrum total S/N {snr:.1f} < {min_extracted_snr:g} "
                          "contradicts its detection")
            elif share > max_sky_fraction and share_snr >= min_sky_snr:
                reason = (f"{100 * share:.0f} % of its light has the night sky's spectrum "
                          f"(> {100 * max_sky_fraction:.0f} %): a sky-fit residual")
        out.append(reason)
    return out


def object_order(traces, target, keep):
    """Indices of the objects kept, the target first, then by decreasing detection S/N.

    Examples
    --------
    >>> from pipeline.extraction.trace import fixed_trace
    >>> tr = [fixed_trace([4e3, 5e3], y, 3.0, snr) for y, snr in ((10, 90.), (50, 20.), (90, 40.))]
    >>> object_order(tr, 1, [True, True, True])
    [1, 0, 2]
    """
    others = sorted((i for i in range(len(traces)) if i != target and keep[i]),
                    key=lambda i: -traces[i].snr)
    return ([target] if target is not None else []) + others


def reduce_frame(data, variance, mask, wave_map, *, line_wave_angstrom=(), line_species=None,
                 spatial_scale_arcsec_per_px=0.4, reference_trace=None, reference_name="",
                 target_offset_arcsec=None, rectification=None, flexure=None, sky=None,
                 tracing=None, extraction=None):
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
    target_offset_arcsec : float, optional
        Expected position of the target along the slit, arcsec from the slit
        centre (default: ``tracing['target_offset_arcsec']``).
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
    # the sky model's error: fully correlated along the slit (one sky spectrum for every
    # row), nearly independent between native pixels one column apart (breakpoints every
    # knot_spacing_px x the dispersion), so a rectified pixel's share is sum(w^2 var); the
    # sum of the standard deviations (full correlation along the dispersion too) made the
    # faint galaxy's variance 10-15 % too large (demo chi2/dof 0.86-0.89)
    sky_err_r = np.sqrt(rct.resample_rows(model.sky_variance, wts, power=2))
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

    offset = to["target_offset_arcsec"] if target_offset_arcsec is None else target_offset_arcsec
    objects = extract_objects(
        rect.data, rect.variance, rect.mask, grid.centres_angstrom(),
        background_variance=bkg_r, signal_variance_factor=gfac,
        signal_variance_quadratic=qfac, sky=sky_r, sky_variance=sky_err_r ** 2,
        expected_row_px=0.5 * (rect.data.shape[0] - 1)
        + float(offset) / spatial_scale_arcsec_per_px,
        fwhm_guess_px=fwhm_px, reference_trace=reference_trace, reference_name=reference_name,
        tracing=to, extraction=eo)
    return FrameReduction(rect, sky_r, sky_err_r ** 2, bkg_r, gfac, qfac, sky_region, wave_corr,
                          flex, model.info, objects.traces, objects.half_widths_px,
                          objects.extractions, objects.roles, objects.info)


@dataclass(frozen=True)
class ObjectsOnSlit:
    """The sources of a rectified frame, traced and extracted (:func:`extract_objects`).

    ``traces``, ``half_widths_px``, ``extractions``, ``roles``: the target first, then the
    other objects by decreasing detection S/N; ``info``: see ``FrameReduction.objects_info``.
    """

    traces: list
    half_widths_px: list
    extractions: list
    roles: tuple
    info: dict


def extract_objects(data, variance, mask, wave_angstrom, *, background_variance=None,
                    signal_variance_factor=None, signal_variance_quadratic=None, sky=None,
                    sky_variance=None, expected_row_px=None, fwhm_guess_px=3.0,
                    reference_trace=None, reference_name="", tracing=None, extraction=None):
    """Find the sources of a rectified, sky-subtracted frame, trace and extract them.

    Candidates (:func:`pipeline.extraction.detect.find_objects`) are reviewed
    (:func:`pipeline.extraction.detect.review_candidates`), traced and extracted; the target
    is the object nearest ``expected_row_px`` (default: the middle row); other objects
    whose extraction contradicts their detection are dropped (:func:`keep_extracted`) and
    the remaining apertures extracted again (a dropped neighbour may have narrowed them).

    Parameters
    ----------
    data, variance, mask : ndarray, shape (ny, n)
        Rectified, sky-subtracted frame.
    wave_angstrom : ndarray, shape (n,)
    background_variance, signal_variance_factor, signal_variance_quadratic, sky, sky_variance
        Variance model and sky (see :func:`pipeline.extraction.extract.extract`).
    expected_row_px : float, optional
        Where the target is expected, row of the rectified frame.
    fwhm_guess_px : float
        Expected seeing FWHM, rows.
    reference_trace, reference_name
        Shape faint objects borrow (see :func:`pipeline.extraction.trace.trace_detections`).
    tracing, extraction : dict, optional
        Options of the config sections.

    Returns
    -------
    ObjectsOnSlit
    """
    to = merge_options(tracing, TRACING_DEFAULTS, "tracing")
    eo = merge_options(extraction, EXTRACTION_DEFAULTS, "extraction")
    ny = data.shape[0]
    expected_row = 0.5 * (ny - 1) if expected_row_px is None else float(expected_row_px)
    profile = detect.spatial_profile(data, variance, mask)
    review = detect.review_candidates(
        profile, detect.find_objects(profile, fwhm_guess_px=fwhm_guess_px,
                                     snr_min=to["snr_min"], max_objects=to["max_objects"]),
        fwhm_guess_px=fwhm_guess_px, residual_factor=to["residual_factor"],
        min_fwhm_seeing=to["min_fwhm_seeing"])
    not_sources = [_candidate_row(d, reason) for d, reason in review.rejected]
    traces = trc.trace_detections(
        data, variance, mask, wave_angstrom, review.objects,
        own_trace_snr=to["own_trace_snr"], n_bins=to["n_bins"], order=to["order"],
        reject_sigma=to["reject_sigma"], min_bin_snr=to["min_bin_snr"],
        reference=reference_trace if to["use_standard_reference"] else None,
        reference_name=reference_name)

    def extract_all(trs):
        half = aperture_half_widths(trs, aperture_fwhm=eo["aperture_fwhm"],
                                    min_half_width_px=eo["min_half_width_px"])
        return half, [extract(
            data, variance, mask, tr.position_px(wave_angstrom), half_width_px=h,
            background_variance=background_variance,
            signal_variance_factor=signal_variance_factor,
            signal_variance_quadratic=signal_variance_quadratic, sky=sky,
            sky_variance=sky_variance, profile_knot_px=eo["profile_knot_px"],
            profile_wave_order=eo["profile_wave_order"],
            profile_smooth_px=eo["profile_smooth_px"], reject_sigma=eo["reject_sigma"],
            max_iterations=eo["max_iterations"],
            profile_error_fraction=eo["profile_error_fraction"],
            max_masked_profile=eo["max_masked_profile"],
            max_saturated_profile=eo["max_saturated_profile"],
            systematic_fraction=eo["systematic_fraction"]) for tr, h in zip(trs, half)]

    half, extractions = extract_all(traces)
    target = choose_target([t.centre_px for t in traces], expected_row)
    verdicts = extraction_verdicts(extractions, target,
                                   min_extracted_snr=to["min_extracted_snr"],
                                   max_sky_fraction=to["max_sky_fraction"])
    for i, verdict in enumerate(verdicts):
        if verdict:
            d = review.objects[i]
            not_sources.append(_candidate_row(d, f"{verdict} (detection S/N {d.snr:.1f})"))
    for row in not_sources:
        warnings.warn(f"candidate at row {row['row_px']:.1f} is not a source: {row['reason']}",
                      trc.TracingWarning)
    order = object_order(traces, target, [not v for v in verdicts])
    if len(order) < len(traces):  # apertures narrowed by a dropped neighbour widen again
        traces = [traces[i] for i in order]
        half, extractions = extract_all(traces)
    else:
        traces = [traces[i] for i in order]
        half = [half[i] for i in order]
        extractions = [extractions[i] for i in order]
    roles = tuple("target" if i == target else "other" for i in order)
    return ObjectsOnSlit(traces, half, extractions, roles,
                         {"expected_target_row_px": expected_row,
                          "residual_level": float(review.residual_level),
                          "profile_noise": float(review.noise),
                          "seeing_px": float(review.seeing_px),
                          "not_sources": not_sources})
