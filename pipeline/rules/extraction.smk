# From calibrated 2-D frames to 1-D spectra (pipeline/extraction/steps.py; science in frame.py, rectify.py, flexure.py,
# sky.py, trace.py, spectra.py, qa_extraction.py): one job per standard or science frame.
# Objects are masked and the sky fitted on the native pixels, the flexure measured on the
# night-sky lines, the sky-subtracted frame rectified, the objects traced and extracted.
# Science frames borrow the trace shape of the setup's standard star (nearest in time) for
# their faint objects, so their jobs wait for the standard's.
rule extract_spectra:
    input:
        frame=out("calibrated", "{frame}.fits"),
        wavelength=lambda wc: out("wavelength",
                                  f"{NIGHT.nearest_arc(wc.frame).frame_id}_solution.fits"),
        reference=lambda wc: extraction_reference(wc.frame),
        sky_lines=EXTRACTION_SKY_LINES,
    output:
        rectified=out("rectified", "{frame}.fits"),
        flexure_table=out("qa", "{frame}_flexure.ecsv"),
        traces=out("qa", "{frame}_traces.ecsv"),
        spectra=directory(out("spectra", "{frame}")),
        qa_rectified=report(out("qa", "{frame}_rectified.png"), category="Extraction",
                            caption="captions/extraction_rectified.rst"),
        qa_spectra=report(out("qa", "{frame}_spectra.png"), category="Extraction",
                          caption="captions/extraction_spectra.rst"),
    wildcard_constraints:
        frame=_EX_PATTERN,
    params:
        frame_id=lambda wc: wc.frame,
        frame_type=lambda wc: NIGHT.record(wc.frame).frame_type,
        setup=lambda wc: NIGHT.record(wc.frame).setup,
        spatial_scale_arcsec_per_px=INSTRUMENT["spatial_scale_arcsec_per_px"],
        rectification=config.get("rectification", {}),
        flexure=EXTRACTION_FLEXURE,
        sky=config.get("sky", {}),
        tracing=config.get("tracing", {}),
        extraction=config.get("extraction", {}),
    log:
        log_path("extract_spectra", "{frame}"),
    script:
        RUN_STEP
