# Science-ready spectra: velocity frame, vacuum wavelengths, coadds and splices (pipeline/combine/).


rule combine_spectra:
    input:
        **PLAN.combine_inputs(),
    output:
        combined=directory(PLAN.out("combined")),
    params:
        site=PLAN.site(),
        options=PLAN.section("combine"),
    log:
        PLAN.log("combine_spectra", "combine_spectra"),
    script:
        RUN_STEP
