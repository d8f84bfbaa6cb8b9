"""Configuration in layers: pipeline defaults, one instrument file, the night.

Each layer overrides the one before it key by key (mappings are merged,
everything else replaced):

1. the defaults in ``config/schema.yaml``, chosen to suit any instrument;
2. the instrument file named by the night's ``instrument_file`` key
   (``config/instruments/<name>.yaml``): header keywords, detector, optics,
   lamps, site, extinction curve, standard-star tables, detector defects and
   the calibration choices that suit that instrument;
3. the night: ``config/config.yaml``, then any ``--configfile`` and
   ``--config`` values (Snakemake merges these before the Snakefile runs).

A night never inherits another instrument's values: only the file it names
is read, and a night that describes an instrument of another name than its
instrument file's stops with a message naming both.
"""

import copy
from pathlib import Path

import yaml

from pipeline.core.errors import ConfigError
from pipeline.workflow.config_check import config_problems, load_schema, validated_config

__all__ = ["merge_layers", "instrument_file_problems", "load_instrument_file", "layered_config",
           "load_night_config", "NIGHT_ONLY_KEYS", "REPO_ROOT"]

#: the repository (the Snakefile's folder): shipped instrument files are found from here too
REPO_ROOT = Path(__file__).resolve().parents[2]

#: keys only a night's config may set (an instrument file describes no night)
NIGHT_ONLY_KEYS = ("raw_dir", "out_dir", "instrument_file", "make_demo_night_if_missing")


def merge_layers(base, override):
    """``base`` updated by ``override`` key by key (nested mappings merged), as new objects.

    >>> merge_layers({"flat": {"a": 1, "b": 2}, "x": [1]}, {"flat": {"b": 3}, "x": [2]})
    {'flat': {'a': 1, 'b': 3}, 'x': [2]}
    """
    merged = copy.deepcopy(base)
    for key, value in override.items():
        if isinstance(value, dict) and isinstance(merged.get(key), dict):
            merged[key] = merge_layers(merged[key], value)
        else:
            merged[key] = copy.deepcopy(value)
    return merged


def _instrument_file_schema(schema):
    """The schema an instrument file is checked against: the night's, with the night-only
    keys forbidden and only ``instrument`` required at the top level."""
    schema = copy.deepcopy(load_schema(schema))
    for key in NIGHT_ONLY_KEYS:
        schema["properties"].pop(key, None)
    schema["required"] = ["instrument"]
    return schema


def instrument_file_problems(content, schema):
    """One message per problem of an instrument file's content (empty when valid)."""
    if not isinstance(content, dict):
        return [f"expected a mapping of config sections (instrument:, flat:, ...), got "
                f"{type(content).__name__}"]
    return config_problems(content, _instrument_file_schema(schema))


def load_instrument_file(path, schema):
    """Read and check an instrument file.

    Raises
    ------
    ConfigError
        Naming the file, and each key with its problem.
    """
    path = Path(path)
    if not path.is_file():
        raise ConfigError(f"instrument_file {path}: no such file; expected the instrument's "
                          "description, e.g. config/instruments/rls.yaml (paths are relative to "
                          "where snakemake runs)")
    try:
        content = yaml.safe_load(path.read_text())
    except yaml.YAMLError as exc:
        raise ConfigError(f"instrument_file {path}: not valid YAML ({exc})") from None
    problems = instrument_file_problems(content, schema)
    if problems:
        raise ConfigError(f"invalid instrument file {path}:\n  - " + "\n  - ".join(problems))
    return content


def _resolve(path, root):
    """``path`` as given when absolute or found from the current folder, else below ``root``."""
    path = Path(path)
    if path.is_absolute() or path.exists() or root is None:
        return path
    return Path(root) / path


def layered_config(night, schema, *, root=None):
    """The config every rule reads: schema defaults < instrument file < ``night``.

    Parameters
    ----------
    night : dict
        The night's config as Snakemake merged it (config/config.yaml, ``--configfile``,
        ``--config``); it names the instrument file with ``instrument_file``.
    schema : dict or str or Path
        The schema (``config/schema.yaml``).
    root : str or Path, optional
        Where a relative ``instrument_file`` is looked for when it is not found from the
        current folder (the repository, so the shipped files are found from anywhere).

    Returns
    -------
    dict
        A new dict, checked against the schema, defaults filled in.

    Raises
    ------
    ConfigError
        When the night names no instrument file, the file is missing or invalid (the
        message names the file and the key), the night describes an instrument of
        another name, or the merged config is invalid (naming the key).
    """
    schema = load_schema(schema)
    path = night.get("instrument_file")
    if not isinstance(path, str) or not path:
        raise ConfigError("config key instrument_file: missing; expected the path of the "
                          "instrument's description (config/instruments/<name>.yaml)")
    instrument_layer = load_instrument_file(_resolve(path, root), schema)
    named = (night.get("instrument") or {}).get("name")
    described = instrument_layer["instrument"].get("name")
    if named is not None and named != described:
        raise ConfigError(
            f"config key instrument.name: {named!r}, but instrument_file {path} describes "
            f"{described!r}; set instrument_file to {named}'s own file "
            "(config/instruments/<name>.yaml) so the night inherits nothing from another "
            "instrument")
    return validated_config(merge_layers(instrument_layer, night), schema)


def load_night_config(path=None, *, root=REPO_ROOT):
    """The full config of a night file (default: the shipped ``config/config.yaml``, the demo
    night): :func:`layered_config` of its content, with the repository's schema.

    For scripts and tests that need the config Snakemake would see for that night.
    """
    root = Path(root)
    path = Path(path) if path is not None else root / "config" / "config.yaml"
    try:
        night = yaml.safe_load(path.read_text()) or {}
    except (OSError, yaml.YAMLError) as exc:
        raise ConfigError(f"{path}: cannot read the night's config ({exc})") from None
    return layered_config(night, root / "config" / "schema.yaml", root=root)
