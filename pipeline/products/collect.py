"""What the morning report says first, gathered from what the steps left on disk.

* :func:`setup_summaries`: per setup, each calibration's outcome (bias, flat,
  wavelength solution of each arc, sensitivity), its key number and a pass /
  warn / fail mark against the configured limit, plus any calibration fallback.
* :func:`job_messages`: every warning and error a job raised, read from the job
  logs. Every rule runs through :mod:`pipeline.workflow.dispatch`, which writes
  Python warnings and errors into ``logs/{rule}/{wildcards}.log`` in one fixed
  format (``time LEVEL logger: message``), so the logs are the one place where
  every step's warnings already are, whatever the step: parsing them needs no
  change in any step and cannot miss a new one.
* :func:`fallbacks`: the calibration fallbacks the workflow recorded in
  ``calibration_choices/`` (one ECSV or JSON per frame), shown as they are.

Everything tolerates missing or broken files: the report of a bad night is the
one that matters most.
"""

import json
import re
from dataclasses import dataclass, field
from pathlib import Path

from astropy.table import Table

from pipeline.products.labels import (Mark, as_text, format_value, mark_flag, mark_tolerance,
                                      mark_upper_limit, worst)

__all__ = ["CheckResult", "SetupSummary", "JobMessage", "setup_summaries", "job_messages",
           "parse_log", "fallbacks", "read_meta"]

_LOG_LINE = re.compile(r"^\S+ \S+ (?P<level>WARNING|ERROR|CRITICAL) (?P<logger>\S+): "
                       r"(?P<message>.*)$")
_PY_WARNING = re.compile(r"^(?:(?P<path>.*?):\d+: )?(?P<category>[A-Za-z_][A-Za-z0-9_]*Warning): "
                         r"(?P<text>.*)$")


@dataclass(frozen=True)
class CheckResult:
    """One calibration's outcome for the summary table."""

    step: str
    item: str
    value: str
    limit: str
    mark: str
    note: str = ""
    link: str = ""


@dataclass(frozen=True)
class SetupSummary:
    setup: str
    frames: int
    checks: tuple = field(default_factory=tuple)

    @property
    def mark(self):
        return worst(c.mark for c in self.checks)


@dataclass(frozen=True)
class JobMessage:
    """A warning or error from a job log."""

    level: str          # 'warning' or 'error'
    rule: str
    job: str            # the log's name: the frame, arc or setup
    category: str       # warning class (e.g. FlexureWarning) or 'error'
    text: str
    log: str            # log path relative to the output folder
    origin: str = "pipeline"   # 'library' for warnings raised inside a library (numpy, astropy)


def read_meta(path):
    """Metadata of an ECSV table ({} when the file is missing or unreadable)."""
    try:
        return dict(Table.read(path, format="ascii.ecsv").meta)
    except Exception:  # noqa: BLE001 - a broken QA file must not break the report
        return {}


def _ok_paths(manifest, kind=None):
    return [str(r["path"]) for r in manifest
            if r["status"] == "ok" and (kind is None or r["kind"] == kind)]


def _missing(manifest):
    return {str(r["path"]) for r in manifest if r["status"] == "missing"}


def setup_summaries(out_dir, manifest, night_log, *, limits=None):
    """Per-setup calibration outcomes.

    Parameters
    ----------
    out_dir : Path
    manifest, night_log : astropy.table.Table
    limits : dict, optional
        ``read_noise_tolerance``, ``gain_tolerance`` (relative), ``wavelength_max_rms_px``,
        ``sensitivity_max_rms_percent``; a missing limit gives no mark, never a guess.

    Returns
    -------
    list of SetupSummary
    """
    out_dir = Path(out_dir)
    limits = dict(limits or {})
    missing = _missing(manifest)
    choices = fallbacks(out_dir)
    rows = [r for r in night_log if as_text(r["status"]) == "ok" and as_text(r["setup"])
            and as_text(r["frame_type"]) in ("arc", "standard", "science")]
    setups = list(dict.fromkeys(as_text(r["setup"]) for r in rows))
    summaries = []
    for setup in setups:
        mine = [r for r in rows if as_text(r["setup"]) == setup]
        readouts = sorted({as_text(r["readout"]) for r in mine if "readout" in r.colnames} - {""})
        checks = []
        for readout in readouts:
            checks.append(_bias_check(out_dir, readout, missing, limits))
        checks.append(_flat_check(out_dir, setup, missing, limits))
        for arc in [str(r["frame_id"]) for r in mine if str(r["frame_type"]) == "arc"]:
            checks.append(_arc_check(out_dir, arc, missing, limits))
        checks.append(_flux_check(out_dir, setup, manifest, limits))
        frame_ids = {str(r["frame_id"]) for r in mine}
        for choice in choices:
            if choice.get("frame", "") in frame_ids or choice.get("setup", "") == setup:
                checks.append(CheckResult(
                    "fallback", choice.get("calibration", choice.get("kind", "calibration")),
                    choice.get("used", ""), "", Mark.WARN,
                    choice.get("reason", choice.get("note", "")), choice.get("_file", "")))
        summaries.append(SetupSummary(setup, len(mine), tuple(checks)))
    return summaries


