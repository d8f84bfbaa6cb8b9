"""The night plan (pipeline/workflow/plan.py) without Snakemake.

Truth: a night written out here record by record (frame types, setups, times,
objects), and the shipped config with the schema's defaults. Each test states
which rule property the method keeps (what reruns when an option changes, which
file is an input).
"""

import copy
import re

import pytest
import yaml

from pipeline.core.errors import InputFileError
from pipeline.night.inventory import FrameRecord, NightInventory
from pipeline.workflow.config_check import fill_defaults
from pipeline.workflow.layers import load_night_config
from pipeline.workflow.plan import (NO_MATCH, SHIPPED_DATA, NightPlan, demo_night_needed,
                                    key_order_free)

from conftest import REPO_ROOT

SCHEMA = REPO_ROOT / "config" / "schema.yaml"
SETUP_A, SETUP_B = "G600_t08.93_s1.2_2x2_NONE", "G600_t11.83_s1.2_2x2_GG495"


def _record(frame_id, frame_type, setup, mjd, obj="", readout="2x2"):
    return FrameRecord(frame_id=frame_id, path=f"/raw/{frame_id}.fits", frame_type=frame_type,
                       setup="" if frame_type == "bias" else setup, readout=readout, object=obj,
                       exptime_s=1.0, date_obs="", mjd=mjd, status="ok", reason="")


@pytest.fixture
def night():
    """Setup A: two arcs (early, late), a standard with a flux table, two science frames;
    setup B: one arc, a standard without a flux table, one science frame; one rejected file."""
    records = [
        _record("b1", "bias", "", 1.0), _record("b2", "bias", "", 1.0),
        _record("fa", "flat", SETUP_A, 1.0), _record("fb", "flat", SETUP_B, 1.0),
        _record("arc_early", "arc", SETUP_A, 100.00), _record("arc_late", "arc", SETUP_A, 100.50),
        _record("std_a", "standard", SETUP_A, 100.05, obj="trs 17"),
        _record("sci_early", "science", SETUP_A, 100.10, obj="TRG-511"),
        _record("sci_late", "science", SETUP_A, 100.45, obj="TRG-511"),
        _record("arc_b", "arc", SETUP_B, 100.20),
        _record("std_b", "standard", SETUP_B, 100.21, obj="UNLISTED-1"),
        _record("sci_b", "science", SETUP_B, 100.30, obj="TRG-7"),
        FrameRecord(frame_id="broken", path="/raw/broken.fits", frame_type="unknown", setup="",
                    readout="", object="", exptime_s=float("nan"), date_obs="",
                    mjd=float("nan"), status="rejected", reason="not a readable FITS file"),
    ]
    return NightInventory(tuple(sorted(records, key=lambda r: r.frame_id)))


@pytest.fixture
def config():
    """The demo night's config (config/config.yaml over config/instruments/rls.yaml)."""
    cfg = load_night_config()
    cfg["out_dir"] = "/out"
    return cfg


@pytest.fixture
def plan(config, night):
    config["flux_calibration"]["standard_flux_tables"] = {"TRS-17": "/tables/trs17.ecsv"}
    return NightPlan(config, night)


def test_fill_defaults_fills_nested_sections_and_keeps_given_values():
    cfg = yaml.safe_load((REPO_ROOT / "config" / "instruments" / "rls.yaml").read_text())
    cfg.update(raw_dir="raw", out_dir="out", instrument_file="rls.yaml")
    cfg["tracing"] = {"snr_min": 7.0}
    fill_defaults(cfg, SCHEMA)
    schema = yaml.safe_load(SCHEMA.read_text())["properties"]
    # the schema's own numbers, read here independently of the filling code
    assert cfg["sky"]["spatial_order"] == schema["sky"]["properties"]["spatial_order"]["default"]
    assert cfg["tracing"]["snr_min"] == 7.0
    assert cfg["tracing"]["order"] == schema["tracing"]["properties"]["order"]["default"]
    assert cfg["calibration"]["cosmic_rays"]["passes"] == \
        schema["calibration"]["properties"]["cosmic_rays"]["properties"]["passes"]["default"]


def test_defaults_are_copies_not_shared_objects():
    first = fill_defaults({}, {"type": "object", "properties": {"a": {"default": []}}})
    second = fill_defaults({}, {"type": "object", "properties": {"a": {"default": []}}})
    first["a"].append(1)
    assert second["a"] == []


