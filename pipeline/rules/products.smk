# The manifest and the morning report (the product lists they check come from the plan).


rule manifest:
    input:
        products=PLAN.reduction_products(),
        night_log=PLAN.out("night_log.ecsv"),
    output:
        manifest=PLAN.out("manifest.ecsv"),
    params:
        out_dir=lambda wildcards, output: PLAN.folder_of(output.manifest),
    log:
        PLAN.log("manifest", "manifest"),
    script:
        RUN_STEP


rule night_report:
    input:
        manifest=PLAN.out("manifest.ecsv"),
        night_log=PLAN.out("night_log.ecsv"),
    output:
        report=PLAN.out("night_report.html"),
    params:
        out_dir=lambda wildcards, output: PLAN.folder_of(output.report),
        title=PLAN.report_title(),
        **PLAN.report_params(),
    log:
        PLAN.log("night_report", "night_report"),
    script:
        RUN_STEP


onerror:
    # Some jobs failed (the others ran to the end with keep-going): list what exists and what
    # is missing, so the morning report still shows the night.
    from pipeline.workflow.plan import write_incomplete_night

    write_incomplete_night(PLAN)
