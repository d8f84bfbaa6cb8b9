"""The morning report: one HTML page per night with every QA number and figure.

The page is built only from what the steps wrote (the night log, the manifest,
the QA tables and the PNG figures), so it needs to know nothing about the
steps themselves: a new step's QA table or figure appears in the report as
soon as the manifest lists it. Figures are linked relative to the output
folder, so the folder can be copied or served as it is.
"""

import html
from collections import Counter
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
from astropy.table import Table

from pipeline import __version__

__all__ = ["render_night_report", "write_night_report_file"]

_STYLE = """
body { font-family: sans-serif; margin: 1.5em; color: #222; max-width: 1400px; }
h1 { font-size: 1.5em; } h2 { border-bottom: 2px solid #4a6fa5; padding-bottom: 0.2em; }
table { border-collapse: collapse; margin: 0.5em 0 1.2em 0; font-size: 0.85em; }
th, td { border: 1px solid #bbb; padding: 0.2em 0.5em; text-align: left; }
th { background: #e6edf5; }
tr.bad td { background: #fbe3e3; } tr.warn td { background: #fff4d6; }
.figs { display: flex; flex-wrap: wrap; gap: 1em; }
figure { margin: 0; border: 1px solid #ccc; padding: 0.4em; background: #fafafa; }
figure img { max-width: 640px; display: block; }
figcaption { font-size: 0.8em; color: #444; }
.summary { font-size: 1.05em; }
"""

_QA_KINDS = ("master_bias_qa", "master_flat_qa", "wavelength_qa", "qa_table", "sensitivity")
_SECTION_TITLES = {
    "master_bias_qa": "Master bias",
    "master_flat_qa": "Master flat",
    "wavelength_qa": "Wavelength solutions",
    "qa_table": "Other QA tables",
    "sensitivity": "Sensitivity (flux calibration)",
}
_MAX_ROWS = 60

#: The headline numbers of each kind of QA table (read from the table's metadata), shown
#: together at the top of the report; (folder, file-name prefix, suffix, title, metadata keys).
_GLANCE = (
    ("calibrations", "master_bias_", "_qa.ecsv", "Bias: read noise",
     ("n_frames", "read_noise_e_configured_gain", "read_noise_configured_e",
      "read_noise_within_tolerance", "mean_level_adu")),
    ("calibrations", "master_flat_", "_qa.ecsv", "Flat: gain and bad pixels",
     ("n_frames", "gain_measured_e_per_adu", "gain_configured_e_per_adu", "gain_within_tolerance",
      "n_bad", "response_scatter")),
    ("wavelength", "", "_qa.ecsv", "Wavelength solutions",
     ("setup", "n_used", "n_rejected", "rms_angstrom", "rms_px", "rms_km_s", "tilt_nominal_deg",
      "tilt_fitted_deg", "focal_length_nominal_mm", "focal_length_fitted_mm")),
    ("qa", "", "_flexure.ecsv", "Flexure from night-sky lines",
     ("status", "n_used", "shift_px", "shift_err_px", "shift_kms")),
    ("flux", "sensitivity_", "_qa.ecsv", "Sensitivity fits",
     ("setup", "status", "rms_percent", "rms_binned_percent", "reason")),
)


def _fmt(value):
    if value is np.ma.masked:
        return ""
    if isinstance(value, np.ndarray) and value.ndim == 0:
        value = value.item()
    if isinstance(value, (float, np.floating)):
        if not np.isfinite(value):
            return str(value)
        return f"{value:.6g}"
    if isinstance(value, (list, tuple, np.ndarray)):
        return ", ".join(_fmt(v) for v in value)
    return str(value)


def _html_table(table, *, row_class=None, max_rows=_MAX_ROWS):
    cols = [c for c in table.colnames if table[c].ndim <= 2]
    parts = ["<table><tr>" + "".join(f"<th>{html.escape(c)}</th>" for c in cols) + "</tr>"]
    for i, row in enumerate(table):
        if i >= max_rows:
            parts.append(f"<tr><td colspan='{len(cols)}'>... {len(table) - max_rows} more rows "
                         "in the file</td></tr>")
            break
        cls = row_class(row) if row_class else ""
        attr = f" class='{cls}'" if cls else ""
        parts.append(f"<tr{attr}>" + "".join(f"<td>{html.escape(_fmt(row[c]))}</td>"
                                             for c in cols) + "</tr>")
    parts.append("</table>")
    return "\n".join(parts)


def _read_table(path):
    suffix = path.suffix.lower()
    if suffix == ".ecsv":
        return Table.read(path, format="ascii.ecsv")
    if suffix == ".fits":
        return Table.read(path, hdu=1)
    if suffix == ".json":
        import json
        data = json.loads(path.read_text())
        if isinstance(data, dict):
            flat = {k: v for k, v in data.items() if not isinstance(v, (dict, list))}
            return Table(rows=[list(flat.values())], names=list(flat))
    raise ValueError(f"{path}: not a table this report can show")


def _table_section(out_dir, paths):
    parts = []
    for rel in paths:
        try:
            table = _read_table(out_dir / rel)
        except Exception as exc:  # a broken QA file must not break the report
            parts.append(f"<p><b>{html.escape(rel)}</b>: could not be read ({html.escape(str(exc))})</p>")
            continue
        meta = {k: v for k, v in table.meta.items() if not isinstance(v, (dict, list))}
        parts.append(f"<h3>{html.escape(rel)}</h3>")
        if meta:
            meta_table = Table(rows=[[k, _fmt(v)] for k, v in meta.items()], names=("quantity", "value"),
                               dtype=[str, str])
            parts.append(_html_table(meta_table))
        if len(table):
            parts.append(_html_table(table))
    return "\n".join(parts)


