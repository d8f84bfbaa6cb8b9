"""The plot of the night for the morning report: every frame on a time axis by setup and
type, with the airmass and the seeing (from the spatial profile widths) below.

:func:`night_timeline` turns the night log (plus the seeing measured per frame) into
plain rows; :func:`plot_night` draws them with matplotlib's object API and returns the
Figure (no global pyplot state), which the report embeds as a PNG.
"""

import math
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone

__all__ = ["TimelineRow", "night_timeline", "plot_night", "TYPE_COLOURS"]

#: colour of each frame type (others grey)
TYPE_COLOURS = {"bias": "#9e9e9e", "flat": "#e0a030", "arc": "#8e44ad", "standard": "#2e86c1",
                "science": "#27ae60"}


@dataclass(frozen=True)
class TimelineRow:
    frame_id: str
    frame_type: str
    setup: str
    start: datetime
    exptime_s: float
    status: str
    airmass: float
    seeing_arcsec: float


def _parse_time(text):
    try:
        value = datetime.fromisoformat(str(text).strip().replace("Z", "+00:00"))
    except ValueError:
        return None
    return value if value.tzinfo else value.replace(tzinfo=timezone.utc)


def _float(value):
    try:
        value = float(value)
    except (TypeError, ValueError):
        return math.nan
    return value


def night_timeline(night_log, *, seeing_arcsec=None):
    """Rows of the night plot: frames with a readable start time, in time order.

    Parameters
    ----------
    night_log : astropy.table.Table
        Columns frame_id, frame_type, setup, date_obs, exptime_s, status, airmass.
    seeing_arcsec : dict, optional
        frame id -> FWHM of the spatial profile, arcsec.

    Examples
    --------
    >>> from astropy.table import Table
    >>> log = Table(rows=[("a", "science", "S1", "2026-03-15T01:00:00", 600.0, "ok", 1.2)],
    ...             names=("frame_id", "frame_type", "setup", "date_obs", "exptime_s",
    ...                    "status", "airmass"))
    >>> night_timeline(log, seeing_arcsec={"a": 1.1})[0].seeing_arcsec
    1.1
    """
    from pipeline.products.labels import as_text

    seeing_arcsec = seeing_arcsec or {}
    rows = []
    for rec in night_log:
        start = _parse_time(rec["date_obs"]) if "date_obs" in rec.colnames else None
        if start is None:
            continue
        frame_id = str(rec["frame_id"])
        exptime = _float(rec["exptime_s"]) if "exptime_s" in rec.colnames else math.nan
        rows.append(TimelineRow(frame_id, as_text(rec["frame_type"]), as_text(rec["setup"]), start,
                                exptime if math.isfinite(exptime) else 0.0, as_text(rec["status"]),
                                _float(rec["airmass"]) if "airmass" in rec.colnames else math.nan,
                                _float(seeing_arcsec.get(frame_id, math.nan))))
    return sorted(rows, key=lambda r: r.start)


def plot_night(rows, *, title=""):
    """Figure of the night: frames by setup and type (top), airmass and seeing (bottom)."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.dates as mdates
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    fig = Figure(figsize=(11, 4.6), dpi=90, layout="constrained")
    top, bottom = fig.subplots(2, 1, sharex=True, height_ratios=(3, 2))
    lanes = list(dict.fromkeys(r.setup or "no setup (biases)" for r in rows))
    lanes = sorted(lanes, key=lambda s: (s == "no setup (biases)", s))
    for row in rows:
        lane = lanes.index(row.setup or "no setup (biases)")
        width = timedelta(seconds=max(row.exptime_s, 30.0))   # short frames stay visible
        colour = TYPE_COLOURS.get(row.frame_type, "#555555")
        good = row.status == "ok"
        top.barh(lane, mdates.date2num(row.start + width) - mdates.date2num(row.start),
                 left=mdates.date2num(row.start), height=0.55, color=colour if good else "white",
                 edgecolor=colour if good else "#c0392b", hatch=None if good else "xx",
                 linewidth=0.8)
        if row.frame_type in ("science", "standard"):
            top.annotate(row.frame_id.split("_")[-1], (mdates.date2num(row.start), lane + 0.32),
                         fontsize=6.5, color="#333333")
    top.set_yticks(range(len(lanes)), lanes, fontsize=8)
    top.set_ylim(-0.7, len(lanes) - 0.3)
    top.invert_yaxis()
    handles = [Patch(color=c, label=t) for t, c in TYPE_COLOURS.items()]
    handles.append(Patch(facecolor="white", edgecolor="#c0392b", hatch="xx",
                         label="rejected / ignored"))
    top.legend(handles=handles, fontsize=7, ncol=6, loc="lower left",
               bbox_to_anchor=(0.0, 1.0), frameon=False)
    if title:
        fig.suptitle(title, fontsize=10)

    on_sky = [r for r in rows if r.frame_type in ("science", "standard") and r.status == "ok"]
    mid = [mdates.date2num(r.start + timedelta(seconds=r.exptime_s / 2)) for r in on_sky]
    airmass = [r.airmass for r in on_sky]
    bottom.plot(mid, airmass, "o-", color="#2c3e50", markersize=4, linewidth=0.8)
    bottom.set_ylabel("airmass", fontsize=8)
    bottom.invert_yaxis()
    seeing_ax = bottom.twinx()
    seeing = [r.seeing_arcsec for r in on_sky]
    seeing_ax.plot(mid, seeing, "s--", color="#d35400", markersize=4, linewidth=0.8)
    seeing_ax.set_ylabel("seeing FWHM (arcsec)", fontsize=8, color="#d35400")
    finite = [s for s in seeing if math.isfinite(s)]
    if finite:
        seeing_ax.set_ylim(0, max(finite) * 1.4)
    bottom.legend(handles=[Line2D([], [], color="#2c3e50", marker="o", label="airmass"),
                           Line2D([], [], color="#d35400", marker="s", linestyle="--",
                                  label="seeing (spatial profile FWHM)")],
                  fontsize=7, loc="upper right", frameon=False)
    bottom.xaxis.set_major_formatter(mdates.DateFormatter("%H:%M", tz=timezone.utc))
    bottom.set_xlabel("UTC", fontsize=8)
    for ax in (top, bottom, seeing_ax):
        ax.tick_params(labelsize=7)
    top.grid(axis="x", alpha=0.3)
    bottom.grid(alpha=0.3)
    return fig
