"""Glue between Snakemake rules and the step adapters.

Every rule runs ``pipeline/workflow/run_step.py`` through Snakemake's ``script:``
directive; that script calls :func:`run_rule`, which looks the rule's name up
in :data:`STEPS` and calls the adapter with the rule's named inputs, named
outputs and params as keyword arguments. So a rule

.. code-block:: python

    rule master_bias:
        input: frames=...
        output: master=...
        params: sigma=3.0

calls ``make_master_bias_file(frames=[...], master="...", sigma=3.0)``.
Warnings and log messages go to the rule's log file. Modules are imported
only when their rule runs, to keep the per-job start-up short.
"""

import importlib
import logging
import sys
import time
import traceback
import warnings

from pipeline.core import provenance

__all__ = ["STEPS", "run_rule"]

#: rule name -> (module, adapter function)
STEPS = {
    "night_log": ("pipeline.night.steps", "write_night_log_file"),
    "master_bias": ("pipeline.ccd.steps", "make_master_bias_file"),
    "master_flat": ("pipeline.ccd.steps", "make_master_flat_file"),
    "calibrate_frame": ("pipeline.ccd.steps", "calibrate_frame_file"),
    "find_arc_lines": ("pipeline.wavelength.steps", "find_arc_lines_file"),
    "solve_wavelength": ("pipeline.wavelength.steps", "solve_wavelength_file"),
    "extract_spectra": ("pipeline.extraction.steps", "extract_frame_file"),
    "fit_sensitivity": ("pipeline.fluxcal.steps", "fit_sensitivity_file"),
    "flux_calibrate": ("pipeline.fluxcal.steps", "flux_calibrate_file"),
    "combine_spectra": ("pipeline.combine.steps", "combine_spectra_file"),
    "manifest": ("pipeline.products.manifest", "write_manifest_file"),
    "night_report": ("pipeline.products.report", "write_night_report_file"),
}


def _named(namedlist, *, as_paths):
    out = {}
    for name, value in namedlist.items():
        if as_paths:
            value = [str(v) for v in value] if isinstance(value, list) else str(value)
        out[name] = value
    return out


def run_rule(rule, inputs, outputs, params, log_path=None):
    """Run the adapter registered for ``rule``; log warnings to ``log_path``."""
    module_name, func_name = STEPS[rule]
    handlers = [logging.StreamHandler(sys.stderr)]
    if log_path:
        handlers.append(logging.FileHandler(log_path, mode="w"))
    logging.basicConfig(level=logging.INFO, handlers=handlers, force=True,
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    logging.captureWarnings(True)
    warnings.simplefilter("default")
    log = logging.getLogger(f"pipeline.{rule}")
    provenance.set_step_context(rule, params)
    start = time.perf_counter()
    func = getattr(importlib.import_module(module_name), func_name)
    imported = time.perf_counter()
    try:
        func(**inputs, **outputs, **params)
    except Exception:
        log.error("rule %s failed:\n%s", rule, traceback.format_exc())
        raise
    log.info("rule %s done: %.2f s importing %s, %.2f s computing", rule,
             imported - start, module_name, time.perf_counter() - imported)


def run_from_snakemake(smk):
    """Entry point used by ``run_step.py`` with Snakemake's ``snakemake`` object."""
    log_path = smk.log[0] if len(smk.log) else None
    run_rule(smk.rule, _named(smk.input, as_paths=True), _named(smk.output, as_paths=True),
             _named(smk.params, as_paths=False), log_path)
