"""The night package's step adapter (rule ``night_log``): read, call, write."""

import logging
import warnings
from collections import Counter
from pathlib import Path

from pipeline.core.errors import InputFileWarning
from pipeline.night.inventory import take_inventory
from pipeline.night.log import night_log as night_log_table

__all__ = ["write_night_log_file"]


def write_night_log_file(*, raw_frames, night_log, raw_dir, instrument, screening=None,
                         observing=None):
    """Write the night log (ECSV, one row per raw file) of ``raw_dir``.

    Parameters
    ----------
    raw_frames : list of str
        The raw files the rule depends on (so a changed file reruns it); files
        among them that the folder scan misses are inventoried too.
    night_log : str
        Output ECSV path.
    raw_dir : str
        Folder of the night's raw frames.
    instrument : dict
        The ``instrument`` config section.
    screening : dict or None
        The ``inventory`` config section (see :func:`take_inventory`).
    observing : dict or None
        The ``observing`` config section (airmass choice, see :func:`night_log_table`).
    """
    log = logging.getLogger("pipeline.night_log")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", InputFileWarning)
        inventory = take_inventory(raw_dir, instrument, screening, also=raw_frames)
    result = night_log_table(inventory, site=instrument.get("site"),
                             keywords=instrument.get("keywords"), **(observing or {}))
    for w in caught:
        log.warning("%s", w.message)
    for note in result.notes:
        log.warning("airmass: %s", note)
    Path(night_log).parent.mkdir(parents=True, exist_ok=True)
    result.table.write(night_log, format="ascii.ecsv", overwrite=True)
    counts = Counter(r.status for r in inventory.records)
    log.info("night log %s: %d files (%s)", night_log, len(inventory.records),
             ", ".join(f"{n} {s}" for s, n in sorted(counts.items())))
    return night_log
