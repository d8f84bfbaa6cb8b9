# The night's product list, the manifest and the morning report.
# (calibration_outputs/wavelength_outputs follow the layout in DEVELOPERS.md;
#  extraction_products, fluxcal_products and sensitivity_products come from their rule files.)


def calibration_outputs():
    files = [out("calibrations", f"master_bias_{readout}.fits") for readout in NIGHT.readouts()]
    files += [out("calibrations", f"master_flat_{setup}.fits") for setup in NIGHT.setups()]
    for setup in NIGHT.setups():
        for rec in NIGHT.arcs_for(setup) + NIGHT.frames("standard", setup=setup) + NIGHT.frames(
            "science", setup=setup
        ):
            files.append(out("calibrated", f"{rec.frame_id}.fits"))
    return files


def wavelength_outputs():
    files = []
    for setup in NIGHT.setups():
        for arc in NIGHT.arcs_for(setup):
            files += [
                out("wavelength", f"{arc.frame_id}_lines.ecsv"),
                out("wavelength", f"{arc.frame_id}_solution.fits"),
                out("wavelength", f"{arc.frame_id}_qa.ecsv"),
            ]
    return files


def reduction_products():
    files = [out("night_log.ecsv")] + calibration_outputs() + wavelength_outputs()
    for setup in NIGHT.setups():
        for rec in NIGHT.frames("standard", setup=setup) + NIGHT.frames("science", setup=setup):
            files += extraction_products(rec.frame_id)
        for rec in NIGHT.frames("science", setup=setup):
            files += fluxcal_products(rec.frame_id)
        files += sensitivity_products(setup)
    return list(dict.fromkeys(files))


def all_products():
    return reduction_products() + [out("manifest.ecsv"), out("night_report.html")]


rule manifest:
    input:
        products=reduction_products(),
        night_log=out("night_log.ecsv"),
    output:
        manifest=out("manifest.ecsv"),
    params:
        out_dir=str(OUT),
    log:
        log_path("manifest", "manifest"),
    script:
        RUN_STEP


rule night_report:
    input:
        manifest=out("manifest.ecsv"),
        night_log=out("night_log.ecsv"),
    output:
        report=out("night_report.html"),
    params:
        out_dir=str(OUT),
        title=f"{INSTRUMENT['name']} night report: {RAW}",
    log:
        log_path("night_report", "night_report"),
    script:
        RUN_STEP


onerror:
    # Some jobs failed (the others ran to the end with keep-going): list what exists and
    # what is missing, so the morning report still shows the night.
    from pipeline.manifest import write_manifest_file
    from pipeline.report import write_night_report_file

    try:
        if Path(out("night_log.ecsv")).exists():
            write_manifest_file(products=reduction_products(), night_log=out("night_log.ecsv"),
                                manifest=out("manifest.ecsv"), out_dir=str(OUT))
            write_night_report_file(manifest=out("manifest.ecsv"), night_log=out("night_log.ecsv"),
                                    report=out("night_report.html"), out_dir=str(OUT),
                                    title=f"{INSTRUMENT['name']} night report (incomplete): {RAW}")
            print(f"incomplete night: see {out('night_report.html')} and {out('manifest.ecsv')}",
                  file=sys.stderr)
    except Exception as exc:
        print(f"could not write the manifest of the incomplete night: {exc}", file=sys.stderr)
