"""Readers of the extraction step's products, for later steps and for science frames.

* :func:`load_trace_table` reads ``qa/{frame}_traces.ecsv`` into traces;
* :func:`reference_trace` chooses, among them, the trace whose shape faint objects of
  other frames borrow (a pure decision, tested on its own).

The 1-D spectra are read with :func:`pipeline.core.spectra.read_spectrum`.
"""

import warnings

from pipeline.core.errors import InputFileError, InputFileWarning
from pipeline.extraction.trace import traces_from_table

__all__ = ["load_trace_table", "reference_trace", "load_reference_trace"]


def load_trace_table(path):
    """Traces of a frame from its ECSV trace table.

    Returns
    -------
    (list of pipeline.extraction.trace.Trace, list of str or None, str)
        The traces in table order, their roles (``target``/``other``; None for a table
        without a ``role`` column) and the frame id of the table ('' when empty).

    Raises
    ------
    InputFileError
        When the file is not an ECSV table with the trace columns.
    """
    from astropy.table import Table

    try:
        table = Table.read(path, format="ascii.ecsv")
        traces = traces_from_table(table)
    except (OSError, ValueError, KeyError) as exc:
        raise InputFileError(path, f"cannot be read as an ECSV trace table ({exc}); expected "
                             "qa/{frame}_traces.ecsv written by extract_spectra") from exc
    name = str(table["frame_id"][0]) if len(table) else ""
    roles = [str(r) for r in table["role"]] if "role" in table.colnames else None
    return traces, roles, name


def reference_trace(traces, roles=None):
    """The trace other frames borrow: the target if it was traced on its own, else the
    first object traced on its own, else None.

    Examples
    --------
    >>> from pipeline.extraction.trace import Trace, fixed_trace
    >>> reference_trace([fixed_trace([4000.0, 5000.0], 10.0, 3.0, 9.0)]) is None
    True
    >>> own = [Trace([y], (4e3, 5e3), 3.0, 50.0, "own") for y in (10.0, 80.0)]
    >>> reference_trace(own, ["other", "target"]).centre_px
    80.0
    """
    roles = list(roles) if roles is not None else ["other"] * len(traces)
    own = [t for t, r in sorted(zip(traces, roles), key=lambda tr: tr[1] != "target")
           if t.mode == "own"]
    return own[0] if own else None


def load_reference_trace(path):
    """:func:`reference_trace` of a trace table; a warning and None when it has none."""
    traces, roles, name = load_trace_table(path)
    ref = reference_trace(traces, roles)
    if ref is None:
        warnings.warn(f"{path}: no trace fitted on its own; faint objects keep a fixed row",
                      InputFileWarning)
        return None, ""
    return ref, name
