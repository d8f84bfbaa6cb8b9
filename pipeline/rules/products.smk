# The manifest and the morning report (the product lists they check are in common.smk).

# the configured limits the report marks each calibration against
REPORT_LIMITS = {
    "read_noise_tolerance": config["bias"]["read_noise_tolerance"],
    "gain_tolerance": config["flat"]["gain_tolerance"],
    "wavelength_max_rms_px": config["wavelength_solution"]["max_rms_px"],
    "sensitivity_max_rms_percent": config["report"]["sensitivity_max_rms_percent"],
}


rule manifest:
    input:
        products=reduction_products(),
        night_log=out("night_log.ecsv"),
    output:
        manifest=out("manifest.ecsv"),
    params:
        out_dir=lambda wildcards, output: str(Path(output.manifest).parent),
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
        out_dir=lambda wildcards, output: str(Path(output.report).parent),
        title=f"{INSTRUMENT['name']} night report: {RAW}",
        limits=REPORT_LIMITS,
        spatial_scale_arcsec_per_px=INSTRUMENT["spatial_scale_arcsec_per_px"],
    log:
        log_path("night_report", "night_report"),
    script:
        RUN_STEP


onerror:
    # Some jobs failed (the others ran to the end with keep-going): list what exists and
    # what is missing, so the morning report still shows the night.
    from pipeline.products.manifest import write_manifest_file
    from pipeline.products.report import write_night_report_file

    try:
        if Path(out("night_log.ecsv")).exists():
            write_manifest_file(products=reduction_products(), night_log=out("night_log.ecsv"),
                                manifest=out("manifest.ecsv"), out_dir=str(OUT))
            write_night_report_file(manifest=out("manifest.ecsv"), night_log=out("night_log.ecsv"),
                                    report=out("night_report.html"), out_dir=str(OUT),
                                    title=f"{INSTRUMENT['name']} night report (incomplete): {RAW}",
                                    limits=REPORT_LIMITS,
                                    spatial_scale_arcsec_per_px=INSTRUMENT["spatial_scale_arcsec_per_px"])
            print(f"incomplete night: see {out('night_report.html')} and {out('manifest.ecsv')}",
                  file=sys.stderr)
    except Exception as exc:
        print(f"could not write the manifest of the incomplete night: {exc}", file=sys.stderr)
