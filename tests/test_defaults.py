"""Defaults in one place: config/schema.yaml. Where a step's code keeps a default of its own
(an option table or an adapter's keyword default), it must equal the schema's, for every step.

Truth: config/schema.yaml read here with yaml; the code's defaults read with `inspect`.
"""

import importlib
import inspect

import pytest
import yaml

from pipeline.workflow.dispatch import STEPS
from pipeline.workflow.plan import SENSITIVITY_PARAM_KEYS

from conftest import REPO_ROOT

SCHEMA = yaml.safe_load((REPO_ROOT / "config" / "schema.yaml").read_text())["properties"]


def _schema_defaults(node):
    out = {}
    for key, sub in node.get("properties", {}).items():
        if sub.get("type") == "object" and "properties" in sub:
            out[key] = _schema_defaults(sub)
        elif "default" in sub:
            out[key] = sub["default"]
    return out


def _same(a, b):
    """Equal, with tuples and lists alike (code keeps tuples, YAML lists)."""
    if isinstance(a, (list, tuple)) and isinstance(b, (list, tuple)):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    return a == b


#: option tables kept in the step packages: (module, name, schema section)
OPTION_TABLES = [
    ("pipeline.ccd.options", "OVERSCAN_DEFAULTS", "overscan"),
    ("pipeline.ccd.options", "BIAS_DEFAULTS", "bias"),
    ("pipeline.ccd.options", "FLAT_DEFAULTS", "flat"),
    ("pipeline.ccd.options", "CALIBRATION_DEFAULTS", "calibration"),
    ("pipeline.extraction.frame", "RECTIFICATION_DEFAULTS", "rectification"),
    ("pipeline.extraction.frame", "FLEXURE_DEFAULTS", "flexure"),
    ("pipeline.extraction.frame", "SKY_DEFAULTS", "sky"),
    ("pipeline.extraction.frame", "TRACING_DEFAULTS", "tracing"),
    ("pipeline.extraction.frame", "EXTRACTION_DEFAULTS", "extraction"),
    ("pipeline.night.inventory", "SCREENING_DEFAULTS", "inventory"),
]


@pytest.mark.parametrize("module, name, section", OPTION_TABLES, ids=[t[1] for t in OPTION_TABLES])
def test_option_tables_equal_the_schema(module, name, section):
    table = getattr(importlib.import_module(module), name, None)
    if table is None:
        pytest.skip(f"{module}.{name} is gone (its owner moved the defaults)")
    schema = _schema_defaults(SCHEMA[section])
    wrong = {key: (value, schema.get(key, "<not in the schema>")) for key, value in table.items()
             if key not in schema or not _same(value, schema[key])}
    assert not wrong, f"{module}.{name} (code, schema): {wrong}"


#: rules whose params spread one schema section into the adapter's keywords:
#: rule -> (section, {adapter keyword: schema key} where the names differ)
SPREAD_SECTIONS = {
    "find_arc_lines": ("arc_lines", {}),
    "solve_wavelength": ("wavelength_solution", {}),
    "fit_sensitivity": ("flux_calibration", {param: key for param, key in SENSITIVITY_PARAM_KEYS
                                             if param != key}),
    "flux_calibrate": ("flux_calibration", {}),
}


def _adapter(rule):
    module, func = STEPS[rule]
    return getattr(importlib.import_module(module), func)


@pytest.mark.parametrize("rule", sorted(SPREAD_SECTIONS))
def test_adapter_keyword_defaults_equal_the_schema(rule):
    section, renamed = SPREAD_SECTIONS[rule]
    schema = _schema_defaults(SCHEMA[section])
    checked, wrong = 0, {}
    for name, parameter in inspect.signature(_adapter(rule)).parameters.items():
        key = renamed.get(name, name)
        if parameter.default is inspect.Parameter.empty or key not in schema:
            continue
        checked += 1
        if not _same(parameter.default, schema[key]):
            wrong[name] = (parameter.default, schema[key])
    assert checked, f"{rule}: no keyword default compared (has the adapter moved?)"
    assert not wrong, f"{rule} adapter keyword defaults (code, schema {section}): {wrong}"


def test_the_comparison_can_fail():
    assert not _same((1, 2), [1, 3]) and not _same({"a": 1}, {"a": 1, "b": 2})
    assert _same(("memory",), ["memory"])
