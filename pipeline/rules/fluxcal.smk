# Flux calibration (pipeline/fluxcal/): one sensitivity per setup from the setup's
# standard-star spectra, applied to every science spectrum of the setup (and, as a check, to
# the standards themselves). A setup without a usable standard keeps its extraction products
# as its (uncalibrated) spectra; the listing in spectra_fluxed/{frame}/ and the job's log say
# why. Nothing here fails the night.


rule fit_sensitivity:
    input:
        spectra=lambda wc: PLAN.standard_spectra(wc.setup),
        flux_tables=lambda wc: PLAN.standard_flux_tables(wc.setup),
        extinction_table=PLAN.extinction_table(),
        rectified=lambda wc: PLAN.standard_rectified(wc.setup),
    output:
        sensitivity=PLAN.out("flux", "sensitivity_{setup}.fits"),
        qa_table=PLAN.out("flux", "sensitivity_{setup}_qa.ecsv"),
        qa_plot=report(PLAN.out("qa", "sensitivity_{setup}.png"), category="Flux calibration",
                       caption="captions/fluxcal_sensitivity.rst"),
    wildcard_constraints:
        setup=r"[A-Za-z0-9._-]+",
    params:
        setup=lambda wc: wc.setup,
        **PLAN.sensitivity_params(),
    # one cluster job per setup: the sensitivity and the standards calibrated with it
    group:
        "sensitivity_{setup}"
    log:
        PLAN.log("fit_sensitivity", "{setup}"),
    script:
        RUN_STEP


rule flux_calibrate:
    input:
        spectra=PLAN.out("spectra", "{frame}"),
        rectified=PLAN.out("rectified", "{frame}.fits"),
        sensitivity=lambda wc: PLAN.frame_sensitivity(wc.frame),
        extinction_table=PLAN.extinction_table(),
        flux_table=lambda wc: PLAN.own_flux_table(wc.frame),
    output:
        fluxed=directory(PLAN.out("spectra_fluxed", "{frame}")),
        qa_plot=report(PLAN.out("qa", "{frame}_fluxed.png"), category="Flux calibration",
                       caption="captions/fluxcal_fluxed.rst"),
    wildcard_constraints:
        frame=r"[A-Za-z0-9._-]+",
    params:
        setup=lambda wc: PLAN.setup_of(wc.frame),
        uncalibrated_reason=lambda wc: PLAN.frame_uncalibrated_reason(wc.frame),
        exclude_regions=lambda wc: PLAN.check_exclude_regions(wc.frame),
        **PLAN.flux_calibrate_params(),
    # a science frame's calibration ends its frame's cluster job; a standard's joins the
    # sensitivity's job (in its own frame's job it would make a cycle through fit_sensitivity)
    group:
        lambda wc: (f"sensitivity_{PLAN.setup_of(wc.frame)}"
                    if PLAN.frame_type(wc.frame) == "standard" else f"frame_{wc.frame}")
    log:
        PLAN.log("flux_calibrate", "{frame}"),
    script:
        RUN_STEP
