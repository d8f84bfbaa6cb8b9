"""The morning report: one HTML page per night, written for the observer who reads it first.

Top to bottom: per setup, whether each calibration succeeded (and any fallback), with its
key number marked pass / warn / fail against the configured limit; every frame that failed
or was rejected, with the reason; every warning a job raised (read from the job logs);
the plot of the night; combined spectra; thumbnails opening the full QA figures; and the
full QA tables, each one click away in a ``<details>`` block.

The page is built only from what the steps wrote (night log, manifest, QA tables, PNG
figures, job logs), so a new step's table or figure appears as soon as the manifest lists
it. It needs nothing from the network: figures are linked relative to the output folder
(which can be copied or served as it is) and the night plot is embedded as a ``data:``
PNG. Gathering lives in :mod:`pipeline.products.collect`, words and digits in
:mod:`pipeline.products.labels`, the night plot in :mod:`pipeline.products.nightplot`.
"""

import base64
import html
import io
import math
from collections import Counter
from datetime import datetime, timezone
from pathlib import Path

from astropy.io import fits
from astropy.table import Table

from pipeline import __version__
from pipeline.products.collect import fallbacks, job_messages, read_meta, setup_summaries
from pipeline.products.labels import Mark, as_text, format_value, label, worst

__all__ = ["render_night_report", "write_night_report_file"]

_STYLE = """
body { font-family: system-ui, sans-serif; margin: 0 auto; padding: 1em 1.5em; color: #222;
       max-width: 1200px; line-height: 1.35; }
h1 { font-size: 1.45em; margin-bottom: 0.2em; } h2 { border-bottom: 2px solid #4a6fa5;
     padding-bottom: 0.15em; margin-top: 1.6em; font-size: 1.2em; } h3 { font-size: 1.02em; }
.wrap { overflow-x: auto; max-width: 100%; }
table { border-collapse: collapse; margin: 0.3em 0 1em 0; font-size: 0.86em; }
th, td { border: 1px solid #c8c8c8; padding: 0.2em 0.5em; text-align: left; vertical-align: top; }
th { background: #e6edf5; font-weight: 600; } td:first-child { white-space: nowrap; } td.num { text-align: right;
     font-variant-numeric: tabular-nums; }
.mark { display: inline-block; min-width: 3.2em; text-align: center; border-radius: 3px;
        padding: 0 0.3em; font-weight: 600; font-size: 0.9em; }
.pass { background: #d7f0dc; color: #1d6b2f; } .warn { background: #fff0c2; color: #7a5600; }
.fail { background: #f8d3d3; color: #8f1d1d; }
tr.fail td { background: #fdeeee; } tr.warn td { background: #fffaea; }
.figs { display: flex; flex-wrap: wrap; gap: 0.6em; }
figure { margin: 0; border: 1px solid #ccc; padding: 0.3em; background: #fafafa; width: 212px; }
figure img { width: 210px; height: auto; display: block; }
figcaption { font-size: 0.75em; color: #444; overflow-wrap: anywhere; }
img.plot { max-width: 100%; height: auto; border: 1px solid #ddd; }
details { margin: 0.3em 0; } summary { cursor: pointer; font-weight: 600; }
.lead { font-size: 1.05em; } .muted { color: #666; font-size: 0.85em; }
"""

_MARK_TEXT = {Mark.PASS: "pass", Mark.WARN: "warn", Mark.FAIL: "fail"}

#: QA tables shown in full at the bottom: (manifest kind, heading)
_FULL_TABLES = (
    ("master_bias_qa", "Master bias"),
    ("master_flat_qa", "Master flat"),
    ("wavelength_qa", "Wavelength solutions"),
    ("sensitivity", "Sensitivity"),
    ("qa_table", "Flexure and traces"),
    ("extraction_listing", "Extracted spectra"),
    ("fluxed_listing", "Flux-calibrated spectra"),
    ("coadd_listing", "Combined spectra"),
)
_MAX_ROWS = 60
_NUMERIC = "biufc"


def _esc(text):
    return html.escape(str(text), quote=True)


def _mark(mark):
    if mark not in _MARK_TEXT:
        return ""
    return f"<span class='mark {mark}'>{_MARK_TEXT[mark]}</span>"


