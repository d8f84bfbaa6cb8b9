"""The ``combine_spectra`` step: science-ready spectra of the night.

For every target (OBJECT) of the standards and science frames, in each setup:

1. **Inputs.** The target's spectrum (``{OBJECT}_target.fits``) of each frame. Flux-
   calibrated spectra (``spectra_fluxed/``) when *every* frame of the group was
   calibrated, else the extracted spectra (``spectra/``, converted to electron s⁻¹ Å⁻¹):
   a coadd never mixes the two. The listing says which (``input_kind``).
2. **Axis.** Each exposure's pixel edges (topocentric air; flexure already applied by
   the extraction) go to vacuum when configured and into the configured velocity frame
   with that exposure's own correction at mid-exposure (:mod:`pipeline.combine.frame`).
3. **Grid.** One linear grid per group over the union of the exposures' coverage, with
   the first exposure's mean pixel width; every exposure is resampled onto it flux-
   conservingly (:mod:`pipeline.combine.resample`) and written on its own as well
   (``combined/{target}_{setup}/{frame}.fits``).
4. **Coadd.** Inverse-variance weighted mean with leave-one-out rejection
   (:func:`pipeline.combine.coadd.combine_exposures`), ``combined/{target}_{setup}.fits``.
   Exposures nodded along the slit are extracted on their own traces, so they combine
   the same way.
5. **Splice.** A target observed in two setups overlapping by at least
   ``min_overlap_angstrom``: both coadds resampled onto one grid (the finer step), the
   flux scale of the redder setup relative to the bluer one measured in the overlap and
   reported; it is applied to uncalibrated inputs only (for flux-calibrated data it is a
   check that should be 1), then the inverse-variance mean:
   ``combined/{target}_spliced.fits``.

Products are read by ``specutils.Spectrum.read`` (FLUX, VAR, MASK; ``WAVE`` or ``AWAV``)
and by :func:`pipeline.combine.products.read_combined`; the FRAMES table HDU lists the
inputs, each with its velocity correction and weight. ``combined.ecsv`` lists the products.
"""

import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from pipeline.combine.coadd import combine_exposures, overlap_scale, splice
from pipeline.combine.frame import frame_edges, velocity_for_header
from pipeline.combine.products import write_products
from pipeline.combine.resample import resample
from pipeline.core.errors import InputFileError, PipelineWarning
from pipeline.core.grid import WavelengthGrid
from pipeline.core.spectra import read_spectrum

__all__ = ["CombineWarning", "GroupPlan", "plan_groups", "combine_group", "splice_groups",
           "combine_spectra_file"]

ELECTRON_RATE_UNIT = "electron / (s Angstrom)"


class CombineWarning(PipelineWarning):
    """A combination that went ahead with a caveat (a frame left out, a scale off 1)."""


@dataclass(frozen=True)
class GroupPlan:
    """The inputs of one coadd."""

    object: str
    setup: str
    input_kind: str          # 'fluxed' or 'extracted'
    frames: tuple            # frame ids
    paths: tuple             # spectrum file of each frame
    reason: str = ""         # why extracted spectra were used


def plan_groups(entries):
    """Group the night's target spectra by (object, setup) and choose their inputs.

    Parameters
    ----------
    entries : iterable of dict
        ``frame``, ``object``, ``setup``, ``extracted`` (path or ''), ``fluxed`` (path or
        '' when the frame has no calibrated spectrum), ``fluxed_status``.

    Returns
    -------
    list of GroupPlan
        In order of first appearance.

    Examples
    --------
    >>> e = [dict(frame="a", object="T", setup="S", extracted="a.fits", fluxed="fa.fits",
    ...           fluxed_status="calibrated"),
    ...      dict(frame="b", object="T", setup="S", extracted="b.fits", fluxed="",
    ...           fluxed_status="uncalibrated")]
    >>> [(g.input_kind, g.paths) for g in plan_groups(e)]
    [('extracted', ('a.fits', 'b.fits'))]
    """
    groups = {}
    for entry in entries:
        if not entry.get("extracted") and not entry.get("fluxed"):
            continue
        groups.setdefault((entry["object"], entry["setup"]), []).append(entry)
    plans = []
    for (obj, setup), members in groups.items():
        members = sorted(members, key=lambda e: e["frame"])
        fluxed = all(e.get("fluxed") and e.get("fluxed_status", "calibrated") == "calibrated"
                     for e in members)
        if fluxed:
            plans.append(GroupPlan(obj, setup, "fluxed", tuple(e["frame"] for e in members),
                                   tuple(e["fluxed"] for e in members)))
            continue
        usable = [e for e in members if e.get("extracted")]
        missing = [e["frame"] for e in members if not (e.get("fluxed")
                                                         and e.get("fluxed_status") == "calibrated")]
        which = ("no frame is flux-calibrated" if len(missing) == len(members) else
                 "not every frame is flux-calibrated (" + ", ".join(missing) + ")")
        reason = f"{which}: the extracted spectra are combined, in electron/s/Angstrom"
        plans.append(GroupPlan(obj, setup, "extracted", tuple(e["frame"] for e in usable),
                               tuple(e["extracted"] for e in usable), reason))
    return plans