def test_paths_are_below_out_dir(plan):
    assert plan.out("calibrated", "x.fits") == "/out/calibrated/x.fits"
    assert plan.log("solve_wavelength", "arc_b") == "/out/logs/solve_wavelength/arc_b.log"
    assert plan.master_bias_path("2x2") == "/out/calibrations/master_bias_2x2.fits"
    assert plan.folder_of("/out/manifest.ecsv") == "/out"


def test_frame_calibrations_name_the_raw_file_and_its_masters(plan):
    assert plan.frame_calibrations("sci_b") == {
        "raw": "/raw/sci_b.fits", "bias": "/out/calibrations/master_bias_2x2.fits",
        "flat": f"/out/calibrations/master_flat_{SETUP_B}.fits"}


def test_arcs_get_no_cosmic_ray_options_targets_do(plan, config, night):
    assert "cosmic_rays" not in plan.calibration_options("arc_b")
    assert plan.calibration_options("sci_b")["cosmic_rays"] == config["calibration"]["cosmic_rays"]
    changed = copy.deepcopy(config)
    changed["calibration"]["cosmic_rays"]["detection_limit_sigma"] = 9.0
    other = NightPlan(changed, night)
    # a cosmic-ray option changes the science frame's params, never the arc's
    assert other.calibration_options("arc_b") == plan.calibration_options("arc_b")
    assert other.calibration_options("sci_b") != plan.calibration_options("sci_b")


def test_params_do_not_depend_on_the_key_order_of_the_config(config, night):
    reordered = copy.deepcopy(config)
    for section in ("flat", "sky", "calibration"):
        reordered[section] = dict(reversed(list(reordered[section].items())))
    reordered["instrument"] = dict(reversed(list(reordered["instrument"].items())))
    one, two = NightPlan(config, night), NightPlan(reordered, night)
    # Snakemake compares params as text
    for method in ("ccd_instrument", "keywords", "wavelength_params", "flexure_options",
                   "sensitivity_params"):
        assert repr(getattr(one, method)()) == repr(getattr(two, method)()), method
    for section in ("flat", "sky"):
        assert repr(one.section(section)) == repr(two.section(section))
    assert repr(one.calibration_options("sci_b")) == repr(two.calibration_options("sci_b"))


def test_biases_get_no_saturation_level(plan):
    assert "saturation_adu" not in plan.ccd_instrument(saturation=False)
    assert plan.ccd_instrument()["saturation_adu"] == plan.instrument["saturation_adu"]


def test_arc_pattern_matches_exactly_the_nights_arcs(plan):
    assert plan.arcs() == ["arc_b", "arc_early", "arc_late"]
    pattern = plan.arc_pattern()
    for arc in plan.arcs():
        assert re.fullmatch(pattern, arc)
    for other in ("arc", "arc_earlyX", "sci_b", "arc.b"):
        assert not re.fullmatch(pattern, other)


def test_a_night_without_arcs_gets_a_pattern_matching_nothing(config):
    plan = NightPlan(config, NightInventory((_record("b1", "bias", "", 1.0),)))
    assert plan.arc_pattern() == NO_MATCH == plan.target_pattern()
    assert not re.fullmatch(NO_MATCH, "x") and not re.fullmatch(NO_MATCH, "")


def test_line_lists_are_inputs_shipped_when_null(plan, config, night):
    assert plan.line_list() == str(SHIPPED_DATA / "arc_lines_air.csv")
    assert plan.sky_lines() == str(SHIPPED_DATA / "sky_lines_air.ecsv")
    assert (SHIPPED_DATA / "arc_lines_air.csv").exists() and (SHIPPED_DATA / "sky_lines_air.ecsv").exists()
    assert "line_list" not in plan.wavelength_params() and "line_list" not in plan.flexure_options()
    mine = copy.deepcopy(config)
    mine["wavelength_solution"]["line_list"] = "/lists/mine.csv"
    mine["flexure"]["line_list"] = "/lists/sky.ecsv"
    assert NightPlan(mine, night).line_list() == "/lists/mine.csv"
    assert NightPlan(mine, night).sky_lines() == "/lists/sky.ecsv"