def _table(header, rows, *, row_marks=None, numeric=()):
    """An HTML table (in a scrolling wrapper) of already formatted, unescaped cells; a cell
    given as ('html', text) is inserted as it is."""
    out = ["<div class='wrap'><table><tr>" + "".join(f"<th>{_esc(h)}</th>" for h in header)
           + "</tr>"]
    for i, row in enumerate(rows):
        mark = row_marks[i] if row_marks else ""
        cls = f" class='{mark}'" if mark in (Mark.WARN, Mark.FAIL) else ""
        cells = []
        for j, cell in enumerate(row):
            td = "<td class='num'>" if j in numeric else "<td>"
            text = cell[1] if isinstance(cell, tuple) and cell[0] == "html" else _esc(cell)
            cells.append(f"{td}{text}</td>")
        out.append(f"<tr{cls}>" + "".join(cells) + "</tr>")
    out.append("</table></div>")
    return "\n".join(out)


def _link(rel, text=None):
    return ("html", f"<a href='{_esc(rel)}'>{_esc(text or rel)}</a>") if rel else ""


# ---------------------------------------------------------------- sections

def _calibration_section(summaries):
    parts = ["<section id='calibrations'><h2>Calibrations by setup</h2>"]
    if not summaries:
        parts.append("<p>No setup with usable arcs, standards or science frames.</p>")
    for summary in summaries:
        parts.append(f"<h3>{_mark(summary.mark)} Setup <code>{_esc(summary.setup)}</code> "
                     f"<span class='muted'>({summary.frames} frames)</span></h3>")
        rows, marks = [], []
        for check in summary.checks:
            rows.append([check.step, _link(check.link, check.item) if check.link else check.item,
                         check.value, check.limit, ("html", _mark(check.mark)), check.note])
            marks.append(check.mark)
        parts.append(_table(("step", "calibration", "result", "limit", "mark", "note"), rows,
                            row_marks=marks))
    parts.append("</section>")
    return "\n".join(parts)


def _flexure_messages(out_dir, manifest, known):
    """'flexure not measured' for frames whose flexure table says so but whose log did not."""
    found = []
    for rel in [str(r["path"]) for r in manifest if r["status"] == "ok"
                and str(r["path"]).endswith("_flexure.ecsv")]:
        meta = read_meta(Path(out_dir) / rel)
        status = str(meta.get("status", "ok"))
        frame = Path(rel).name[: -len("_flexure.ecsv")]
        if status not in ("ok", "disabled") and frame not in known:
            found.append(["extract_spectra", frame, "flexure", f"flexure not measured "
                          f"(status {status}); the arc's wavelengths were used as they are",
                          _link(rel)])
    return found


def _problems_section(out_dir, manifest, night_log, messages):
    parts = ["<section id='problems'><h2>Problems and warnings</h2>"]
    bad = [r for r in night_log if str(r["status"]) != "ok"]
    bad.sort(key=lambda r: (str(r["status"]) != "rejected", str(r["frame_id"])))
    if bad:
        parts.append("<h3>Frames not reduced</h3>")
        parts.append(_table(("frame", "type", "status", "object", "reason"),
                            [[as_text(r[c]) for c in ("frame_id", "frame_type", "status",
                                                       "object", "reason")] for r in bad],
                            row_marks=[Mark.FAIL if str(r["status"]) == "rejected" else ""
                                       for r in bad]))
    missing = [r for r in manifest if r["status"] == "missing"]
    if missing:
        parts.append("<h3>Products not made (failed jobs)</h3>")
        errors = {(m.job): m.text for m in messages if m.level == "error"}
        rows = []
        for r in missing:
            name = Path(str(r["path"])).name
            reason = next((t for job, t in errors.items() if name.startswith(job)), "")
            rows.append([r["kind"], r["path"], reason or r["note"]])
        parts.append(_table(("kind", "product", "why"), rows, row_marks=[Mark.FAIL] * len(rows)))
    uncal = [r for r in manifest if r["status"] not in ("ok", "missing") and r["kind"] != "raw_frame"]
    if uncal:
        parts.append("<h3>Products with a caveat</h3>")
        parts.append(_table(("kind", "product", "status", "why"),
                            [[r["kind"], _link(str(r["path"])), r["status"], r["note"]]
                             for r in uncal], row_marks=[Mark.WARN] * len(uncal)))
    ours = [m for m in messages if m.origin == "pipeline"]
    flagged = {m.job for m in ours if "flexure" in m.text.lower()}
    rows = [[m.rule, m.job, m.category, m.text, _link(m.log, "log")] for m in ours]
    rows += _flexure_messages(out_dir, manifest, flagged)
    parts.append("<h3>Warnings and errors raised by the steps</h3>")
    if rows:
        marks = [Mark.FAIL if r[2] == "error" else Mark.WARN for r in rows]
        parts.append(_table(("step", "job", "kind", "message", ""), rows, row_marks=marks))
    else:
        parts.append("<p>None: no step raised a warning.</p>")
    library = [m for m in messages if m.origin == "library"]
    if library:
        parts.append(f"<details><summary>{len(library)} warnings from libraries (numpy, "
                     "astropy, ...)</summary>")
        parts.append(_table(("step", "job", "kind", "message", ""),
                            [[m.rule, m.job, m.category, m.text, _link(m.log, "log")]
                             for m in library]))
        parts.append("</details>")
    parts.append("</section>")
    return "\n".join(parts)


