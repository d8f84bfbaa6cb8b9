"""Check a workflow config against ``config/schema.yaml`` with readable messages.

Snakemake's own ``validate`` (which the Snakefile calls afterwards to fill in
schema defaults) reports only the first problem and prints the whole schema.
:func:`config_problems` lists every problem on one line each, naming the key
by its dotted path and saying what was expected.
"""

from pathlib import Path

import jsonschema
import yaml

from pipeline.core.errors import ConfigError

__all__ = ["config_problems", "check_config"]


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


def config_problems(config, schema):
    """Return one message per schema violation (empty when the config is valid).

    Parameters
    ----------
    config : dict
        The loaded configuration.
    schema : dict or str or Path
        The JSON schema, or a path to its YAML file.
    """
    if not isinstance(schema, dict):
        schema = yaml.safe_load(Path(schema).read_text())
    validator_class = jsonschema.validators.validator_for(schema)
    validator = validator_class(schema)
    errors = sorted(validator.iter_errors(config), key=lambda e: list(map(str, e.absolute_path)))
    return [_describe(e) for e in errors]


def check_config(config, schema):
    """Raise :class:`ConfigError` listing every problem, or return None."""
    problems = config_problems(config, schema)
    if problems:
        raise ConfigError("invalid configuration:\n  - " + "\n  - ".join(problems))
