# CCD calibration (pipeline/ccd/): master bias per readout mode, master flat per setup, and
# calibrated arcs, standards and science frames. Each rule's params hold exactly the config
# values its step reads, so changing a flat option reruns the flats and what follows, not
# the biases.


rule master_bias:
    input:
        frames=lambda wc: PLAN.bias_frames(wc.readout),
    output:
        master=PLAN.out("calibrations", "master_bias_{readout}.fits"),
        qa=PLAN.out("calibrations", "master_bias_{readout}_qa.ecsv"),
    wildcard_constraints:
        readout=r"[A-Za-z0-9.-]+(_[A-Za-z0-9.-]+)*",
    params:
        instrument=PLAN.ccd_instrument(saturation=False),
        overscan=PLAN.section("overscan"),
        bias=PLAN.section("bias"),
    log:
        PLAN.log("master_bias", "{readout}"),
    script:
        RUN_STEP


rule master_flat:
    input:
        frames=lambda wc: PLAN.flat_frames(wc.setup),
        bias=lambda wc: PLAN.setup_bias_path(wc.setup),
    output:
        master=PLAN.out("calibrations", "master_flat_{setup}.fits"),
        qa=PLAN.out("calibrations", "master_flat_{setup}_qa.ecsv"),
    wildcard_constraints:
        setup=r"[A-Za-z0-9._-]+",
    params:
        instrument=PLAN.ccd_instrument(),
        overscan=PLAN.section("overscan"),
        flat=PLAN.section("flat"),
    log:
        PLAN.log("master_flat", "{setup}"),
    script:
        RUN_STEP


rule calibrate_frame:
    input:
        unpack(lambda wc: PLAN.frame_calibrations(wc.frame)),
    output:
        calibrated=PLAN.out("calibrated", "{frame}.fits"),
    wildcard_constraints:
        frame=r"[A-Za-z0-9._-]+",
    params:
        frame_type=lambda wc: PLAN.frame_type(wc.frame),
        instrument=PLAN.ccd_instrument(),
        keywords=PLAN.keywords(),
        overscan=PLAN.section("overscan"),
        calibration=lambda wc: PLAN.calibration_options(wc.frame),
    # On a cluster, one job per frame: calibrate_frame -> (arcs) find_arc_lines ->
    # solve_wavelength, (standards, science) extract_spectra -> (science) flux_calibrate.
    # Why these groups and not others: DEVELOPERS.md, "Cluster jobs".
    group:
        "frame_{frame}"
    log:
        PLAN.log("calibrate_frame", "{frame}"),
    script:
        RUN_STEP