def _seeing(out_dir, manifest, spatial_scale_arcsec_per_px):
    """Frame id -> FWHM (arcsec) of the narrowest object traced on its own on that frame
    (spectrum headers SPATFWHM, BINSPAT): the seeing for a star, an upper limit for a galaxy."""
    seeing = {}
    if not spatial_scale_arcsec_per_px:
        return seeing
    for r in manifest:
        if r["kind"] != "spectrum_1d" or r["status"] != "ok":
            continue
        try:
            header = fits.getheader(Path(out_dir) / str(r["path"]))
        except (OSError, ValueError):
            continue
        if str(header.get("TRCMODE", "own")) != "own" or "SPATFWHM" not in header:
            continue
        frame = str(header.get("FRAMEID", Path(str(r["path"])).parent.name))
        fwhm = (float(header["SPATFWHM"]) * float(spatial_scale_arcsec_per_px)
                * float(header.get("BINSPAT", 1)))
        seeing[frame] = min(fwhm, seeing.get(frame, fwhm))
    return seeing


def _night_section(out_dir, manifest, night_log, *, spatial_scale_arcsec_per_px, title):
    from pipeline.products.nightplot import night_timeline, plot_night

    parts = ["<section id='night'><h2>Night plot</h2>"]
    rows = night_timeline(night_log, seeing_arcsec=_seeing(out_dir, manifest,
                                                           spatial_scale_arcsec_per_px))
    if rows:
        fig = plot_night(rows, title=title)
        buffer = io.BytesIO()
        fig.savefig(buffer, format="png")
        data = base64.b64encode(buffer.getvalue()).decode("ascii")
        parts.append(f"<img class='plot' alt='frames of the night by setup and type, airmass "
                     f"and seeing' src='data:image/png;base64,{data}'>")
        parts.append("<p class='muted'>Bars: each frame from its start for its exposure time "
                     "(at least 30 s wide), by setup; hatched red: rejected or ignored. Below: "
                     "airmass and seeing (FWHM along the slit of the narrowest object "
                     "traced on the frame: an upper limit when all are extended) at mid-exposure.</p>")
    types = Counter((as_text(r["frame_type"]), as_text(r["status"])) for r in night_log)
    parts.append(_table(("frame type", "status", "files"),
                        [[t, s, n] for (t, s), n in sorted(types.items())], numeric=(2,)))
    parts.append("</section>")
    return "\n".join(parts)


def _coadd_row(rel, row):
    """One line of the combined-spectra table: what a person needs to pick a spectrum."""
    kind = str(row["kind"])
    inputs = "flux-calibrated" if str(row["input_kind"]) == "fluxed" else "e⁻ s⁻¹ Å⁻¹ (not fluxed)"
    setups = str(row["setup"]).split(",")
    where = setups[0] if len(setups) == 1 else f"{len(setups)} setups"
    scale = ""
    if kind == "splice" and math.isfinite(float(row["splice_scale"])):
        scale = f"{float(row['splice_scale']):.3f} ± {float(row['splice_scale_err']):.3f}"
    snr = format_value(float(row["snr_median"])) if kind != "splice" else ""
    link = _link(str(Path(rel).parent / str(row["file"])), as_text(row["object"]))
    shown = {"single": "one exposure"}.get(kind, kind)
    return [link, where, shown, int(row["n_exposures"]), as_text(row["frames"]).replace(",", ", "),
            inputs, snr, int(row["n_rejected"]) if kind != "splice" else "", scale,
            as_text(row["note"])]


