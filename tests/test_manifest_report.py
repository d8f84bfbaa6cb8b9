"""Manifest and night report built from a small invented output folder."""

import numpy as np
from astropy.io import fits
from astropy.table import Table

from pipeline.products.manifest import build_manifest, product_kind, write_manifest_file
from pipeline.products.report import write_night_report_file


def _night_log():
    return Table(rows=[
        ("arc_001", "raw/arc_001.fits", "arc", "SETUPA", "ARC", "ok", ""),
        ("sci_002", "raw/sci_002.fits", "science", "SETUPA", "TFG-42", "ok", ""),
        ("focus_003", "raw/focus_003.fits", "ignored", "", "focus", "ignored", "frame type FOCUS is ignored"),
        ("trunc_004", "raw/trunc_004.fits", "unknown", "", "", "rejected", "truncated file"),
    ], names=("frame_id", "path", "frame_type", "setup", "object", "status", "reason"))


def _out_dir(tmp_path):
    out = tmp_path / "out"
    (out / "calibrated").mkdir(parents=True)
    (out / "qa").mkdir()
    (out / "wavelength").mkdir()
    header = fits.Header({"OBJECT": "TFG-42", "SETUP": "SETUPA", "INPUT01": "sci_002.fits"})
    fits.PrimaryHDU(np.zeros((2, 2), np.float32), header=header).writeto(out / "calibrated" / "sci_002.fits")
    qa = Table({"line": [1, 2], "residual_angstrom": [0.01, -0.02]})
    qa.meta["rms_angstrom"] = 0.0158
    qa.write(out / "wavelength" / "arc_001_qa.ecsv", format="ascii.ecsv")
    (out / "qa" / "arc_001_residuals.png").write_bytes(b"\x89PNG\r\n\x1a\n")
    _night_log().write(out / "night_log.ecsv", format="ascii.ecsv")
    return out


def test_kinds_follow_the_documented_layout():
    assert product_kind("calibrations/master_bias_2x2.fits") == "master_bias"
    assert product_kind("calibrations/master_bias_2x2_qa.ecsv") == "master_bias_qa"
    assert product_kind("spectra/sci_002/TFG-42_ap1.fits") == "spectrum_1d"
    assert product_kind("wavelength/arc_001_solution.fits") == "wavelength_solution"
    assert product_kind("somewhere/else.txt") == "other"


def test_manifest_lists_products_rejects_and_missing(tmp_path):
    out = _out_dir(tmp_path)
    expected = [str(out / "calibrated" / "sci_002.fits"), str(out / "wavelength" / "arc_001_solution.fits")]
    table = build_manifest(out, expected=expected, night_log=_night_log())
    rows = {r["path"]: r for r in table}
    sci = rows["calibrated/sci_002.fits"]
    assert (sci["kind"], sci["object"], sci["setup"], sci["source_frames"], sci["status"]) == (
        "calibrated_frame", "TFG-42", "SETUPA", "sci_002.fits", "ok")
    assert rows["wavelength/arc_001_solution.fits"]["status"] == "missing"
    assert rows["wavelength/arc_001_qa.ecsv"]["source_frames"] == "arc_001.fits"  # from the night log
    rejected = [r for r in table if r["kind"] == "raw_frame"]
    assert {r["status"] for r in rejected} == {"ignored", "rejected"}
    assert any("truncated" in r["note"] for r in rejected)
    assert table.meta["n_missing"] == 1


def test_report_shows_qa_numbers_figures_and_reasons(tmp_path):
    out = _out_dir(tmp_path)
    write_manifest_file(products=[], night_log=str(out / "night_log.ecsv"),
                        manifest=str(out / "manifest.ecsv"), out_dir=str(out))
    report = out / "night_report.html"
    write_night_report_file(manifest=str(out / "manifest.ecsv"), night_log=str(out / "night_log.ecsv"),
                            report=str(report), out_dir=str(out), title="RLS test night")
    text = report.read_text()
    assert "RLS test night" in text
    assert "0.0158" in text                      # QA number from the table's metadata
    assert "<img src='qa/arc_001_residuals.png'" in text
    assert "truncated file" in text
    assert "Wavelength solutions" in text


def test_uncalibrated_fluxed_listing_is_flagged_with_its_reason(tmp_path):
    out = _out_dir(tmp_path)
    (out / "spectra_fluxed" / "sci_002").mkdir(parents=True)
    Table({"object": ["TFG-42"], "status": ["uncalibrated"],
           "reason": ["no standard star in setup SETUPA"]}).write(
        out / "spectra_fluxed" / "sci_002" / "fluxed_spectra.ecsv", format="ascii.ecsv")
    table = build_manifest(out, night_log=_night_log())
    (row,) = table[table["kind"] == "fluxed_listing"]
    assert row["status"] == "uncalibrated"
    assert "no standard star" in row["note"]


def _report(out, **kwargs):
    write_manifest_file(products=kwargs.pop("products", []), night_log=str(out / "night_log.ecsv"),
                        manifest=str(out / "manifest.ecsv"), out_dir=str(out))
    write_night_report_file(manifest=str(out / "manifest.ecsv"), night_log=str(out / "night_log.ecsv"),
                            report=str(out / "r.html"), out_dir=str(out), **kwargs)
    return (out / "r.html").read_text()


