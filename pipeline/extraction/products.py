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
    (list of pipeline.extraction.trace.Trace, str)
        The traces in table order and the frame id of the table ('' when empty).

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
    return traces, name


def reference_trace(traces):
    """The trace other frames borrow: the first one traced on its own, else None.

    Examples
    --------
    >>> from pipeline.extraction.trace import fixed_trace
    >>> reference_trace([fixed_trace([4000.0, 5000.0], 10.0, 3.0, 9.0)]) is None
    True
    """
    own = [t for t in traces if t.mode == "own"]
    return own[0] if own else None


def load_reference_trace(path):
    """:func:`reference_trace` of a trace table; a warning and None when it has none."""
    traces, name = load_trace_table(path)
    ref = reference_trace(traces)
    if ref is None:
        warnings.warn(f"{path}: no trace fitted on its own; faint objects keep a fixed row",
                      InputFileWarning)
        return None, ""
    return ref, name
