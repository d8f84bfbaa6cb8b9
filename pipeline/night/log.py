"""The night log: the inventory's table plus the airmass each target frame will use.

Computed when the ``night_log`` job runs (not at parse time: an airmass costs an
AltAz transformation per sample). For each usable standard and science frame the
airmass choice of :func:`pipeline.core.observing.choose_airmass` is recorded beside
the header value, so a header airmass that is not the exposure mean shows up the
morning after.
"""

import math
from dataclasses import dataclass

from pipeline.core import observing as obs

__all__ = ["NightLog", "night_log"]


@dataclass(frozen=True)
class NightLog:
    """The night log table and the notes for the log file.

    Attributes
    ----------
    table : astropy.table.Table
        :meth:`NightInventory.to_table` plus ``airmass_computed`` (exposure mean),
        ``airmass_used`` and ``airmass_source`` (computed / header / none / - for
        frames that are not standards or science).
    notes : tuple of str
        One line per frame whose airmass needs attention, naming the frame.
    iers_table : str
        Earth-orientation table used ('' when nothing was computed).
    """

    table: object
    notes: tuple
    iers_table: str


def night_log(inventory, *, site, keywords=None, airmass="computed",
              airmass_warn_difference=0.01):
    """Night log of ``inventory`` with the airmass of every usable target frame.

    Parameters
    ----------
    inventory : NightInventory
    site : dict
        ``instrument.site``.
    keywords : dict
        ``instrument.keywords`` (names in the notes).
    airmass, airmass_warn_difference :
        The ``observing`` config section.

    Returns
    -------
    NightLog
    """
    from astropy.time import Time

    table = inventory.to_table()
    computed, used, source = [], [], []
    notes = []
    iers = ""
    for rec in inventory.records:
        if not (rec.ok and rec.frame_type in ("standard", "science")):
            computed.append(math.nan)
            used.append(math.nan)
            source.append("-")
            continue
        date = Time(rec.mjd, format="mjd", scale="utc").isot if math.isfinite(rec.mjd) else None
        choice = obs.choose_airmass(header_airmass=rec.airmass, ra=rec.ra or None,
                                    dec=rec.dec or None, date_obs=date,
                                    exptime_s=rec.exptime_s, site=site, policy=airmass,
                                    warn_difference=airmass_warn_difference, keywords=keywords)
        computed.append(choice.computed)
        used.append(choice.value)
        source.append(choice.source)
        iers = iers or choice.iers_table
        notes.extend(f"{rec.frame_id}: {note}" for note in choice.notes
                     if not note.startswith("using header"))
    table["airmass_computed"] = computed
    table["airmass_used"] = used
    table["airmass_source"] = source
    table.meta["comments"] = list(table.meta.get("comments", [])) + [
        "airmass is the header value; airmass_computed the exposure mean from RA/Dec, time and",
        f"site; airmass_used what flux calibration uses (observing.airmass = {airmass}).",
    ]
    if iers:
        table.meta["iers_table"] = iers
    return NightLog(table=table, notes=tuple(notes), iers_table=iers)
