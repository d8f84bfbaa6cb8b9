# The night log (pipeline/night/): every raw file with its type, setup, status and reason.

rule night_log:
    input:
        raw_frames=[rec.path for rec in NIGHT.records],
    output:
        night_log=out("night_log.ecsv"),
    params:
        raw_dir=lambda wildcards: str(RAW),
        instrument=INSTRUMENT,
        screening=config.get("inventory"),
        observing=config.get("observing"),
    log:
        log_path("night_log", "night_log"),
    script:
        RUN_STEP