def _coadd_section(out_dir, manifest):
    rels = [str(r["path"]) for r in manifest if r["kind"] == "coadd_listing" and r["status"] == "ok"]
    if not rels:
        return ""
    parts = ["<section id='coadds'><h2>Combined spectra</h2>"]
    for rel in rels:
        try:
            table = Table.read(Path(out_dir) / rel, format="ascii.ecsv")
        except Exception:  # noqa: BLE001
            continue
        medium = "vacuum" if table.meta.get("vacuum_wavelengths") else "air"
        parts.append(f"<p class='muted'>Wavelengths: {medium}, {_esc(table.meta.get('velocity_frame', ''))} "
                     "frame. Coadds: inverse-variance mean of the exposures of one target in one "
                     "setup; splices: two setups on one grid, the flux scale measured in their "
                     "overlap (1 expected for flux-calibrated spectra).</p>")
        rows = [_coadd_row(rel, row) for row in table]
        marks = []
        for row in table:
            scale = float(row["splice_scale"]) if row["kind"] == "splice" else math.nan
            off = (str(row["input_kind"]) == "fluxed" and math.isfinite(scale)
                   and abs(scale - 1.0) > max(0.05, 3 * float(row["splice_scale_err"])))
            marks.append(Mark.WARN if off else "")
        parts.append(_table(("target (file)", "setup", "kind", "exposures", "frames", "inputs",
                             "median S/N", "rejected px", "splice scale", "note"), rows,
                            row_marks=marks, numeric=(3, 6, 7)))
    figures = [str(r["path"]) for r in manifest if r["kind"] == "qa_figure" and r["status"] == "ok"
               and Path(str(r["path"])).name.endswith("_coadd.png")]
    parts.append("<p class='muted'>Each figure: the exposures and their combination; below, "
                 "the exposures used and the pixels rejected.</p>" + _thumbnails(figures))
    parts.append("</section>")
    return "\n".join(parts)


def _caption(rel):
    return Path(rel).stem.replace("_", " ")


def _thumbnails(figures):
    out = ["<div class='figs'>"]
    for rel in figures:
        out.append(f"<figure><a href='{_esc(rel)}'><img src='{_esc(rel)}' "
                   f"alt='{_esc(_caption(rel))}'></a><figcaption>{_esc(_caption(rel))}"
                   "</figcaption></figure>")
    out.append("</div>")
    return "\n".join(out)


#: headings of the QA figures by what their names say (first match wins)
_FIGURE_GROUPS = (("_wavelength_", "Wavelength solutions"),
                  ("sensitivity_", "Sensitivity"), ("_fluxed", "Flux-calibrated spectra"),
                  ("_rectified", "Rectified frames"), ("_spectra", "Extracted spectra"))


def _figures_section(manifest):
    figures = sorted(str(r["path"]) for r in manifest if r["kind"] == "qa_figure"
                     and r["status"] == "ok" and not str(r["path"]).endswith("_coadd.png"))
    if not figures:
        return ""
    parts = ["<section id='figures'><h2>QA figures</h2><p class='muted'>Click a thumbnail for "
             "the full figure.</p>"]
    groups = {}
    for rel in figures:
        name = Path(rel).name
        heading = next((h for key, h in _FIGURE_GROUPS if key in name), "Other figures")
        groups.setdefault(heading, []).append(rel)
    for heading in [h for _, h in _FIGURE_GROUPS] + ["Other figures"]:
        if heading in groups:
            parts.append(f"<h3>{_esc(heading)}</h3>" + _thumbnails(groups[heading]))
    parts.append("</section>")
    return "\n".join(parts)


def _read_table(path):
    if path.suffix.lower() == ".ecsv":
        return Table.read(path, format="ascii.ecsv")
    if path.suffix.lower() == ".fits":
        return Table.read(path, hdu=1)
    raise ValueError(f"{path}: not a table this report can show")


def _full_table(out_dir, rel):
    try:
        table = _read_table(Path(out_dir) / rel)
    except Exception as exc:  # noqa: BLE001 - a broken QA file must not break the report
        return f"<p><b>{_esc(rel)}</b>: could not be read ({_esc(exc)})</p>"
    meta = {k: v for k, v in table.meta.items() if not isinstance(v, dict)}
    description = str(meta.pop("description", ""))
    parts = [f"<details><summary>{_esc(rel)} <span class='muted'>({len(table)} rows)</span>"
             f"</summary><p class='muted'>{_esc(description)} <a href='{_esc(rel)}'>file</a></p>"]
    if meta:
        parts.append(_table(("quantity", "value"), [[label(k), format_value(v, k)]
                                                    for k, v in meta.items()]))
    cols = [c for c in table.colnames if table[c].ndim == 1]
    if len(table) and cols:
        shown = table[:_MAX_ROWS]
        numeric = tuple(i for i, c in enumerate(cols) if table[c].dtype.kind in _NUMERIC)
        parts.append(_table([label(c) for c in cols],
                            [[format_value(row[c], c) for c in cols] for row in shown],
                            numeric=numeric))
        if len(table) > _MAX_ROWS:
            parts.append(f"<p class='muted'>… {len(table) - _MAX_ROWS} more rows in the file.</p>")
    parts.append("</details>")
    return "\n".join(parts)


