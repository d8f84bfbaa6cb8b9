# Flux calibration (pipeline/fluxcal/sensitivity.py): one sensitivity per setup from the setup's
# standard-star spectra, applied to every science spectrum of the setup (and, as a check,
# to the standards themselves). A setup without a usable standard keeps its extraction
# products as its (uncalibrated) spectra; the listing in spectra_fluxed/{frame}/ and the
# job's log say why. Nothing here fails the night.
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
