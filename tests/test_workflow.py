"""The real `snakemake` command on a small simulated night, in a temporary folder.

Truth comes from outside the pipeline: the demo simulator (demo_data, which
never imports pipeline) makes the night, specutils reads the products back,
and SHA-256 hashes show the raw files are untouched.
"""

import re

import pytest
from astropy.table import Table

# the night (fixture reduced_night) is reduced once per session in conftest.py
from conftest import REPO_ROOT, file_digests as _digests, run_snakemake as _snakemake

pytestmark = pytest.mark.slow


def _planned_rules(dry_run_output):
    """Rule names in the 'Job stats' table of a dry run."""
    rules = set()
    in_stats = False
    for line in dry_run_output.splitlines():
        if line.startswith("Job stats"):
            in_stats = True
            continue
        if in_stats:
            match = re.match(r"^([a-z_]+)\s+(\d+)\s*$", line.strip())
            if match and match.group(1) != "total":
                rules.add(match.group(1))
            elif line.strip() == "" and rules:
                break
    return rules


def test_raw_files_are_byte_identical_after_the_run(reduced_night):
    assert _digests(reduced_night["raw"]) == reduced_night["before"]


def test_night_log_lists_rejections_with_reasons(reduced_night):
    log = Table.read(reduced_night["out"] / "night_log.ecsv", format="ascii.ecsv")
    bad = log[log["status"] != "ok"]
    reasons = " | ".join(str(r) for r in bad["reason"])
    # The simulator's night has a truncated file, a non-FITS file, a frame without EXPTIME
    # and a focus frame (demo_data/README.md).
    assert "truncated" in reasons
    assert "EXPTIME" in reasons
    assert "FOCUS" in reasons
    assert "not a readable FITS" in reasons


def test_manifest_lists_every_product_and_none_is_missing(reduced_night):
    manifest = Table.read(reduced_night["out"] / "manifest.ecsv", format="ascii.ecsv")
    assert "missing" not in set(manifest["status"])
    kinds = set(manifest["kind"])
    for kind in ("master_bias", "master_flat", "calibrated_frame", "wavelength_solution",
                 "spectrum_1d", "qa_figure", "night_log"):
        assert kind in kinds, kind
    for row in manifest[manifest["kind"] != "raw_frame"]:
        assert (reduced_night["out"] / row["path"]).exists(), row["path"]


def test_spectra_open_with_specutils(reduced_night):
    from specutils import Spectrum

    files = sorted((reduced_night["out"] / "spectra").glob("*/*.fits"))
    assert files
    for path in files:
        spec = Spectrum.read(path)
        assert spec.spectral_axis.unit.physical_type == "length"
        assert spec.uncertainty is not None and spec.mask is not None


def test_nothing_left_to_do_after_the_run(reduced_night):
    dry = _snakemake("-n", "--config", *reduced_night["config"])
    assert "Nothing to be done" in dry.stdout + dry.stderr


def test_bad_config_value_stops_the_run_naming_the_key(reduced_night):
    result = _snakemake("-n", "--config", *reduced_night["config"], "out_dirr=elsewhere", check=False)
    assert result.returncode != 0
    assert "unknown key(s) 'out_dirr'" in result.stdout + result.stderr


def test_lint_finds_nothing_but_the_missing_conda_environments(reduced_night):
    # The software environment is the pip-installed package (README), not a conda env per
    # rule; every other lint Snakemake knows must stay clean.
    result = _snakemake("--lint", "--config", *reduced_night["config"], check=False)
    lints = {line.strip() for line in (result.stdout + result.stderr).splitlines()
             if line.strip().startswith("* ")}
    assert lints <= {"* Specify a conda environment or container for each rule.:"}, lints


@pytest.mark.parametrize("section, option, reruns, untouched", [
    # a sky option: only extraction and what follows it
    ("sky", "spatial_order: 1", {"extract_spectra", "flux_calibrate"},
     {"master_bias", "master_flat", "calibrate_frame", "solve_wavelength"}),
    # a flat option: the flats and everything calibrated with them, never the bias
    ("flat", "keep_slit_illumination: false", {"master_flat", "calibrate_frame"},
     {"master_bias", "night_log"}),
    # a cosmic-ray option: standards and science only (arcs are never searched), so no arc
    # line search or wavelength solution reruns
    ("calibration", "cosmic_rays: {enabled: true, detection_limit_sigma: 5.0, "
     "neighbour_fraction: 0.3, contrast_limit: 5.0, passes: 2}", {"calibrate_frame", "extract_spectra"},
     {"master_bias", "master_flat", "find_arc_lines", "solve_wavelength"}),
    # a grating key no step reads (the blaze is for longslit-grating): nothing is recalibrated
    ("instrument", "grating: {groove_density_per_mm: 600, order: 1, "
     "camera_collimator_angle_deg: 30.0, camera_focal_length_mm: 250.0, pixel_size_um: 15.0, "
     "collimated_beam_mm: 60.0, blaze_wavelength_angstrom: 6000.0, "
     "detector_pixels_dispersion: 2048, order_blocking_filters: {NONE: null, GG395: 3950.0, "
     "GG495: 4950.0}}", set(),
     {"master_bias", "master_flat", "calibrate_frame", "find_arc_lines", "solve_wavelength",
      "extract_spectra"}),
])
def test_changing_one_option_reruns_only_what_it_affects(reduced_night, tmp_path, section, option,
                                                         reruns, untouched):
    import yaml

    from pipeline.workflow.layers import load_night_config

    config = load_night_config()  # what the run above used: config/config.yaml over rls.yaml
    changed = {section: dict(config[section], **yaml.safe_load(option))}
    override = tmp_path / "override.yaml"
    override.write_text(yaml.safe_dump(changed))
    dry = _snakemake("-n", "--configfile", str(override), "--config", *reduced_night["config"])
    planned = _planned_rules(dry.stdout)
    assert reruns <= planned, planned
    assert not (untouched & planned), planned


def test_a_folder_without_raw_frames_stops_with_a_clear_message(tmp_path):
    (tmp_path / "raw").mkdir()
    (tmp_path / "raw" / "notes.txt").write_text("not a frame")
    result = _snakemake("-n", "--config", f"raw_dir={tmp_path / 'raw'}", f"out_dir={tmp_path / 'out'}",
                        check=False)
    assert result.returncode != 0
    assert "no raw files matching" in result.stdout + result.stderr
