# From calibrated 2-D frames to 1-D spectra (pipeline/extraction/): one job per standard or
# science frame. Objects are masked and the sky fitted on the native pixels, the flexure
# measured on the night-sky lines, the sky-subtracted frame rectified, the objects traced and
# extracted. Science frames borrow the trace shape of the setup's standard star (nearest in
# time) for their faint objects, so their jobs wait for the standard's.


rule extract_spectra:
    input:
        frame=PLAN.out("calibrated", "{frame}.fits"),
        wavelength=lambda wc: PLAN.frame_wavelength(wc.frame),
        reference=lambda wc: PLAN.extraction_reference(wc.frame),
        sky_lines=PLAN.sky_lines(),
    output:
        rectified=PLAN.out("rectified", "{frame}.fits"),
        flexure_table=PLAN.out("qa", "{frame}_flexure.ecsv"),
        traces=PLAN.out("qa", "{frame}_traces.ecsv"),
        spectra=directory(PLAN.out("spectra", "{frame}")),
        qa_rectified=report(PLAN.out("qa", "{frame}_rectified.png"), category="Extraction",
                            caption="captions/extraction_rectified.rst"),
        qa_spectra=report(PLAN.out("qa", "{frame}_spectra.png"), category="Extraction",
                          caption="captions/extraction_spectra.rst"),
    wildcard_constraints:
        frame=PLAN.target_pattern(),
    params:
        frame_id=lambda wc: wc.frame,
        frame_type=lambda wc: PLAN.frame_type(wc.frame),
        setup=lambda wc: PLAN.setup_of(wc.frame),
        spatial_scale_arcsec_per_px=PLAN.instrument["spatial_scale_arcsec_per_px"],
        rectification=PLAN.section("rectification"),
        flexure=PLAN.flexure_options(),
        sky=PLAN.section("sky"),
        tracing=PLAN.section("tracing"),
        extraction=PLAN.section("extraction"),
    group:
        "frame_{frame}"
    log:
        PLAN.log("extract_spectra", "{frame}"),
    script:
        RUN_STEP
