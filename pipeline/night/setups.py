"""Group frames into instrument setups (and readout modes) by matching header values.

Encoders jitter: a grating tilt read as 8.9249 on one frame and 8.9251 on the next
is one setup, though any rounding to a fixed number of decimals puts the two on
either side of a boundary. So frames are never grouped by a rounded string. Each
setup keyword is matched on its own:

* numbers within the keyword's absolute tolerance
  (``instrument.setup_tolerances``) belong together, by single-linkage clustering
  of all the night's values of that keyword: sorted values are split wherever the
  gap to the next exceeds the tolerance. A keyword without a configured tolerance
  matches to 1e-6 of its value (float noise of a header written by software only);
* text is compared with case and runs of blanks normalised (``' g600 '`` = ``'G600'``);
* binning is compared as its two integers.

A frame's setup is the tuple of its clusters; the id shows each cluster by the
median of its values, formatted as before (tilt ``t%05.2f``, slit ``s`` + up to 2
decimals, other numbers up to 3 decimals, text sanitised), with more decimals
for a keyword only when two of its clusters would otherwise print alike.
Single linkage chains: values spread over more than 3 tolerances in one cluster
are reported (:attr:`SetupGroups.notes`), since a slow drift would join setups that
an observer thinks of as different.

Examples
--------
>>> cluster_values([8.9249, 8.9251, 11.83], 0.01).tolist()
[0, 0, 1]
>>> groups = group_setups([{"T": 8.9249}, {"T": 8.9251}], ["T"],
...                       roles={"T": "grating_tilt_deg"}, tolerances={"T": 0.01})
>>> groups.ids
('t08.93', 't08.93')
"""

import re
from dataclasses import dataclass

import numpy as np

from pipeline.core import headers as hdr

__all__ = ["normalise_text", "setup_value", "cluster_values", "group_setups", "SetupGroups",
           "DEFAULT_RELATIVE_TOLERANCE", "CHAIN_WARNING_SPAN"]

#: relative tolerance of numeric keywords without a configured one (float noise only)
DEFAULT_RELATIVE_TOLERANCE = 1e-6
#: a cluster spread over more than this many tolerances is reported as chained
CHAIN_WARNING_SPAN = 3.0

_NUMBER_ROLES = ("grating_tilt_deg", "slit_width_arcsec")


def normalise_text(value):
    """Text with surrounding blanks removed, inner runs of blanks made one, upper case.

    Examples
    --------
    >>> normalise_text("  gg 495 ")
    'GG 495'
    """
    return " ".join(str(value).split()).upper()


def setup_value(keyword, value, role=None):
    """The comparable form of one header value: ``('num', float)``, ``('bin', (bx, by))``
    or ``('text', str)``.

    Parameters
    ----------
    keyword : str
        Header keyword (named in errors).
    value : object
        Header value.
    role : str or None
        The ``instrument.keywords`` name of the keyword: ``binning`` is parsed as
        two integers; ``grating_tilt_deg`` and ``slit_width_arcsec`` must be numbers
        (numeric text accepted).

    Raises
    ------
    ValueError
        Naming the keyword and value when a binning or number cannot be read.
    """
    if role == "binning":
        return ("bin", hdr.parse_binning(value, name=keyword))
    if role in _NUMBER_ROLES:
        try:
            number = float(value)
        except (TypeError, ValueError):
            raise ValueError(f"keyword {keyword} = {value!r}; expected a number") from None
        if not np.isfinite(number):
            raise ValueError(f"keyword {keyword} = {value!r}; expected a finite number")
        return ("num", number)
    if isinstance(value, bool):
        return ("text", "T" if value else "F")
    if isinstance(value, (int, float, np.integer, np.floating)):
        return ("num", float(value))
    return ("text", normalise_text(value))


def cluster_values(values, tolerance):
    """Single-linkage clusters of 1-D values: neighbours closer than ``tolerance`` join.

    Parameters
    ----------
    values : array_like, shape (n,)
    tolerance : float or None
        Absolute tolerance (>= 0); None = ``DEFAULT_RELATIVE_TOLERANCE`` of each value.

    Returns
    -------
    ndarray of int, shape (n,)
        Cluster label of each value, numbered in increasing order of value.
    """
    values = np.asarray(values, dtype=float).ravel()
    if values.size == 0:
        return np.zeros(0, dtype=int)
    order = np.argsort(values, kind="stable")
    sorted_values = values[order]
    gaps = np.diff(sorted_values)
    if tolerance is None:
        limit = DEFAULT_RELATIVE_TOLERANCE * np.maximum(np.abs(sorted_values[1:]), 1e-3)
    else:
        if not tolerance >= 0:
            raise ValueError(f"`tolerance` must be >= 0, got {tolerance!r}")
        limit = float(tolerance)
    starts = np.concatenate([[0], np.cumsum(gaps > limit)])
    labels = np.empty(values.size, dtype=int)
    labels[order] = starts
    return labels