def test_wavelength_params_hold_only_the_grating_keys_the_solver_reads(plan, config, night):
    grating = plan.wavelength_params()["grating"]
    assert "blaze_wavelength_angstrom" not in grating and "collimated_beam_mm" not in grating
    assert grating["groove_density_per_mm"] == config["instrument"]["grating"]["groove_density_per_mm"]
    changed = copy.deepcopy(config)
    changed["instrument"]["grating"]["blaze_wavelength_angstrom"] = 7000.0
    assert NightPlan(changed, night).wavelength_params() == plan.wavelength_params()


def test_targets_use_the_nearest_arc_of_their_setup(plan):
    # sci_early (100.10) is nearer arc_early (100.00) than arc_late (100.50); sci_late the other
    assert plan.frame_wavelength("sci_early") == "/out/wavelength/arc_early_solution.fits"
    assert plan.frame_wavelength("sci_late") == "/out/wavelength/arc_late_solution.fits"
    assert plan.frame_wavelength("sci_b") == "/out/wavelength/arc_b_solution.fits"


def test_science_borrows_the_trace_of_its_setups_standard(plan, config, night):
    assert plan.extraction_reference("sci_late") == "/out/qa/std_a_traces.ecsv"
    assert plan.extraction_reference("std_a") == []
    off = copy.deepcopy(config)
    off["tracing"]["use_standard_reference"] = False
    assert NightPlan(off, night).extraction_reference("sci_late") == []


def test_sensitivity_only_for_setups_whose_standard_has_a_table(plan):
    # 'trs 17' in the header matches the table name TRS-17 (case, blanks and '-' ignored)
    assert [rec.frame_id for rec, _ in plan.fluxcal_standards(SETUP_A)] == ["std_a"]
    assert plan.standard_flux_tables(SETUP_A) == ["/tables/trs17.ecsv"]
    assert plan.fluxcal_standards(SETUP_B) == []
    assert plan.frame_sensitivity("sci_early") == f"/out/flux/sensitivity_{SETUP_A}.fits"
    assert plan.frame_sensitivity("sci_b") == []
    assert "UNLISTED-1" in plan.frame_uncalibrated_reason("sci_b")
    assert "standard_flux_tables" in plan.frame_uncalibrated_reason("sci_b")
    assert plan.frame_uncalibrated_reason("sci_early") == ""
    assert plan.own_flux_table("std_a") == "/tables/trs17.ecsv"
    assert plan.own_flux_table("sci_early") == [] and plan.own_flux_table("std_b") == []
    assert plan.check_exclude_regions("sci_early") == []
    assert plan.check_exclude_regions("std_a")


def test_product_lists(plan):
    products = plan.reduction_products()
    assert len(products) == len(set(products))
    assert products[0] == "/out/night_log.ecsv"
    for path in ("/out/calibrated/arc_late.fits", "/out/wavelength/arc_b_solution.fits",
                 "/out/spectra/sci_b", "/out/spectra_fluxed/sci_b",
                 f"/out/flux/sensitivity_{SETUP_A}.fits", "/out/spectra_fluxed/std_a"):
        assert path in products, path
    # no sensitivity for setup B (no flux table), no product of the rejected file or of biases
    assert f"/out/flux/sensitivity_{SETUP_B}.fits" not in products
    assert not [p for p in products if "broken" in p or "/b1" in p]
    assert plan.all_products()[-2:] == ["/out/manifest.ecsv", "/out/night_report.html"]


def test_demo_night_is_simulated_only_into_the_empty_demo_folder(tmp_path):
    demo = tmp_path / "demo_data" / "raw"
    demo.mkdir(parents=True)
    assert demo_night_needed(demo, tmp_path, enabled=True)
    assert not demo_night_needed(demo, tmp_path, enabled=False)
    assert not demo_night_needed(tmp_path / "elsewhere", tmp_path, enabled=True)
    (demo / "a.fits").write_bytes(b"")
    assert not demo_night_needed(demo, tmp_path, enabled=True)


def test_a_folder_without_raw_frames_is_named(config, tmp_path):
    config["raw_dir"] = str(tmp_path)
    with pytest.raises(InputFileError, match="no raw files matching"):
        NightPlan.from_config(config)


def test_key_order_free_sorts_nested_mappings():
    assert list(key_order_free({"b": {"y": 1, "x": 2}, "a": 0})) == ["a", "b"]
    assert list(key_order_free({"b": {"y": 1, "x": 2}})["b"]) == ["x", "y"]
