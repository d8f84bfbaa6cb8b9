"""The adapters of the flux-calibration rules: read, call one function, write.

``fit_sensitivity_file`` (rule ``fit_sensitivity``): one sensitivity per setup from its
standard-star frames (:func:`pipeline.fluxcal.setup_sensitivity.sensitivity_for_setup`).
``flux_calibrate_file`` (rule ``flux_calibrate``): every spectrum of one frame
calibrated with its setup's sensitivity (:func:`pipeline.fluxcal.calibrate.calibrate_frame`).
Keyword arguments are the rules' named inputs, outputs and params. Neither adapter
fails the night: a setup without a usable standard gets a product that says why, and
its frames' listings name the uncalibrated extraction products.
"""

import logging
import warnings
from pathlib import Path

from pipeline.core.errors import FluxCalibrationWarning, InputFileError, PipelineError
from pipeline.core.frames import read_frame
from pipeline.fluxcal.calibrate import CalibrationOptions, calibrate_frame
from pipeline.fluxcal.extinction import read_extinction_table
from pipeline.fluxcal.inputs import read_spectra_directory, read_spectrum, read_trace_rows
from pipeline.fluxcal.products import (LISTING_NAME, read_sensitivity,
                                       sensitivity_qa_table, write_fluxed_spectrum,
                                       write_listing, write_sensitivity)
from pipeline.fluxcal.setup_sensitivity import (SensitivityOptions, StandardObservation,
                                                sensitivity_for_setup)
from pipeline.fluxcal.flux_tables import read_flux_table

__all__ = ["fit_sensitivity_file", "flux_calibrate_file", "load_standard", "load_extinction"]

log = logging.getLogger(__name__)


def _paths(value):
    """A rule input as a list of paths ('' / None / [] give none)."""
    if value is None:
        return []
    if isinstance(value, (str, Path)):
        return [] if str(value) == "" else [str(value)]
    return [str(v) for v in value]


def load_extinction(extinction_table):
    """The site curve, or None (warned) when no table is configured."""
    paths = _paths(extinction_table)
    if not paths:
        warnings.warn("no extinction table configured (instrument.site.extinction_table is "
                      "null): spectra are NOT corrected for atmospheric extinction",
                      FluxCalibrationWarning, stacklevel=3)
        return None
    return read_extinction_table(paths[0])


def load_standard(directory, table_path, rectified_path=None):
    """Read one standard frame's flux table and spectra (with their traces and the
    rectified frame when ``rectified_path`` is given); problems are recorded, not raised."""
    frame = Path(directory).name
    try:
        table = read_flux_table(table_path)
        spectra, traces = [], []
        for path, _ in read_spectra_directory(directory):
            try:
                spectra.append(read_spectrum(path))
                traces.append(read_trace_rows(path) if rectified_path else None)
            except InputFileError as exc:
                warnings.warn(str(exc), FluxCalibrationWarning, stacklevel=2)
        rectified = read_frame(rectified_path) if rectified_path else None
    except (PipelineError, ValueError) as exc:
        return StandardObservation(frame, str(table_path), problem=str(exc))
    return StandardObservation(frame, str(table_path), table, tuple(spectra),
                               rectified=rectified, traces=tuple(traces))


