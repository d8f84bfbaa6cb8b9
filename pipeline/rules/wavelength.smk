# Wavelength calibration (pipeline/wavelength/): lines of every usable arc are found and
# measured, then identified with the grating model as seed and fitted in 1-D and 2-D. A setup
# whose identification fails stops that job with a clear message and writes nothing; the
# other jobs go on (keep-going).


rule find_arc_lines:
    input:
        arc=PLAN.out("calibrated", "{arc}.fits"),
    output:
        lines=PLAN.out("wavelength", "{arc}_lines.ecsv"),
    wildcard_constraints:
        arc=PLAN.arc_pattern(),
    params:
        **PLAN.arc_line_options(),
    group:
        "frame_{arc}"
    log:
        PLAN.log("find_arc_lines", "{arc}"),
    script:
        RUN_STEP


rule solve_wavelength:
    input:
        arc=PLAN.out("calibrated", "{arc}.fits"),
        lines=PLAN.out("wavelength", "{arc}_lines.ecsv"),
        line_list=PLAN.line_list(),
    output:
        solution=PLAN.out("wavelength", "{arc}_solution.fits"),
        qa=PLAN.out("wavelength", "{arc}_qa.ecsv"),
        plot_lines=report(PLAN.out("qa", "{arc}_wavelength_lines.png"), category="Wavelength",
                          caption="captions/wavelength_lines.rst"),
        plot_residuals=report(PLAN.out("qa", "{arc}_wavelength_residuals.png"),
                              category="Wavelength", caption="captions/wavelength_residuals.rst"),
        plot_residual_map=report(PLAN.out("qa", "{arc}_wavelength_residual_map.png"),
                                 category="Wavelength",
                                 caption="captions/wavelength_residual_map.rst"),
        plot_dispersion=report(PLAN.out("qa", "{arc}_wavelength_dispersion.png"),
                               category="Wavelength", caption="captions/wavelength_dispersion.rst"),
    wildcard_constraints:
        arc=PLAN.arc_pattern(),
    params:
        setup=lambda wc: PLAN.setup_of(wc.arc),
        **PLAN.wavelength_params(),
    group:
        "frame_{arc}"
    log:
        PLAN.log("solve_wavelength", "{arc}"),
    script:
        RUN_STEP
