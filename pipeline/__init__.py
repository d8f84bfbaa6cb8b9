"""Reduction of grating long-slit spectrograph nights.

Each step lives in a module of its own and exposes pure functions on numpy
arrays plus one thin adapter that reads and writes FITS. The Snakefile at the
repository root wires the adapters into a workflow (see DEVELOPERS.md).
"""

__version__ = "0.1.0"
