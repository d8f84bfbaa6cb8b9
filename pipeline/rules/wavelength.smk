# Wavelength calibration (pipeline/wavelength/arclines.py, pipeline/wavelength/solve.py): lines of every usable
# arc are found and measured, then identified with the grating model as seed and fitted in
# 1-D and 2-D. A setup whose identification fails stops that job with a clear message and
# writes nothing; the other jobs go on (keep-going).
rule find_arc_lines:
    input:
        arc=out("calibrated", "{arc}.fits"),
    output:
        lines=out("wavelength", "{arc}_lines.ecsv"),
    wildcard_constraints:
        arc=_WS_ARC_PATTERN,
    params:
        **config.get("arc_lines", {}),
    log:
        log_path("find_arc_lines", "{arc}"),
    script:
        RUN_STEP


rule solve_wavelength:
    input:
        arc=out("calibrated", "{arc}.fits"),
        lines=out("wavelength", "{arc}_lines.ecsv"),
        line_list=WAVELENGTH_LINE_LIST,
    output:
        solution=out("wavelength", "{arc}_solution.fits"),
        qa=out("wavelength", "{arc}_qa.ecsv"),
        plot_lines=report(out("qa", "{arc}_wavelength_lines.png"), category="Wavelength",
                          caption="captions/wavelength_lines.rst"),
        plot_residuals=report(out("qa", "{arc}_wavelength_residuals.png"), category="Wavelength",
                              caption="captions/wavelength_residuals.rst"),
        plot_residual_map=report(out("qa", "{arc}_wavelength_residual_map.png"),
                                 category="Wavelength", caption="captions/wavelength_residual_map.rst"),
        plot_dispersion=report(out("qa", "{arc}_wavelength_dispersion.png"), category="Wavelength",
                               caption="captions/wavelength_dispersion.rst"),
    wildcard_constraints:
        arc=_WS_ARC_PATTERN,
    params:
        grating=WAVELENGTH_GRATING,
        lamps=WAVELENGTH_LAMPS,
        setup=lambda wc: NIGHT.record(wc.arc).setup,
        tilt_keyword=_WS_KEYWORDS.get("grating_tilt_deg", "GRTILT"),
        lamps_keyword=_WS_KEYWORDS.get("lamps", "LAMPS"),
        filter_keyword=_WS_KEYWORDS.get("filter", "FILTER"),
        **WAVELENGTH_OPTIONS,
    log:
        log_path("solve_wavelength", "{arc}"),
    script:
        RUN_STEP