def fit_sensitivity_file(*, spectra, flux_tables, sensitivity, qa_table, qa_plot,
                         extinction_table=None, rectified=None, setup="", fit_kind="spline",
                         knot_spacing_angstrom=250.0, degree=3, clip_sigma=3.0,
                         max_iterations=5, exclude_regions=(), error_floor_mag=0.002,
                         max_extrapolation_angstrom=150.0, slit_loss_model="none",
                         slit_centring_rms_arcsec=0.0, spatial_scale_arcsec_per_px=None,
                         seeing_exponent=-0.2,
                         telluric_bands=(), telluric_correction=False,
                         telluric_airmass_exponent=0.6, airmass_policy="computed",
                         airmass_warn_difference=0.01, site=None):
    """Adapter of rule ``fit_sensitivity``: one sensitivity per setup.

    Parameters
    ----------
    spectra : list of str
        The extraction step's spectra directories of the setup's standard frames.
    flux_tables : list of str
        The flux table of each standard (same order as ``spectra``; one table
        serves them all).
    sensitivity, qa_table, qa_plot : str
        Outputs: the sensitivity product (FITS), the QA table (ECSV: one row
        per standard) and the QA figure (PNG).
    extinction_table : str or None
        Site extinction table; None means no extinction correction (warned).
    rectified : list of str, optional
        The rectified frame of each standard (same order as ``spectra``); read
        only by the 'moffat' slit-loss model.
    setup : str
    fit_kind, knot_spacing_angstrom, degree, clip_sigma, max_iterations, \
max_extrapolation_angstrom, exclude_regions, error_floor_mag, slit_loss_model, \
slit_centring_rms_arcsec, spatial_scale_arcsec_per_px, seeing_exponent, telluric_bands, telluric_correction, \
telluric_airmass_exponent, site
        See :class:`~pipeline.fluxcal.setup_sensitivity.SensitivityOptions` and
        config/schema.yaml (``flux_calibration``).
    airmass_policy, airmass_warn_difference
        ``observing.airmass`` and ``observing.airmass_warn_difference``.

    Returns
    -------
    SensitivityFit or None
        None when no sensitivity could be fitted (the product says why).
    """
    from pipeline.fluxcal import qa

    dirs, tables = _paths(spectra), _paths(flux_tables)
    if len(tables) == 1 and len(dirs) > 1:
        tables = tables * len(dirs)
    if len(tables) != len(dirs):
        raise ValueError(f"`flux_tables` must name one table per standard spectra directory: "
                         f"{len(dirs)} directories, {len(tables)} tables")
    options = SensitivityOptions(
        fit_kind=fit_kind, knot_spacing_angstrom=knot_spacing_angstrom, degree=degree,
        clip_sigma=clip_sigma, max_iterations=max_iterations, error_floor_mag=error_floor_mag,
        max_extrapolation_angstrom=max_extrapolation_angstrom,
        exclude_regions=tuple(map(tuple, exclude_regions or ())),
        telluric_bands=tuple(map(tuple, telluric_bands or ())),
        telluric_correction=telluric_correction,
        telluric_airmass_exponent=telluric_airmass_exponent,
        slit_loss_model=slit_loss_model, slit_centring_rms_arcsec=slit_centring_rms_arcsec,
        spatial_scale_arcsec_per_px=spatial_scale_arcsec_per_px,
        seeing_exponent=seeing_exponent, airmass_policy=airmass_policy,
        airmass_warn_difference=airmass_warn_difference, site=site)
    extinction, extinction_problem = None, ""
    try:
        extinction = load_extinction(extinction_table)
    except InputFileError as exc:
        extinction_problem = str(exc)
    frames = _paths(rectified) if slit_loss_model == "moffat" else []
    if slit_loss_model == "moffat" and len(frames) != len(dirs):
        raise ValueError(f"the 'moffat' slit-loss model needs one rectified frame per standard: "
                         f"{len(dirs)} spectra directories, {len(frames)} rectified frames")
    observations = ([] if extinction_problem else
                    [load_standard(d, t, r) for d, t, r in
                     zip(dirs, tables, frames or [None] * len(dirs))])
    result = sensitivity_for_setup(observations, setup=setup, extinction=extinction,
                                   options=options, extinction_problem=extinction_problem)

    calibrations = list(dict.fromkeys(tables)) + _paths(extinction_table)
    write_sensitivity(sensitivity, result.fit, result.points, setup=setup,
                      standards=result.standards, reason=result.reason,
                      status="ok" if result.fit is not None else "failed",
                      inputs=result.inputs, calibrations=calibrations,
                      telluric=result.telluric, header_extra=result.header_cards)
    sensitivity_qa_table(result.rows, result.meta).write(qa_table, format="ascii.ecsv",
                                                         overwrite=True)
    if result.fit is None:
        message = f"setup {setup}: no sensitivity ({result.reason}); its science spectra stay " \
                  "uncalibrated"
        log.warning(message)
        warnings.warn(message, FluxCalibrationWarning, stacklevel=2)
        qa.plot_message(qa_plot, f"no sensitivity for setup {setup}:\n{result.reason}",
                        title=f"sensitivity {setup}")
        return None
    fit = result.fit
    qa.plot_sensitivity(fit, result.points, qa_plot, exclude_regions=options.exclude_regions,
                        telluric_bands=options.telluric_bands,
                        title=f"sensitivity of setup {setup} from {', '.join(result.standards)}")
    log.info("setup %s: sensitivity from %s, %.1f-%.1f A, rms %.2f %% per pixel "
             "(%.2f %% binned), %d of %d pixels rejected", setup, ", ".join(result.standards),
             fit.wave_min, fit.wave_max, fit.info["rms_percent"],
             fit.info["rms_binned_percent"], fit.info["n_rejected"], fit.info["n_points"])
    return fit


