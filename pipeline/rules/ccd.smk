# CCD calibration (pipeline/ccd/): master bias per
# readout mode, master flat per setup, and calibrated arcs, standards and science frames.
# Each rule's params hold exactly the config values its step reads, so changing a flat
# option reruns the flats and what follows, not the biases.

rule master_bias:
    input:
        frames=lambda wc: [rec.path for rec in NIGHT.frames("bias") if rec.readout == wc.readout],
    output:
        master=out("calibrations", "master_bias_{readout}.fits"),
        qa=out("calibrations", "master_bias_{readout}_qa.ecsv"),
    wildcard_constraints:
        readout=r"[A-Za-z0-9.-]+(_[A-Za-z0-9.-]+)*",
    params:
        instrument=ccd_instrument(saturation=False),
        overscan=config.get("overscan", {}),
        bias=config.get("bias", {}),
    log:
        log_path("master_bias", "{readout}"),
    script:
        RUN_STEP


rule master_flat:
    input:
        frames=lambda wc: [rec.path for rec in NIGHT.flats_for(wc.setup)],
        bias=lambda wc: master_bias_path(NIGHT.setup_readout(wc.setup)),
    output:
        master=out("calibrations", "master_flat_{setup}.fits"),
        qa=out("calibrations", "master_flat_{setup}_qa.ecsv"),
    wildcard_constraints:
        setup=r"[A-Za-z0-9._-]+",
    params:
        instrument=ccd_instrument(),
        overscan=config.get("overscan", {}),
        flat=config.get("flat", {}),
    log:
        log_path("master_flat", "{setup}"),
    script:
        RUN_STEP


rule calibrate_frame:
    input:
        unpack(_frame_calibrations),
    output:
        calibrated=out("calibrated", "{frame}.fits"),
    wildcard_constraints:
        frame=r"[A-Za-z0-9._-]+",
    params:
        frame_type=lambda wc: NIGHT.record(wc.frame).frame_type,
        instrument=key_order_free(ccd_instrument()),
        keywords=key_order_free(INSTRUMENT.get("keywords", {})),
        overscan=config.get("overscan", {}),
        calibration=calibration_options,
    log:
        log_path("calibrate_frame", "{frame}"),
    script:
        RUN_STEP
