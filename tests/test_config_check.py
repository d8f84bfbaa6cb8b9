"""The shipped config is valid; typos, missing keys and wrong types are named; the layers
(schema defaults < instrument file < night) merge as documented and never leak one
instrument's values into another's night.

Truth: the shipped files (config/config.yaml, config/instruments/rls.yaml,
config/schema.yaml) read here with yaml, and instrument files written by the tests.
"""

import copy

import pytest
import yaml

from pipeline.core.errors import ConfigError
from pipeline.workflow.config_check import check_config, config_problems, fill_defaults
from pipeline.workflow.layers import (layered_config, load_instrument_file, load_night_config,
                                      merge_layers)

from conftest import REPO_ROOT

SCHEMA = REPO_ROOT / "config" / "schema.yaml"
DEMO_INSTRUMENT = REPO_ROOT / "config" / "instruments" / "rls.yaml"


def _night():
    night = yaml.safe_load((REPO_ROOT / "config" / "config.yaml").read_text())
    night["instrument_file"] = str(DEMO_INSTRUMENT)
    return night


@pytest.fixture(scope="module")
def config():
    """The demo's full config (instrument file + night), without the defaults filled in."""
    return merge_layers(yaml.safe_load(DEMO_INSTRUMENT.read_text()), _night())


def test_shipped_config_is_valid(config):
    assert config_problems(config, SCHEMA) == []
    assert layered_config(_night(), SCHEMA)["instrument"]["name"] == "RLS"


def test_unknown_key_is_named_with_the_allowed_ones(config):
    bad = copy.deepcopy(config)
    bad["instrument"]["grating"]["groove_density"] = 600
    (problem,) = config_problems(bad, SCHEMA)
    assert "'groove_density'" in problem and "instrument.grating" in problem
    assert "groove_density_per_mm" in problem


def test_wrong_type_names_the_dotted_key(config):
    bad = copy.deepcopy(config)
    bad["instrument"]["grating"]["order"] = "first"
    (problem,) = config_problems(bad, SCHEMA)
    assert problem.startswith("config key instrument.grating.order:")
    assert "integer" in problem


def test_missing_required_key_and_all_problems_reported(config):
    bad = copy.deepcopy(config)
    del bad["instrument"]["keywords"]["exposure_time_s"]
    bad["out_dir"] = 3
    problems = config_problems(bad, SCHEMA)
    assert len(problems) == 2
    with pytest.raises(ConfigError, match="exposure_time_s"):
        check_config(bad, SCHEMA)


def test_bad_section_syntax_is_rejected(config):
    bad = copy.deepcopy(config)
    bad["instrument"]["sections"]["data"]["value"] = "1:1024,1:256"
    (problem,) = config_problems(bad, SCHEMA)
    assert "instrument.sections.data.value" in problem


# ---- layers -------------------------------------------------------------------------------

def _other_instrument(tmp_path, **changes):
    """An instrument file of another spectrograph: the demo's instrument section renamed, with
    ``changes`` to it, and nothing else (no defects, no standard tables, no choices)."""
    content = {"instrument": copy.deepcopy(yaml.safe_load(DEMO_INSTRUMENT.read_text())["instrument"])}
    content["instrument"].update(name="OTHER", **changes)
    content["instrument"]["site"] = {"latitude_deg": 10.0, "longitude_deg": 20.0, "height_m": 5.0}
    path = tmp_path / "other.yaml"
    path.write_text(yaml.safe_dump(content))
    return path


def _leaves(sections):
    """(section, key) and value of every option a file sets outside its instrument section."""
    for section, options in sections.items():
        for key, value in options.items():
            yield (section, key), value


def _get(node, keys):
    for key in keys:
        node = node[key]
    return node


