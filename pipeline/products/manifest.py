"""The manifest: one table listing every product of a night.

People and scripts find products through ``manifest.ecsv`` instead of guessing
file names. Each row gives the product's kind, its path relative to the
output folder, the raw frames it came from, the object and setup, and a
status. Raw frames that the inventory rejected or ignored are listed too
(kind ``raw_frame``), with the reason, so the table accounts for the whole
night. Products that were expected but are missing (a failed job) are listed
with status ``missing``.

The kind of a product is read from where it lives (see :data:`KINDS`); object,
setup and source frames are read from its FITS header (``OBJECT``, ``SETUP``,
``INPUTnn``) or, for tables and figures, from the frame id in its name.
"""

import fnmatch
import warnings
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table

__all__ = ["KINDS", "product_kind", "build_manifest", "write_manifest_file"]

#: (pattern relative to out_dir, kind); the first match wins.
KINDS = (
    ("night_log.ecsv", "night_log"),
    ("night_report.html", "night_report"),
    ("calibrations/master_bias_*_qa.*", "master_bias_qa"),
    ("calibrations/master_bias_*", "master_bias"),
    ("calibrations/master_flat_*_qa.*", "master_flat_qa"),
    ("calibrations/master_flat_*", "master_flat"),
    ("calibrated/*", "calibrated_frame"),
    ("wavelength/*_lines.ecsv", "arc_lines"),
    ("wavelength/*_solution.fits", "wavelength_solution"),
    ("wavelength/*_qa.*", "wavelength_qa"),
    ("rectified/*", "rectified_frame"),
    ("sky/*", "sky_subtracted_frame"),
    ("spectra/*/*.fits", "spectrum_1d"),
    ("spectra/*/*.ecsv", "extraction_listing"),
    ("spectra_fluxed/*/*.fits", "spectrum_1d_fluxed"),
    ("spectra_fluxed/*/*.ecsv", "fluxed_listing"),
    ("flux/sensitivity_*", "sensitivity"),
    ("combined/*.ecsv", "coadd_listing"),
    ("combined/*.png", "qa_figure"),
    ("combined/*_spliced.fits", "spectrum_spliced"),
    ("combined/*/*.fits", "spectrum_science_frame"),
    ("combined/*.fits", "spectrum_coadd"),
    ("qa/*.png", "qa_figure"),
    ("qa/*", "qa_table"),
)

_COLUMNS = ("kind", "path", "source_frames", "object", "setup", "status", "note")


def product_kind(relative_path):
    """Kind of a product from its path relative to the output folder."""
    rel = str(relative_path).replace("\\", "/")
    for pattern, kind in KINDS:
        if fnmatch.fnmatch(rel, pattern):
            return kind
    return "other"


def _fits_details(path):
    try:
        header = fits.getheader(path)
    except (OSError, ValueError):
        return [], "", ""
    inputs = [str(header[k]) for k in header if k.startswith("INPUT") and k[5:].isdigit()]
    return inputs, str(header.get("OBJECT", "")), str(header.get("SETUP", ""))


def _frame_from_name(name, frame_ids):
    """The longest known frame id that starts the file name (for tables and PNGs)."""
    best = ""
    for frame_id in frame_ids:
        if name.startswith(frame_id) and len(frame_id) > len(best):
            best = frame_id
    return best


def _listing_status(path):
    """Status of a fluxed-spectra listing: 'uncalibrated' (with the reasons) when any
    of its spectra could not be flux-calibrated."""
    try:
        listing = Table.read(path, format="ascii.ecsv")
    except Exception as exc:
        return "unreadable", str(exc)
    if "status" not in listing.colnames:
        return "ok", ""
    bad = listing[listing["status"] != "calibrated"]
    if not len(bad):
        return "ok", ""
    reasons = sorted({str(r) for r in bad["reason"]}) if "reason" in bad.colnames else []
    return "uncalibrated", "; ".join(reasons)


def build_manifest(out_dir, *, expected=(), night_log=None):
    """Build the manifest table of everything below ``out_dir``.

    Parameters
    ----------
    out_dir : str or Path
        The night's output folder.
    expected : sequence of str
        Product paths the workflow meant to write; those absent get status
        ``missing``.
    night_log : astropy.table.Table, optional
        The inventory's night log; its rejected and ignored frames are added.

    Returns
    -------
    astropy.table.Table
        Columns kind, path, source_frames, object, setup, status, note.
    """
    out_dir = Path(out_dir)
    records = {}
    frame_info = {}
    if night_log is not None:
        for row in night_log:
            frame_info[str(row["frame_id"])] = row
    frame_ids = list(frame_info)

    files = sorted(p for p in out_dir.rglob("*")
                   if p.is_file() and "logs" not in p.relative_to(out_dir).parts[:1]
                   and p.name != "manifest.ecsv" and not p.name.startswith("."))
    for path in files:
        rel = path.relative_to(out_dir).as_posix()
        kind = product_kind(rel)
        sources, obj, setup = ([], "", "")
        if path.suffix == ".fits":
            sources, obj, setup = _fits_details(path)
        frame_id = _frame_from_name(path.name, frame_ids) or _frame_from_name(
            path.parent.name, frame_ids)
        if frame_id:
            info = frame_info[frame_id]
            sources = sources or [Path(str(info["path"])).name]
            obj = obj or str(info["object"])
            setup = setup or str(info["setup"])
        status, note = _listing_status(path) if kind == "fluxed_listing" else ("ok", "")
        records[rel] = dict(kind=kind, path=rel, source_frames=",".join(sources), object=obj,
                            setup=setup, status=status, note=note)

    for exp in expected:
        exp_path = Path(exp)
        rel = (exp_path.relative_to(out_dir) if exp_path.is_absolute() or
               str(exp_path).startswith(str(out_dir)) else exp_path).as_posix()
        if rel in records or (out_dir / rel).is_dir():
            continue
        records[rel] = dict(kind=product_kind(rel), path=rel, source_frames="", object="",
                            setup="", status="missing",
                            note="not produced: see the job's log under logs/")

    rows = sorted(records.values(), key=lambda r: (r["kind"], r["path"]))
    if night_log is not None:
        for row in night_log:
            if str(row["status"]) != "ok":
                rows.append(dict(kind="raw_frame", path=str(row["path"]),
                                 source_frames=Path(str(row["path"])).name,
                                 object=str(row["object"]), setup=str(row["setup"]),
                                 status=str(row["status"]), note=str(row["reason"])))
    table = Table(rows=[[r[c] for c in _COLUMNS] for r in rows] or None,
                  names=_COLUMNS, dtype=[str] * len(_COLUMNS))
    table.meta["description"] = "Every product of the night; kinds in pipeline.products.manifest.KINDS"
    table.meta["n_missing"] = int(np.sum(table["status"] == "missing")) if len(table) else 0
    return table


def write_manifest_file(*, products, night_log, manifest, out_dir):
    """Adapter: write ``manifest`` (ECSV) for ``out_dir``.

    ``products`` are the paths the workflow expects; ``night_log`` is the
    inventory's ECSV night log.
    """
    log_table = None
    if night_log and Path(night_log).exists():
        log_table = Table.read(night_log, format="ascii.ecsv")
    table = build_manifest(out_dir, expected=products, night_log=log_table)
    n_missing = table.meta["n_missing"]
    if n_missing:
        warnings.warn(f"{manifest}: {n_missing} expected products are missing")
    Path(manifest).parent.mkdir(parents=True, exist_ok=True)
    table.write(manifest, format="ascii.ecsv", overwrite=True)
    return table