@dataclass(frozen=True)
class Exposure:
    """One input spectrum in the product frame, on the group's grid."""

    frame: str
    path: str
    flux: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    header: object
    choice: object
    exptime_s: float
    covariance_factor: float


@dataclass(frozen=True)
class GroupResult:
    plan: GroupPlan
    grid: WavelengthGrid
    unit: str
    exposures: tuple
    flux: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    n_used: np.ndarray
    n_rejected: np.ndarray
    covariance_factor: float
    info: dict = field(default_factory=dict)


def _density(spec, *, per_second):
    """Flux density per Angstrom of the spectrum's own (air, topocentric) pixels and the
    pixel widths, so that density * width is the pixel's integrated flux."""
    width = spec.grid.widths_angstrom()
    if per_second:
        exptime = float(spec.header.get("EXPTIME", math.nan))
        if not (math.isfinite(exptime) and exptime > 0):
            raise InputFileError(spec.header.get("FRAMEID", "?"), f"EXPTIME = "
                                 f"{spec.header.get('EXPTIME')!r}; expected seconds > 0 to "
                                 "combine extracted spectra as rates")
        return spec.flux / exptime / width, spec.variance / (exptime * width) ** 2, width
    return spec.flux, spec.variance, width


def combine_group(plan, spectra, *, site, velocity_frame="barycentric", vacuum_wavelengths=True,
                  air_vacuum_formula="Ciddor1996", clip_sigma=5.0, max_iterations=3):
    """Put each spectrum of a group in the product frame, on one grid, and combine them.

    Parameters
    ----------
    plan : GroupPlan
    spectra : list of pipeline.core.spectra.ExtractedSpectrum
        Read from ``plan.paths`` (same order).
    site : dict
        ``latitude_deg``, ``longitude_deg``, ``height_m``.

    Returns
    -------
    GroupResult
    """
    per_second = plan.input_kind == "extracted"
    moved = []
    for frame, path, spec in zip(plan.frames, plan.paths, spectra):
        if spec.grid.vacuum:
            raise InputFileError(path, "the input axis is already vacuum (CTYPE1 WAVE); expected "
                                 "the topocentric air wavelengths of the extraction")
        choice = velocity_for_header(spec.header, site=site, frame=velocity_frame,
                                     vacuum=vacuum_wavelengths, formula=air_vacuum_formula,
                                     path=path)
        density, var, width_air = _density(spec, per_second=per_second)
        edges = frame_edges(spec.grid.edges_angstrom(), velocity_km_s=choice.velocity_km_s,
                            vacuum=vacuum_wavelengths, formula=air_vacuum_formula)
        ratio = width_air / np.diff(edges)         # conserve each pixel's integrated flux
        moved.append((frame, path, spec, choice, density * ratio, var * ratio ** 2, edges))
    first_edges = moved[0][6]
    step = float(np.mean(np.diff(first_edges)))
    lo = min(m[6][0] for m in moved)
    hi = max(m[6][-1] for m in moved)
    n_pix = int(math.floor((hi - lo) / step))
    grid = WavelengthGrid(lo + 0.5 * step, step, n_pix, vacuum=bool(vacuum_wavelengths))
    exposures = []
    for frame, path, spec, choice, density, var, edges in moved:
        res = resample(density, var, spec.mask, edges, grid.edges_angstrom())
        varcorr = float(spec.header.get("VARCORR", 1.0)) * res.covariance_factor
        exposures.append(Exposure(frame, path, res.flux, res.variance, res.mask, spec.header,
                                  choice, float(spec.header.get("EXPTIME", math.nan)), varcorr))
    stack = combine_exposures(np.vstack([e.flux for e in exposures]),
                              np.vstack([e.variance for e in exposures]),
                              np.vstack([e.mask for e in exposures]),
                              clip_sigma=clip_sigma, max_iterations=max_iterations)
    unit = ELECTRON_RATE_UNIT if per_second else str(spectra[0].header.get("BUNIT", ""))
    good = stack.mask == 0
    with np.errstate(invalid="ignore", divide="ignore"):
        snr = stack.flux[good] / np.sqrt(stack.variance[good])
    info = dict(stack.info)
    info["snr_median"] = float(np.nanmedian(snr)) if snr.size else math.nan
    return GroupResult(plan, grid, unit, tuple(exposures), stack.flux, stack.variance, stack.mask,
                       stack.n_used, stack.n_rejected,
                       float(np.median([e.covariance_factor for e in exposures])), info)


