"""Argument checks at the door of every pure function, and option merging.

Each coercer names the argument, says what was expected and echoes what arrived, so a
wrong call fails with a message a user can act on (``"`spectrum` must be 1-D, got shape
(2, 400)"``). Steps call these instead of writing their own.

Examples
--------
>>> as_1d_float([1, 2, 3], "wave_angstrom")
array([1., 2., 3.])
>>> positive(0.0, "gain", allow_zero=True)
0.0
>>> merge_options({"order": 3}, {"order": 2, "clip_sigma": 3.0}, "sky")
{'order': 3, 'clip_sigma': 3.0}
"""

import math

import numpy as np

from pipeline.core.errors import ConfigError

__all__ = ["as_1d_float", "as_2d", "same_shape", "positive", "merge_options"]


def as_1d_float(value, name, *, size=None):
    """``value`` as a new 1-D float64 array (a copy: the caller's array is never aliased).

    Raises ``ValueError`` naming ``name`` when the array is not 1-D or, with ``size``,
    does not have ``size`` elements.
    """
    arr = np.array(value, dtype=np.float64)
    if arr.ndim != 1:
        raise ValueError(f"`{name}` must be 1-D, got shape {arr.shape}")
    if size is not None and arr.size != size:
        raise ValueError(f"`{name}` must have {size} elements, got {arr.size}")
    return arr


def as_2d(value, name, *, dtype=None):
    """``value`` as a 2-D array (shape (ny, nx)), converted to ``dtype`` when given.

    No copy is made when the input already has the right dtype; callers never write into
    the result.
    """
    arr = np.asarray(value) if dtype is None else np.asarray(value, dtype=dtype)
    if arr.ndim != 2:
        raise ValueError(f"`{name}` must be 2-D (ny, nx), got shape {arr.shape}")
    return arr


def same_shape(arrays, names):
    """Raise ``ValueError`` unless every array has the shape of the first."""
    shape = np.shape(arrays[0])
    for arr, name in zip(arrays[1:], names[1:]):
        if np.shape(arr) != shape:
            raise ValueError(f"`{name}` must have the shape of `{names[0]}` {shape}, "
                             f"got {np.shape(arr)}")


def positive(value, name, *, allow_zero=False):
    """``value`` as a finite float > 0 (>= 0 with ``allow_zero``)."""
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"`{name}` must be a number {'>= 0' if allow_zero else '> 0'}, "
                         f"got {value!r}") from None
    if not math.isfinite(number) or number < 0 or (number == 0 and not allow_zero):
        raise ValueError(f"`{name}` must be a finite number {'>= 0' if allow_zero else '> 0'}, "
                         f"got {value!r}")
    return number


def merge_options(given, defaults, section):
    """A config section filled with its defaults; unknown keys are a ``ConfigError``.

    Nested sections (a default that is a dict) are merged one level down, key by key, with
    the same check, so ``{"cosmic_rays": {"passes": 2}}`` keeps the other cosmic-ray
    defaults.
    """
    given = dict(given or {})
    unknown = sorted(set(given) - set(defaults))
    if unknown:
        raise ConfigError(f"{section}: unknown key(s) {unknown}; expected some of "
                          f"{sorted(defaults)}")
    merged = {**defaults, **given}
    for key, value in defaults.items():
        if isinstance(value, dict):
            sub = dict(given.get(key) or {})
            bad = sorted(set(sub) - set(value))
            if bad:
                raise ConfigError(f"{section}.{key}: unknown key(s) {bad}; expected some of "
                                  f"{sorted(value)}")
            merged[key] = {**value, **sub}
    return merged