def flux_calibrate_file(*, spectra, fluxed, qa_plot=None, sensitivity=None,
                        extinction_table=None, rectified=None, setup="", uncalibrated_reason="",
                        include_sensitivity_error=False, spatial_scale_arcsec_per_px=None,
                        seeing_exponent=-0.2, extended_fwhm_ratio=1.5,
                        slit_centring_rms_arcsec=0.0, flux_table=None, exclude_regions=(),
                        airmass_policy="computed", airmass_warn_difference=0.01, site=None):
    """Adapter of rule ``flux_calibrate``: calibrate every spectrum of one frame.

    Parameters
    ----------
    spectra : str
        The extraction step's spectra directory of the frame.
    fluxed : str
        Output directory: one calibrated FITS per input spectrum (same file
        name) and the listing ``fluxed_spectra.ecsv``.
    qa_plot : str, optional
        PNG of the calibrated spectra.
    sensitivity : str or empty list
        The setup's sensitivity product; empty when the setup has none.
    extinction_table : str or None
    rectified : str, optional
        The frame's rectified frame; read when the sensitivity's slit-loss model
        (SLITMOD) is 'moffat'.
    setup : str
    uncalibrated_reason : str
        Why there is no sensitivity (set by the rule when the setup has no
        usable standard); used when ``sensitivity`` is empty.
    include_sensitivity_error, spatial_scale_arcsec_per_px, seeing_exponent, \
extended_fwhm_ratio, slit_centring_rms_arcsec, exclude_regions, airmass_policy, \
airmass_warn_difference, site
        See :class:`~pipeline.fluxcal.calibrate.CalibrationOptions`.
    flux_table : str or empty list, optional
        For a standard-star frame: its flux table; the calibrated spectrum is
        compared with it (listing columns ``table_ratio_median`` and
        ``table_ratio_rms_percent``; the table is drawn in the QA figure).

    Returns
    -------
    list of dict
        The listing's rows.
    """
    from pipeline.fluxcal import qa

    out_dir = Path(fluxed)
    out_dir.mkdir(parents=True, exist_ok=True)
    frame = Path(spectra).name
    options = CalibrationOptions(
        include_sensitivity_error=include_sensitivity_error,
        spatial_scale_arcsec_per_px=spatial_scale_arcsec_per_px,
        seeing_exponent=seeing_exponent, extended_fwhm_ratio=extended_fwhm_ratio,
        slit_centring_rms_arcsec=slit_centring_rms_arcsec,
        exclude_regions=tuple(map(tuple, exclude_regions or ())),
        airmass_policy=airmass_policy, airmass_warn_difference=airmass_warn_difference,
        site=site)
    sens_paths = _paths(sensitivity)
    fit, reason, sens_header = None, str(uncalibrated_reason or ""), None
    if sens_paths:
        fit, sens_header = read_sensitivity(sens_paths[0])
        if fit is None:
            reason = (f"sensitivity of setup {setup} failed: "
                      f"{sens_header.get('REASON', 'no reason recorded')}")
    elif not reason:
        reason = f"no sensitivity for setup {setup}"
    extinction, reference = None, None
    if fit is not None:
        try:
            extinction = load_extinction(extinction_table)
        except InputFileError as exc:
            fit, reason = None, f"extinction table unusable: {exc}"
            warnings.warn(reason, FluxCalibrationWarning, stacklevel=2)
    table_paths = _paths(flux_table)
    if table_paths and fit is not None:
        try:
            reference = read_flux_table(table_paths[0])
        except InputFileError as exc:
            warnings.warn(f"no comparison with the standard's table: {exc}",
                          FluxCalibrationWarning, stacklevel=2)
    profiles_needed = (fit is not None and sens_header.get("SLITMOD") == "moffat"
                       and bool(_paths(rectified)))
    frame_2d = read_frame(_paths(rectified)[0]) if profiles_needed else None
    entries = []
    for path, listed in read_spectra_directory(spectra):
        spectrum, trace = None, None
        if fit is not None:
            try:
                spectrum = read_spectrum(path)
                trace = read_trace_rows(path) if profiles_needed else None
            except InputFileError as exc:
                spectrum = str(exc)
        entries.append((path, listed, spectrum, trace))
    result = calibrate_frame(entries, frame=frame, out_dir=out_dir, setup=setup,
                             sensitivity=fit, sensitivity_header=sens_header,
                             sensitivity_name=Path(sens_paths[0]).name if sens_paths else "",
                             extinction=extinction, options=options, reason=reason,
                             reference=reference, rectified=frame_2d)
    for target, done in result.products:
        write_fluxed_spectrum(target, done.spectrum, done.calibrated,
                              header_extra=done.header_cards,
                              calibrations=sens_paths[:1] + _paths(extinction_table))
    if not entries:
        log.info("frame %s: the extraction wrote no spectrum; nothing to calibrate", frame)
    write_listing(out_dir / LISTING_NAME, result.rows, result.meta)
    if qa_plot:
        if result.plotted:
            qa.plot_fluxed_spectra(result.plotted, qa_plot, title=f"{frame} ({setup})",
                                   reference=reference)
        else:
            qa.plot_message(qa_plot, f"{frame}: no calibrated spectrum\n"
                            f"{reason or 'no spectrum extracted'}", title=frame)
    return list(result.rows)
