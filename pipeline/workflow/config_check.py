"""Check a workflow config against ``config/schema.yaml`` with readable messages.

Snakemake's own ``validate`` (which the Snakefile calls afterwards to fill in
schema defaults) reports only the first problem and prints the whole schema.
:func:`config_problems` lists every problem on one line each, naming the key
by its dotted path and saying what was expected.
"""

import copy
from pathlib import Path

import jsonschema
import yaml

from pipeline.core.errors import ConfigError

__all__ = ["config_problems", "check_config", "fill_defaults", "validated_config", "load_schema"]


def _dotted(path):
    return ".".join(str(p) for p in path) or "(top level)"


def _describe(error):
    key = _dotted(error.absolute_path)
    validator = error.validator
    if validator == "additionalProperties":
        allowed = sorted(error.schema.get("properties", {}))
        extra = sorted(set(error.instance) - set(allowed))
        where = f"in {key}" if error.absolute_path else "at the top level"
        hint = f"; allowed keys: {', '.join(allowed)}" if allowed else ""
        return f"unknown key(s) {', '.join(map(repr, extra))} {where}{hint}"
    if validator == "required":
        return f"{key}: {error.message}"
    expected = error.schema.get("description", "")
    detail = f" ({expected})" if expected else ""
    return f"config key {key}: {error.message}{detail}"


def load_schema(schema):
    """The schema as a dict (``schema`` may be a dict or the path of its YAML file)."""
    if isinstance(schema, dict):
        return schema
    return yaml.safe_load(Path(schema).read_text())


def config_problems(config, schema):
    """Return one message per schema violation (empty when the config is valid).

    Parameters
    ----------
    config : dict
        The loaded configuration.
    schema : dict or str or Path
        The JSON schema, or a path to its YAML file.
    """
    schema = load_schema(schema)
    validator_class = jsonschema.validators.validator_for(schema)
    validator = validator_class(schema)
    errors = sorted(validator.iter_errors(config), key=lambda e: list(map(str, e.absolute_path)))
    return [_describe(e) for e in errors]


def check_config(config, schema):
    """Raise :class:`ConfigError` listing every problem, or return None."""
    problems = config_problems(config, schema)
    if problems:
        raise ConfigError("invalid configuration:\n  - " + "\n  - ".join(problems))


def _with_default_filling(validator_class):
    """A validator class that also sets the schema's ``default`` of every absent property
    (recursively: a section's ``default: {}`` is set first, then its own keys' defaults)."""
    check_properties = validator_class.VALIDATORS["properties"]

    def properties(validator, props, instance, schema):
        if isinstance(instance, dict):
            for key, sub in props.items():
                if isinstance(sub, dict) and "default" in sub and key not in instance:
                    instance[key] = copy.deepcopy(sub["default"])
        yield from check_properties(validator, props, instance, schema)

    return jsonschema.validators.extend(validator_class, {"properties": properties})


def fill_defaults(config, schema):
    """Fill in, in place, every schema default the config leaves out; return ``config``.

    >>> fill_defaults({"a": {}}, {"type": "object", "properties": {"a": {"type": "object",
    ...     "default": {}, "properties": {"b": {"type": "number", "default": 2.0}}},
    ...     "c": {"type": "object", "default": {}, "properties": {"d": {"default": [1]}}}}})
    {'a': {'b': 2.0}, 'c': {'d': [1]}}
    """
    schema = load_schema(schema)
    validator_class = _with_default_filling(jsonschema.validators.validator_for(schema))
    for _ in validator_class(schema).iter_errors(config):
        pass  # problems are reported by check_config; this pass only fills defaults
    return config


def validated_config(config, schema):
    """Check ``config`` (raise :class:`ConfigError` listing every problem), then fill in the
    schema defaults in place and return it: the config every rule and plan method reads."""
    schema = load_schema(schema)
    check_config(config, schema)
    return fill_defaults(config, schema)