def _bias_check(out_dir, readout, missing, limits):
    rel = f"calibrations/master_bias_{readout}_qa.ecsv"
    if f"calibrations/master_bias_{readout}.fits" in missing:
        return CheckResult("bias", f"readout {readout}", "failed", "", Mark.FAIL,
                           "no master bias: see its log under logs/master_bias/")
    meta = read_meta(out_dir / rel)
    if not meta:
        return CheckResult("bias", f"readout {readout}", "no QA table", "", Mark.NONE)
    measured = meta.get("read_noise_e_configured_gain")
    configured = meta.get("read_noise_configured_e")
    tolerance = meta.get("tolerance", limits.get("read_noise_tolerance"))
    mark = worst([mark_tolerance(measured, configured, tolerance),
                  mark_flag(meta.get("read_noise_within_tolerance"))])
    value = f"read noise {format_value(measured)} e⁻ ({meta.get('n_frames', '?')} frames)"
    limit = (f"{format_value(configured)} e⁻ ± {format_value(100 * float(tolerance))} %"
             if configured is not None and tolerance is not None else "")
    return CheckResult("bias", f"readout {readout}", value, limit, mark, "", rel)


def _flat_check(out_dir, setup, missing, limits):
    rel = f"calibrations/master_flat_{setup}_qa.ecsv"
    if f"calibrations/master_flat_{setup}.fits" in missing:
        return CheckResult("flat", "master flat", "failed", "", Mark.FAIL,
                           "no master flat: see its log under logs/master_flat/")
    meta = read_meta(out_dir / rel)
    if not meta:
        return CheckResult("flat", "master flat", "no QA table", "", Mark.NONE)
    measured = meta.get("gain_measured_e_per_adu")
    configured = meta.get("gain_configured_e_per_adu")
    tolerance = meta.get("gain_tolerance", limits.get("gain_tolerance"))
    mark = worst([mark_tolerance(measured, configured, tolerance),
                  mark_flag(meta.get("gain_within_tolerance"))])
    value = (f"gain {format_value(measured)} e⁻/ADU, {format_value(meta.get('n_bad'))} bad "
             f"pixels ({meta.get('n_frames', '?')} frames)")
    limit = (f"{format_value(configured)} e⁻/ADU ± {format_value(100 * float(tolerance))} %"
             if configured is not None and tolerance is not None else "")
    return CheckResult("flat", "master flat", value, limit, mark, "", rel)


def _arc_check(out_dir, arc, missing, limits):
    rel = f"wavelength/{arc}_qa.ecsv"
    if f"wavelength/{arc}_solution.fits" in missing:
        return CheckResult("wavelength", f"arc {arc}", "failed", "", Mark.FAIL,
                           f"no solution: see logs/solve_wavelength/{arc}.log")
    meta = read_meta(out_dir / rel)
    if not meta:
        return CheckResult("wavelength", f"arc {arc}", "no QA table", "", Mark.NONE)
    max_rms = limits.get("wavelength_max_rms_px")
    value = (f"rms {format_value(meta.get('rms_angstrom'))} Å = "
             f"{format_value(meta.get('rms_px'))} px, {meta.get('n_used', '?')} lines")
    mark = mark_upper_limit(meta.get("rms_px"), max_rms)
    limit = f"≤ {format_value(max_rms)} px" if max_rms is not None else ""
    return CheckResult("wavelength", f"arc {arc}", value, limit, mark, "", rel)