def test_another_instrument_file_inherits_none_of_the_demo_values(tmp_path):
    night = dict(_night(), instrument_file=str(_other_instrument(tmp_path)))
    other = layered_config(night, SCHEMA)
    defaults = fill_defaults({}, SCHEMA)
    demo = yaml.safe_load(DEMO_INSTRUMENT.read_text())
    checked = 0
    for keys, value in _leaves({k: v for k, v in demo.items() if k != "instrument"}):
        # every value the demo's instrument file sets outside its instrument section is, for
        # the other instrument, the pipeline default of the schema
        assert _get(other, keys) == _get(defaults, keys), ".".join(keys)
        assert _get(other, keys) != value or value == _get(defaults, keys), ".".join(keys)
        checked += 1
    assert checked >= 5  # defects, standard tables, slit-loss and telluric choices, regions
    assert other["flat"]["bad_pixel_sections"] == []
    assert other["flux_calibration"]["standard_flux_tables"] == {}
    assert other["instrument"]["site"].get("extinction_table") is None
    assert other["instrument"]["name"] == "OTHER"


def test_the_night_overrides_the_instrument_file_key_by_key():
    night = _night()
    night["flat"] = {"clip_sigma": 4.0}
    night["instrument"] = {"saturation_adu": 60000}
    merged = layered_config(night, SCHEMA)
    demo = yaml.safe_load(DEMO_INSTRUMENT.read_text())
    assert merged["flat"]["clip_sigma"] == 4.0
    # the instrument file's other values in the same sections stay
    assert merged["flat"]["bad_pixel_sections"] == demo["flat"]["bad_pixel_sections"]
    assert merged["instrument"]["saturation_adu"] == 60000
    assert merged["instrument"]["gain_e_per_adu"] == demo["instrument"]["gain_e_per_adu"]


def test_a_night_describing_another_instrument_must_name_its_file():
    night = _night()
    night["instrument"] = {"name": "MYSPEC"}
    with pytest.raises(ConfigError, match=r"instrument\.name: 'MYSPEC'.*describes 'RLS'"):
        layered_config(night, SCHEMA)


def test_instrument_file_errors_name_the_file_and_the_key(tmp_path):
    path = _other_instrument(tmp_path, saturation_adu="lots")
    with pytest.raises(ConfigError) as caught:
        load_instrument_file(path, SCHEMA)
    assert str(path) in str(caught.value) and "instrument.saturation_adu" in str(caught.value)


def test_an_instrument_file_describes_no_night(tmp_path):
    path = tmp_path / "night_in_it.yaml"
    content = yaml.safe_load(DEMO_INSTRUMENT.read_text())
    content["raw_dir"] = "/data/raw"
    path.write_text(yaml.safe_dump(content))
    with pytest.raises(ConfigError, match="unknown key.*'raw_dir'"):
        load_instrument_file(path, SCHEMA)


def test_a_missing_instrument_file_is_named(tmp_path):
    night = dict(_night(), instrument_file=str(tmp_path / "nowhere.yaml"))
    with pytest.raises(ConfigError, match="nowhere.yaml: no such file"):
        layered_config(night, SCHEMA)
    night.pop("instrument_file")
    with pytest.raises(ConfigError, match="instrument_file: missing"):
        layered_config(night, SCHEMA)


@pytest.mark.parametrize("path", sorted((REPO_ROOT / "config" / "instruments").glob("*.yaml")),
                         ids=lambda p: p.name)
def test_every_shipped_instrument_file_is_valid_and_layers(path):
    content = load_instrument_file(path, SCHEMA)
    merged = layered_config(dict(_night(), instrument_file=str(path)), SCHEMA)
    assert merged["instrument"]["name"] == content["instrument"]["name"]


def test_shipped_instrument_files_are_found_from_any_folder(tmp_path, monkeypatch):
    # Snakemake may run elsewhere than the repository (-s path/Snakefile): a relative
    # instrument_file not found from there is looked for in the repository
    monkeypatch.chdir(tmp_path)
    assert load_night_config()["instrument"]["name"] == "RLS"
    with pytest.raises(ConfigError, match="no such file"):
        layered_config(dict(_night(), instrument_file="config/instruments/rls.yaml"), SCHEMA)