def splice_groups(blue, red, *, min_overlap_angstrom=100.0):
    """Splice two coadds of one target (bluer first) when they overlap enough; else None.

    Returns
    -------
    dict or None
        ``grid``, ``flux``, ``variance``, ``mask``, ``scale`` (OverlapScale of red onto blue),
        ``applied`` (bool), ``n_used``.
    """
    b_edges, r_edges = blue.grid.edges_angstrom(), red.grid.edges_angstrom()
    overlap = min(b_edges[-1], r_edges[-1]) - max(b_edges[0], r_edges[0])
    if overlap < min_overlap_angstrom or blue.unit != red.unit:
        return None
    step = min(blue.grid.step, red.grid.step)
    lo, hi = min(b_edges[0], r_edges[0]), max(b_edges[-1], r_edges[-1])
    grid = WavelengthGrid(lo + 0.5 * step, step, int(math.floor((hi - lo) / step)),
                          vacuum=blue.grid.vacuum)
    on = [resample(g.flux, g.variance, g.mask, e, grid.edges_angstrom())
          for g, e in ((blue, b_edges), (red, r_edges))]
    scale = overlap_scale(grid.centres_angstrom(), on[0].flux, on[0].variance, on[0].mask == 0,
                          on[1].flux, on[1].variance, on[1].mask == 0)
    applied = blue.plan.input_kind == "extracted" and math.isfinite(scale.scale)
    combo = splice(on[0].flux, on[0].variance, on[0].mask, on[1].flux, on[1].variance,
                   on[1].mask, scale_b=scale.scale if applied else 1.0)
    return {"grid": grid, "flux": combo.flux, "variance": combo.variance, "mask": combo.mask,
            "n_used": combo.n_used, "scale": scale, "applied": applied,
            "covariance_factor": float(np.median([blue.covariance_factor, red.covariance_factor]))}


def _entries(spectra, fluxed):
    """The target's spectrum of each frame, with its calibrated version if any."""
    from astropy.io import fits
    from astropy.table import Table

    fluxed_dirs = {Path(d).name: Path(d) for d in fluxed}
    entries = []
    for directory in map(Path, spectra):
        frame = directory.name
        files = sorted(directory.glob("*_target.fits"))
        if not files:
            warnings.warn(f"{directory}: no target spectrum (no object traced); frame "
                          f"{frame} is left out of the combined spectra", CombineWarning)
            continue
        header = fits.getheader(files[0])
        entry = {"frame": frame, "object": str(header.get("OBJECT", frame)),
                 "setup": str(header.get("SETUP", "")), "extracted": str(files[0]),
                 "fluxed": "", "fluxed_status": "uncalibrated"}
        fdir = fluxed_dirs.get(frame)
        candidate = fdir / files[0].name if fdir is not None else None
        if candidate is not None and candidate.exists():
            entry["fluxed"] = str(candidate)
            entry["fluxed_status"] = "calibrated"
            for listing in fdir.glob("*.ecsv"):
                table = Table.read(listing, format="ascii.ecsv")
                for row in table:
                    if "file" in table.colnames and Path(str(row["file"])).name == files[0].name:
                        entry["fluxed_status"] = str(row["status"])
        entries.append(entry)
    return entries


def combine_spectra_file(*, spectra, combined, fluxed=(), site, options):
    """Adapter of the ``combine_spectra`` rule.

    Parameters
    ----------
    spectra : list of str
        The extraction's per-frame folders (standards and science).
    fluxed : list of str
        The flux calibration's per-frame folders (those that exist).
    combined : str
        Output folder.
    site : dict
        ``instrument.site`` (latitude_deg, longitude_deg, height_m).
    options : dict
        The ``combine`` config section.
    """
    plans = plan_groups(_entries(spectra, fluxed))
    results = []
    for plan in plans:
        if plan.reason:
            warnings.warn(f"{plan.object} in {plan.setup}: {plan.reason}", CombineWarning)
        spectra_read = [read_spectrum(p, expected_unit=None) for p in plan.paths]
        results.append(combine_group(plan, spectra_read, site=site,
                                     velocity_frame=options["velocity_frame"],
                                     vacuum_wavelengths=options["vacuum_wavelengths"],
                                     air_vacuum_formula=options["air_vacuum_formula"],
                                     clip_sigma=options["clip_sigma"],
                                     max_iterations=options["max_iterations"]))
    splices = []
    by_object = {}
    for result in results:
        by_object.setdefault(result.plan.object, []).append(result)
    for obj, members in by_object.items():
        if len(members) < 2:
            continue
        members = sorted(members, key=lambda r: r.grid.start_angstrom)[:2]
        spliced = splice_groups(members[0], members[1],
                                min_overlap_angstrom=options["min_overlap_angstrom"])
        if spliced is None:
            continue
        scale = spliced["scale"]
        if (members[0].plan.input_kind == "fluxed" and math.isfinite(scale.scale)
                and abs(scale.scale - 1.0) > max(0.05, 3 * scale.scale_err)):
            warnings.warn(f"{obj}: flux scale between setups {members[1].plan.setup} and "
                          f"{members[0].plan.setup} is {scale.scale:.3f} +- {scale.scale_err:.3f} "
                          "in their overlap; expected 1 for flux-calibrated spectra",
                          CombineWarning)
        splices.append((obj, members, spliced))
    write_products(Path(combined), results, splices, options=options)
    return results, splices