def _section(text, section_id):
    return text.split(f"<section id='{section_id}'>")[1].split("</section>")[0]


def test_calibration_summary_marks_the_wavelength_rms_against_the_limit(tmp_path):
    out = _out_dir(tmp_path)
    qa = Table.read(out / "wavelength" / "arc_001_qa.ecsv")
    qa.meta.update(setup="SETUPA", rms_px=0.04, n_used=31)
    qa.write(out / "wavelength" / "arc_001_qa.ecsv", overwrite=True)
    summary = _section(_report(out, limits={"wavelength_max_rms_px": 0.3}), "calibrations")
    assert "SETUPA" in summary and "0.0158" in summary and "0.0400 px" in summary
    assert "<span class='mark pass'>" in summary
    # the same rms against a tighter limit fails (the mark follows the configured limit)
    summary = _section(_report(out, limits={"wavelength_max_rms_px": 0.03}), "calibrations")
    assert "<span class='mark fail'>" in summary


def test_a_missing_solution_is_a_failed_calibration(tmp_path):
    out = _out_dir(tmp_path)
    text = _report(out, products=[str(out / "wavelength" / "arc_001_solution.fits")])
    assert "no solution" in _section(text, "calibrations")
    assert "arc_001_solution.fits" in _section(text, "problems")


def test_job_log_warnings_and_errors_reach_the_report(tmp_path):
    out = _out_dir(tmp_path)
    (out / "logs" / "solve_wavelength").mkdir(parents=True)
    (out / "logs" / "solve_wavelength" / "arc_001.log").write_text(
        "2026-03-15 09:00:00,000 INFO pipeline.solve_wavelength: start\n"
        "2026-03-15 09:00:01,000 WARNING py.warnings: /s/pipeline/wavelength/solve.py:9: "
        "ArcQualityWarning: 4 of 38 arc lines rejected\n  warnings.warn(msg)\n"
        "2026-03-15 09:00:01,500 WARNING py.warnings: /s/numpy/core/_methods.py:9: "
        "RuntimeWarning: Mean of empty slice\n"
        "2026-03-15 09:00:02,000 ERROR pipeline.solve_wavelength: rule solve_wavelength failed:\n"
        "Traceback (most recent call last):\n  File \"x.py\", line 1, in <module>\n"
        "pipeline.core.errors.WavelengthSolutionError: 3 lines left, 5 needed\n")
    problems = _section(_report(out), "problems")
    assert "4 of 38 arc lines rejected" in problems and "ArcQualityWarning" in problems
    assert "WavelengthSolutionError: 3 lines left, 5 needed" in problems
    # library warnings are kept, one click away
    library = problems.split("<details>")[1]
    assert "Mean of empty slice" in library


def test_full_tables_use_words_and_fold_away(tmp_path):
    out = _out_dir(tmp_path)
    tables = _section(_report(out), "tables")
    assert "<details>" in tables and "residual (Å)" in tables
    assert "residual_angstrom" not in tables


def test_combined_spectra_section_flags_a_splice_scale_off_one(tmp_path):
    out = _out_dir(tmp_path)
    (out / "combined").mkdir()
    listing = Table(rows=[
        ("TFG-42", "SETUPA", "TFG-42_SETUPA.fits", "coadd", 3, "a,b,c", "fluxed", "erg", 12.5, 4,
         np.nan, np.nan, ""),
        ("TFG-42", "SETUPA,SETUPB", "TFG-42_spliced.fits", "splice", 4, "a,b,c,d", "fluxed",
         "erg", np.nan, 0, 1.12, 0.01, "scale measured only (flux-calibrated)"),
    ], names=("object", "setup", "file", "kind", "n_exposures", "frames", "input_kind", "unit",
              "snr_median", "n_rejected", "splice_scale", "splice_scale_err", "note"))
    listing.meta.update(velocity_frame="barycentric", vacuum_wavelengths=True)
    listing.write(out / "combined" / "combined.ecsv", format="ascii.ecsv")
    section = _section(_report(out), "coadds")
    assert "vacuum, barycentric" in section
    assert "href='combined/TFG-42_SETUPA.fits'" in section
    assert "1.120 ± 0.010" in section and "<tr class='warn'>" in section   # 12 % off 1


def test_recorded_fallback_shows_in_its_setup_with_a_warning(tmp_path):
    out = _out_dir(tmp_path)
    (out / "calibration_choices").mkdir()
    Table(rows=[("sci_002", "wavelength", "arc_009 (nearest other arc)", True,
                 "arc_001 solution failed"),
                ("sci_002", "flat", "master_flat_SETUPA", False, "")],
          names=("frame", "calibration", "used", "fallback", "reason")).write(
        out / "calibration_choices" / "sci_002.ecsv", format="ascii.ecsv")
    text = _report(out)
    summary = _section(text, "calibrations")
    assert "arc_009 (nearest other arc)" in summary and "arc_001 solution failed" in summary
    assert "master_flat_SETUPA" not in summary          # not a fallback: not listed
    assert "1 calibration fallbacks" in text