def _sanitise(text):
    cleaned = re.sub(r"[^A-Za-z0-9.-]+", "-", str(text).strip()).strip("-")
    return cleaned or "none"


def _format_number(value, role, decimals):
    if role == "grating_tilt_deg":
        text = f"{round(value, decimals):0{3 + decimals}.{decimals}f}"
        return "t" + (text[1:] if set(text[1:]) <= set("0.") and text.startswith("-")
                      else text)
    text = f"{round(value, decimals):.{decimals}f}"
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    if text in ("-0", ""):
        text = "0"
    return ("s" + text) if role == "slit_width_arcsec" else text


def _default_decimals(role):
    return 2 if role in _NUMBER_ROLES else 3


@dataclass(frozen=True)
class SetupGroups:
    """Setup (or readout) ids of a list of frames.

    Attributes
    ----------
    ids : tuple of str
        One id per frame ('' for a frame without values).
    centres : dict
        keyword -> tuple of cluster medians (numeric keywords).
    notes : tuple of str
        Clusters spread over more than ``CHAIN_WARNING_SPAN`` tolerances.
    """

    ids: tuple
    centres: dict
    notes: tuple = ()


def group_setups(rows, keywords, *, roles=None, tolerances=None):
    """Ids that group frames whose setup-keyword values match within tolerance.

    Parameters
    ----------
    rows : list of dict or None
        Per frame, keyword -> raw header value (None for a frame to leave out,
        e.g. a bias or an unreadable file: its id is '').
    keywords : list of str
        The setup (or readout) keywords, in id order.
    roles : dict
        keyword -> its ``instrument.keywords`` name (for parsing and id format).
    tolerances : dict
        keyword -> absolute tolerance (``instrument.setup_tolerances``).

    Returns
    -------
    SetupGroups

    Raises
    ------
    ValueError
        When a value cannot be read (see :func:`setup_value`); callers read
        values with :func:`setup_value` first, per frame, to reject single frames.
    """
    roles = roles or {}
    tolerances = tolerances or {}
    present = [i for i, row in enumerate(rows) if row is not None]
    parts = {i: [] for i in present}
    centres = {}
    notes = []
    for keyword in keywords:
        role = roles.get(keyword)
        parsed = {i: setup_value(keyword, rows[i][keyword], role) for i in present}
        numeric = [i for i in present if parsed[i][0] == "num"]
        labels = {}
        if numeric:
            tol = tolerances.get(keyword)
            values = np.array([parsed[i][1] for i in numeric])
            found = cluster_values(values, tol)
            medians = [float(np.median(values[found == k])) for k in range(found.max() + 1)]
            for k in range(found.max() + 1):
                span = float(np.ptp(values[found == k]))
                if tol and span > CHAIN_WARNING_SPAN * tol:
                    notes.append(f"{keyword}: values {values[found == k].min():g} to "
                                 f"{values[found == k].max():g} form one setup (tolerance "
                                 f"{tol:g}, chained by intermediate values); lower "
                                 f"instrument.setup_tolerances.{keyword} if these are different "
                                 "setups")
            decimals = _default_decimals(role)
            texts = [_format_number(m, role, decimals) for m in medians]
            while len(set(texts)) < len(texts) and decimals < 8:
                decimals += 1
                texts = [_format_number(m, role, decimals) for m in medians]
            centres[keyword] = tuple(medians)
            labels = {i: texts[found[n]] for n, i in enumerate(numeric)}
        for i in present:
            kind, value = parsed[i]
            if kind == "num":
                parts[i].append(labels[i])
            elif kind == "bin":
                parts[i].append(f"{value[0]}x{value[1]}")
            else:
                parts[i].append(_sanitise(value))
    ids = tuple("_".join(parts[i]) if i in parts else "" for i in range(len(rows)))
    return SetupGroups(ids=ids, centres=centres, notes=tuple(notes))