def _tables_section(out_dir, manifest):
    parts = ["<section id='tables'><h2>Full tables</h2>"]
    for kind, heading in _FULL_TABLES:
        rels = [str(r["path"]) for r in manifest if r["kind"] == kind and r["status"] == "ok"
                and Path(str(r["path"])).suffix.lower() == ".ecsv"]
        if rels:
            parts.append(f"<h3>{_esc(heading)}</h3>")
            parts.extend(_full_table(out_dir, rel) for rel in rels)
    parts.append("</section>")
    return "\n".join(parts)


def _products_section(manifest):
    kinds = Counter(str(k) for k in manifest["kind"]) if len(manifest) else Counter()
    return ("<section id='products'><h2>Products</h2>"
            + _table(("kind", "files"), [[k, n] for k, n in sorted(kinds.items())], numeric=(1,))
            + "<p>Every product with its source frames: <a href='manifest.ecsv'>manifest.ecsv</a>;"
              " one log per job under <code>logs/</code>.</p></section>")


def render_night_report(out_dir, manifest, night_log, *, title="Night report", limits=None,
                        spatial_scale_arcsec_per_px=None):
    """Return the report as an HTML string.

    Parameters
    ----------
    out_dir : Path
        The output folder; figure links are relative to it.
    manifest : astropy.table.Table
        As written by :mod:`pipeline.products.manifest`.
    night_log : astropy.table.Table
        As written by :mod:`pipeline.night.inventory`.
    limits : dict, optional
        The configured limits the calibrations are marked against (see
        :func:`pipeline.products.collect.setup_summaries`).
    spatial_scale_arcsec_per_px : float, optional
        Unbinned pixel scale along the slit, for the seeing in the night plot.
    """
    out_dir = Path(out_dir)
    now = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    summaries = setup_summaries(out_dir, manifest, night_log, limits=limits)
    messages = job_messages(out_dir)
    status = Counter(str(s) for s in manifest["status"]) if len(manifest) else Counter()
    n_rejected = sum(str(r["status"]) == "rejected" for r in night_log)
    n_warnings = sum(m.origin == "pipeline" and m.level == "warning" for m in messages)
    overall = worst([s.mark for s in summaries]
                    + [Mark.FAIL if status.get("missing", 0) else Mark.PASS]
                    + [Mark.WARN if (n_rejected or n_warnings) else Mark.PASS])
    n_fallbacks = len(fallbacks(out_dir))
    lead = (f"{_mark(overall)} {len(night_log)} raw files, {n_rejected} rejected; "
            f"{status.get('ok', 0)} products written, {status.get('missing', 0)} missing; "
            f"{n_warnings} warnings from the steps; {n_fallbacks} calibration fallbacks.")
    body = [f"<h1>{_esc(title)}</h1>", f"<p class='lead'>{lead}</p>",
            f"<p class='muted'>Written {now} by longslit-pipeline {_esc(__version__)}. Marks: "
            "pass within the configured limit, warn near it (or a fallback, or a check that "
            "kept the configured value), fail beyond it or missing.</p>",
            _calibration_section(summaries),
            _problems_section(out_dir, manifest, night_log, messages),
            _night_section(out_dir, manifest, night_log, title="",
                           spatial_scale_arcsec_per_px=spatial_scale_arcsec_per_px),
            _coadd_section(out_dir, manifest),
            _figures_section(manifest),
            _tables_section(out_dir, manifest),
            _products_section(manifest)]
    return ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
            "<meta name='viewport' content='width=device-width, initial-scale=1'>"
            "<link rel='icon' href='data:,'>"
            f"<title>{_esc(title)}</title><style>{_STYLE}</style></head><body>"
            + "\n".join(b for b in body if b) + "</body></html>")


def write_night_report_file(*, manifest, night_log, report, out_dir, title="Night report",
                            limits=None, spatial_scale_arcsec_per_px=None):
    """Adapter: write the HTML report for ``out_dir`` from its manifest and night log."""
    manifest_table = Table.read(manifest, format="ascii.ecsv")
    log_table = Table.read(night_log, format="ascii.ecsv")
    text = render_night_report(out_dir, manifest_table, log_table, title=title, limits=limits,
                               spatial_scale_arcsec_per_px=spatial_scale_arcsec_per_px)
    Path(report).write_text(text, encoding="utf-8")
