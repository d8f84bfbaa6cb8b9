"""The shipped config is valid; typos, missing keys and wrong types are named."""

import copy

import pytest
import yaml

from pipeline.workflow.config_check import check_config, config_problems
from pipeline.core.errors import ConfigError

from conftest import REPO_ROOT

SCHEMA = REPO_ROOT / "config" / "schema.yaml"


@pytest.fixture(scope="module")
def config():
    return yaml.safe_load((REPO_ROOT / "config" / "config.yaml").read_text())


def test_shipped_config_is_valid(config):
    assert config_problems(config, SCHEMA) == []


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
