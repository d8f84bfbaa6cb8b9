"""Provenance keywords written into every product header.

The workflow dispatcher (:mod:`pipeline.workflow.dispatch`) sets the step name and the
digest of the step's parameters once per job; adapters call :func:`stamp` on
each header they write. Outside the workflow the digest is ``'none'``.
"""

import contextvars
import hashlib
import json
from datetime import datetime, timezone
from pathlib import Path

from pipeline import __version__

__all__ = ["params_digest", "set_step_context", "stamp"]

_context = contextvars.ContextVar("pipeline_step", default=("interactive", "none"))


def params_digest(params):
    """SHA-256 (first 16 hex digits) of a JSON-serialisable parameter mapping."""
    text = json.dumps(params, sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def set_step_context(step, params):
    """Record the running step and its parameters' digest for later stamps."""
    _context.set((step, params_digest(params)))


def stamp(header, *, inputs=(), calibrations=()):
    """Add provenance keywords to ``header`` in place and return it.

    Keywords: ``PIPEVERS`` (package version), ``PIPESTEP`` (step name),
    ``CFGHASH`` (digest of the step's parameters), ``DATE`` (UTC of writing),
    ``INPUTnn`` (input file names) and ``CALIBnn`` (master calibrations used).
    """
    step, digest = _context.get()
    header["PIPEVERS"] = (__version__, "longslit-pipeline version")
    header["PIPESTEP"] = (step, "pipeline step that wrote this file")
    header["CFGHASH"] = (digest, "sha256[:16] of the step parameters")
    header["DATE"] = (datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S"),
                      "UTC date this file was written")
    for prefix, names in (("INPUT", inputs), ("CALIB", calibrations)):
        for key in [k for k in header if k.startswith(prefix) and k[len(prefix):].isdigit()]:
            del header[key]
        for i, name in enumerate(names, start=1):
            header[f"{prefix}{i:02d}"] = Path(str(name)).name
    return header