def _glance_section(out_dir, manifest):
    parts = []
    paths = [str(r["path"]) for r in manifest if r["status"] == "ok"]
    for folder, prefix, suffix, title, keys in _GLANCE:
        rows = []
        for rel in paths:
            name = Path(rel).name
            if not (Path(rel).parent.as_posix() == folder and name.startswith(prefix)
                    and name.endswith(suffix)):
                continue
            try:
                meta = Table.read(out_dir / rel, format="ascii.ecsv").meta
            except Exception:
                continue
            present = [k for k in keys if k in meta]
            if present:
                rows.append((name, {k: meta[k] for k in present}))
        if not rows:
            continue
        cols = [k for k in keys if any(k in r[1] for r in rows)]
        table = Table(rows=[[name] + [_fmt(m.get(k, "")) for k in cols] for name, m in rows],
                      names=["file"] + cols, dtype=[str] * (len(cols) + 1))

        def flag(row):
            text = " ".join(str(row[c]) for c in table.colnames)
            return "bad" if ("False" in text or "failed" in text) else ""

        parts.append(f"<h3>{html.escape(title)}</h3>" + _html_table(table, row_class=flag))
    if not parts:
        return ""
    return "<h2>At a glance</h2>" + "\n".join(parts)


def render_night_report(out_dir, manifest, night_log, *, title="Night report"):
    """Return the report as an HTML string.

    Parameters
    ----------
    out_dir : Path
        The output folder; figure links are relative to it.
    manifest : astropy.table.Table
        As written by :mod:`pipeline.products.manifest`.
    night_log : astropy.table.Table
        As written by :mod:`pipeline.night.inventory`.
    """
    out_dir = Path(out_dir)
    now = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    status = Counter(str(s) for s in manifest["status"]) if len(manifest) else Counter()
    types = Counter((str(r["frame_type"]), str(r["status"])) for r in night_log)
    body = [f"<h1>{html.escape(title)}</h1>",
            f"<p class='summary'>Written {now} by longslit-pipeline {__version__}. "
            f"{len(night_log)} raw files; {status.get('ok', 0)} products written, "
            f"{status.get('missing', 0)} missing.</p>"]

    body.append(_glance_section(out_dir, manifest))
    body.append("<h2>Night log</h2>")
    counts = Table(rows=[[t, s, n] for (t, s), n in sorted(types.items())] or None,
                   names=("frame type", "status", "files"), dtype=[str, str, int])
    body.append(_html_table(counts))
    problems = night_log[[str(s) != "ok" for s in night_log["status"]]]
    if len(problems):
        body.append("<p>Frames not reduced, and why:</p>")
        cols = [c for c in ("frame_id", "frame_type", "status", "reason") if c in problems.colnames]
        body.append(_html_table(problems[cols], row_class=lambda r: "bad" if r["status"] == "rejected"
                                else "warn"))

    missing = manifest[manifest["status"] == "missing"] if len(manifest) else manifest
    if len(missing):
        body.append("<h2>Missing products</h2>")
        body.append(_html_table(missing["kind", "path", "note"], row_class=lambda r: "bad"))

    figures = [str(r["path"]) for r in manifest if r["kind"] == "qa_figure" and r["status"] == "ok"]
    if figures:
        body.append("<h2>QA figures</h2><div class='figs'>")
        for rel in figures:
            name = html.escape(rel)
            body.append(f"<figure><a href='{name}'><img src='{name}' alt='{name}'></a>"
                        f"<figcaption>{name}</figcaption></figure>")
        body.append("</div>")

    for kind in _QA_KINDS:
        rels = [str(r["path"]) for r in manifest if r["kind"] == kind and r["status"] == "ok"
                and Path(str(r["path"])).suffix.lower() in (".ecsv", ".json")]
        if rels:
            body.append(f"<h2>{_SECTION_TITLES[kind]} (all numbers)</h2>")
            body.append(_table_section(out_dir, rels))

    body.append("<h2>Products</h2>")
    kinds = Counter(str(k) for k in manifest["kind"]) if len(manifest) else Counter()
    body.append(_html_table(Table(rows=[[k, n] for k, n in sorted(kinds.items())] or None,
                                  names=("kind", "files"), dtype=[str, int])))
    body.append("<p>Every product with its source frames: <a href='manifest.ecsv'>manifest.ecsv</a>; "
                "per-job logs under <code>logs/</code>.</p>")
    return ("<!DOCTYPE html><html><head><meta charset='utf-8'>"
            f"<title>{html.escape(title)}</title><style>{_STYLE}</style></head><body>"
            + "\n".join(body) + "</body></html>")


def write_night_report_file(*, manifest, night_log, report, out_dir, title="Night report"):
    """Adapter: write the HTML report for ``out_dir`` from its manifest and night log."""
    manifest_table = Table.read(manifest, format="ascii.ecsv")
    log_table = Table.read(night_log, format="ascii.ecsv")
    text = render_night_report(out_dir, manifest_table, log_table, title=title)
    Path(report).write_text(text, encoding="utf-8")