def _flux_check(out_dir, setup, manifest, limits):
    rel = f"flux/sensitivity_{setup}_qa.ecsv"
    present = rel in _ok_paths(manifest)
    if not present:
        if f"flux/sensitivity_{setup}.fits" in _missing(manifest):
            return CheckResult("flux calibration", "sensitivity", "failed", "", Mark.FAIL,
                               "see logs/fit_sensitivity/")
        notes = sorted({str(r["note"]) for r in manifest if r["kind"] == "fluxed_listing"
                        and str(r["setup"]) == setup and str(r["status"]) != "ok"})
        return CheckResult("flux calibration", "sensitivity", "not calibrated", "", Mark.WARN,
                           "; ".join(notes) or "no standard star with a flux table in this setup")
    meta = read_meta(out_dir / rel)
    status = str(meta.get("status", "ok"))
    max_rms = limits.get("sensitivity_max_rms_percent")
    rms = meta.get("rms_binned_percent", meta.get("rms_percent"))
    mark = Mark.FAIL if status not in ("ok", "fitted") else mark_upper_limit(rms, max_rms)
    value = f"residual rms {format_value(meta.get('rms_percent'))} % per pixel"
    if "rms_binned_percent" in meta:
        width = meta.get("bin_width_angstrom")
        bins = f"{format_value(width)}-Å bins" if width is not None else "wavelength bins"
        value += f", {format_value(meta['rms_binned_percent'])} % in {bins} (marked)"
    limit = f"≤ {format_value(max_rms)} %" if max_rms is not None else ""
    return CheckResult("flux calibration", "sensitivity", value, limit, mark,
                       str(meta.get("reason", "")) if status not in ("ok", "fitted") else "", rel)


def parse_log(text):
    """(level, category, text, origin) of each warning or error in one job log; origin is
    'library' for a Python warning raised outside the pipeline package.

    Examples
    --------
    >>> line = ("2026-03-15 01:02:03,456 WARNING py.warnings: /p/pipeline/extraction/flexure.py:12: "
    ...         "FlexureWarning: no sky line; flexure not measured")
    >>> parse_log(line)
    [('warning', 'FlexureWarning', 'no sky line; flexure not measured', 'pipeline')]
    """
    found = []
    lines = text.splitlines()
    for i, line in enumerate(lines):
        match = _LOG_LINE.match(line)
        if not match:
            continue
        level = "error" if match["level"] in ("ERROR", "CRITICAL") else "warning"
        message = match["message"]
        if level == "error":
            # the traceback follows; its last non-blank line names the exception
            tail = [t for t in lines[i + 1:] if t.strip() and not _LOG_LINE.match(t)]
            last = next((t for t in reversed(tail) if not t.startswith(" ")), "")
            found.append(("error", "error", f"{message.rstrip(':')}: {last}".strip(": "),
                          "pipeline"))
            continue
        warning = _PY_WARNING.match(message)
        if warning:
            path = (warning["path"] or "").replace("\\", "/")
            origin = "library" if path and "/pipeline/" not in path else "pipeline"
            found.append(("warning", warning["category"], warning["text"].strip(), origin))
        else:
            found.append(("warning", "warning", message.strip(), "pipeline"))
    return found


def job_messages(out_dir, *, skip_rules=("night_log",)):
    """Every warning and error in ``logs/{rule}/{job}.log``, in rule then job order.

    ``night_log`` is skipped by default: its warnings are the rejected frames, which the
    report lists from the night log with their reasons.
    """
    out_dir = Path(out_dir)
    messages = []
    for path in sorted((out_dir / "logs").glob("*/*.log")):
        rule = path.parent.name
        if rule in skip_rules:
            continue
        try:
            text = path.read_text(errors="replace")
        except OSError:
            continue
        seen = set()
        for level, category, message, origin in parse_log(text):
            if (level, message) in seen:
                continue
            seen.add((level, message))
            messages.append(JobMessage(level, rule, path.stem, category, message,
                                       path.relative_to(out_dir).as_posix(), origin))
    return messages


def fallbacks(out_dir):
    """Rows of the calibration-choice records under ``calibration_choices/`` that say a
    fallback was used (a row with ``fallback`` false or empty is left out); each row is a
    dict of strings with ``_file`` naming its file."""
    rows = []
    for path in sorted((Path(out_dir) / "calibration_choices").glob("*")):
        try:
            if path.suffix == ".ecsv":
                table = Table.read(path, format="ascii.ecsv")
                records = [{c: row[c] for c in table.colnames} for row in table]
            elif path.suffix == ".json":
                data = json.loads(path.read_text())
                records = data if isinstance(data, list) else [data]
            else:
                continue
        except Exception:  # noqa: BLE001
            continue
        for record in records:
            if not isinstance(record, dict):
                continue
            flag = record.get("fallback", True)
            if str(flag).strip().lower() in ("false", "0", "", "no", "none"):
                continue
            clean = {str(k): format_value(v) for k, v in record.items()}
            clean["_file"] = path.relative_to(out_dir).as_posix()
            clean.setdefault("frame", path.stem)
            rows.append(clean)
    return rows
