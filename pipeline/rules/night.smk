# The night log (pipeline/night/): every raw file with its type, setup, status and reason.


rule night_log:
    input:
        raw_frames=PLAN.raw_paths(),
    output:
        night_log=PLAN.out("night_log.ecsv"),
    params:
        raw_dir=lambda wildcards: PLAN.raw_dir,
        instrument=PLAN.instrument,
        screening=PLAN.screening(),
        observing=PLAN.section("observing"),
    log:
        PLAN.log("night_log", "night_log"),
    script:
        RUN_STEP
