# Flux calibration (pipeline/fluxcal.py): one sensitivity per setup from the setup's
# standard-star spectra, applied to every science spectrum of the setup (and, as a check,
# to the standards themselves). A setup without a usable standard keeps its extraction
# products as its (uncalibrated) spectra; the listing in spectra_fluxed/{frame}/ and the
# job's log say why. Nothing here fails the night.
from pipeline.fluxcal import normalise_object_name as _fc_key

FLUXCAL = config.get("flux_calibration", {})
_FC_TABLES = {_fc_key(name): path for name, path in FLUXCAL.get("standard_flux_tables", {}).items()}
_FC_SITE = {key: INSTRUMENT["site"][key] for key in ("latitude_deg", "longitude_deg", "height_m")}
_FC_EXTINCTION = INSTRUMENT["site"].get("extinction_table") or []


def fluxcal_standards(setup):
    """(frame record, flux-table path) of the setup's usable standards that have a table."""
    return [(rec, _FC_TABLES[_fc_key(rec.object)]) for rec in NIGHT.standards_for(setup)
            if _fc_key(rec.object) in _FC_TABLES]


def fluxcal_missing_reason(setup):
    """Why a setup gets no sensitivity ('' when it gets one)."""
    if fluxcal_standards(setup):
        return ""
    standards = NIGHT.standards_for(setup)
    if not standards:
        return f"setup {setup} has no usable standard-star frame"
    names = sorted({rec.object for rec in standards})
    return (f"no flux table for standard OBJECT {', '.join(repr(n) for n in names)} "
            "(add it to flux_calibration.standard_flux_tables)")


def sensitivity_products(setup):
    """Sensitivity product, QA table and figure of a setup, plus its calibrated standards."""
    if not fluxcal_standards(setup):
        return []
    files = [out("flux", f"sensitivity_{setup}.fits"), out("flux", f"sensitivity_{setup}_qa.ecsv"),
             out("qa", f"sensitivity_{setup}.png")]
    for rec, _ in fluxcal_standards(setup):
        files += fluxcal_products(rec.frame_id)
    return files


def fluxcal_products(frame_id):
    """Calibrated spectra directory and QA figure of a science or standard frame."""
    rec = NIGHT.record(frame_id)
    if rec.frame_type not in ("science", "standard") or rec.status != "ok":
        return []
    return [out("spectra_fluxed", frame_id), out("qa", f"{frame_id}_fluxed.png")]


def _fc_own_table(frame_id):
    """A standard frame's flux table (for the end-to-end check); [] for other frames."""
    rec = NIGHT.record(frame_id)
    if rec.frame_type != "standard":
        return []
    return _FC_TABLES.get(_fc_key(rec.object), [])


def _fc_sensitivity_input(wildcards):
    setup = NIGHT.record(wildcards.frame).setup
    return out("flux", f"sensitivity_{setup}.fits") if fluxcal_standards(setup) else []


rule fit_sensitivity:
    input:
        spectra=lambda wc: [out("spectra", rec.frame_id) for rec, _ in fluxcal_standards(wc.setup)],
        flux_tables=lambda wc: [table for _, table in fluxcal_standards(wc.setup)],
        extinction_table=_FC_EXTINCTION,
    output:
        sensitivity=out("flux", "sensitivity_{setup}.fits"),
        qa_table=out("flux", "sensitivity_{setup}_qa.ecsv"),
        qa_plot=report(out("qa", "sensitivity_{setup}.png"), category="Flux calibration",
                       caption="captions/fluxcal_sensitivity.rst"),
    wildcard_constraints:
        setup=r"[A-Za-z0-9._-]+",
    params:
        setup=lambda wc: wc.setup,
        fit_kind=FLUXCAL.get("fit_kind", "spline"),
        knot_spacing_angstrom=FLUXCAL.get("knot_spacing_angstrom", 250.0),
        degree=FLUXCAL.get("degree", 3),
        clip_sigma=FLUXCAL.get("clip_sigma", 3.0),
        max_iterations=FLUXCAL.get("max_iterations", 5),
        error_floor_mag=FLUXCAL.get("error_floor_mag", 0.002),
        max_extrapolation_angstrom=FLUXCAL.get("max_extrapolation_angstrom", 150.0),
        slit_loss_correction=FLUXCAL.get("slit_loss_correction", False),
        spatial_scale_arcsec_per_px=INSTRUMENT["spatial_scale_arcsec_per_px"],
        seeing_exponent=FLUXCAL.get("seeing_exponent", -0.2),
        exclude_regions=FLUXCAL.get("exclude_regions_angstrom", []),
        telluric_bands=FLUXCAL.get("telluric_bands_angstrom", []),
        telluric_correction=FLUXCAL.get("telluric_correction", False),
        telluric_airmass_exponent=FLUXCAL.get("telluric_airmass_exponent", 0.6),
        site=_FC_SITE,
    log:
        log_path("fit_sensitivity", "{setup}"),
    script:
        RUN_STEP


rule flux_calibrate:
    input:
        spectra=out("spectra", "{frame}"),
        sensitivity=_fc_sensitivity_input,
        extinction_table=_FC_EXTINCTION,
        flux_table=lambda wc: _fc_own_table(wc.frame),
    output:
        fluxed=directory(out("spectra_fluxed", "{frame}")),
        qa_plot=report(out("qa", "{frame}_fluxed.png"), category="Flux calibration",
                       caption="captions/fluxcal_fluxed.rst"),
    wildcard_constraints:
        frame=r"[A-Za-z0-9._-]+",
    params:
        setup=lambda wc: NIGHT.record(wc.frame).setup,
        uncalibrated_reason=lambda wc: fluxcal_missing_reason(NIGHT.record(wc.frame).setup),
        include_sensitivity_error=FLUXCAL.get("include_sensitivity_error", False),
        spatial_scale_arcsec_per_px=INSTRUMENT["spatial_scale_arcsec_per_px"],
        seeing_exponent=FLUXCAL.get("seeing_exponent", -0.2),
        extended_fwhm_ratio=FLUXCAL.get("extended_fwhm_ratio", 1.5),
        exclude_regions=lambda wc: (FLUXCAL.get("exclude_regions_angstrom", [])
                                    + FLUXCAL.get("telluric_bands_angstrom", [])
                                    if _fc_own_table(wc.frame) else []),
        site=_FC_SITE,
    log:
        log_path("flux_calibrate", "{frame}"),
    script:
        RUN_STEP
