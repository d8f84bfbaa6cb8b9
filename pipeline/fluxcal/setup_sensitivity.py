"""The sensitivity of one setup from its standard-star frames: every decision in one place.

:func:`sensitivity_for_setup` takes the standards as the adapter read them
(:class:`StandardObservation`: the flux table and the frame's spectra, or why they could
not be read) and returns a :class:`SetupSensitivity` with everything the writers need:
the fit (or the reason there is none), the measured points, the QA rows and meta data,
the telluric template and the header cards. It chooses each frame's spectrum, checks
the star's name, models the slit loss and measures every standard; a standard that
cannot be used is recorded with the reason and the others go on.
"""

import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from pipeline.core.errors import FluxCalibrationError, FluxCalibrationWarning, PipelineError
from pipeline.core.headers import header_float
from pipeline.fluxcal.extinction import spectrum_airmass
from pipeline.fluxcal.pixels import as_regions
from pipeline.fluxcal.sensitivity import fit_sensitivity, measure_sensitivity
from pipeline.fluxcal.profiles import star_slit_fraction
from pipeline.fluxcal.standards import choose_standard_spectrum, standard_name_mismatch
from pipeline.fluxcal.telluric import telluric_template

__all__ = ["SensitivityOptions", "StandardObservation", "SetupSensitivity", "measure_standard",
           "sensitivity_for_setup", "sensitivity_header_cards"]


@dataclass(frozen=True)
class SensitivityOptions:
    """The options of a setup's sensitivity (keys of ``flux_calibration`` in the schema).

    Defaults equal config/schema.yaml. ``site`` (``latitude_deg``, ``longitude_deg``,
    ``height_m``) computes the airmass of spectra without AIRMASS;
    ``spatial_scale_arcsec_per_px`` is the instrument's unbinned scale along the slit;
    ``slit_loss_model`` is one of :data:`pipeline.fluxcal.slitloss.SLIT_LOSS_MODELS`.
    """

    fit_kind: str = "spline"
    knot_spacing_angstrom: float = 250.0
    degree: int = 3
    clip_sigma: float = 3.0
    max_iterations: int = 5
    error_floor_mag: float = 0.002
    max_extrapolation_angstrom: float = 150.0
    exclude_regions: tuple = ()
    telluric_bands: tuple = ()
    telluric_correction: bool = False
    telluric_airmass_exponent: float = 0.6
    slit_loss_model: str = "none"
    slit_centring_rms_arcsec: float = 0.0
    spatial_scale_arcsec_per_px: float = None
    seeing_exponent: float = -0.2
    airmass_policy: str = "computed"
    airmass_warn_difference: float = 0.01
    site: dict = None


@dataclass(frozen=True)
class StandardObservation:
    """One standard-star frame as read from disk.

    Parameters
    ----------
    frame : str
        Frame id (the spectra directory's name).
    table_path : str
        Its flux table's path (for the QA table).
    table : FluxTable or None
        None when the table could not be read (``problem`` says why).
    spectra : tuple of ExtractedSpectrum
        The frame's readable spectra.
    problem : str
        Why the frame cannot be used ('' when it can).
    rectified : Frame or None
        The rectified frame the spectra come from (the 'moffat' slit-loss model).
    traces : tuple of ndarray or None
        Each spectrum's trace on ``rectified`` (same order as ``spectra``).
    """

    frame: str
    table_path: str
    table: object = None
    spectra: tuple = ()
    problem: str = ""
    rectified: object = None
    traces: tuple = ()


@dataclass(frozen=True)
class SetupSensitivity:
    """Everything the writers of ``fit_sensitivity`` need.

    ``fit`` is None when no sensitivity could be fitted (``reason`` says why);
    ``points``, ``standards`` (names) and ``inputs`` (spectrum paths) list the used
    standards in the fit's order; ``rows`` and ``meta`` make the QA table;
    ``header_cards`` go into the sensitivity product's primary header.
    """

    setup: str
    fit: object
    points: tuple
    standards: tuple
    inputs: tuple
    rows: tuple
    meta: dict
    reason: str = ""
    telluric: object = None
    header_cards: dict = field(default_factory=dict)
    regions: tuple = ()


def measure_standard(observation, *, extinction, regions, options):
    """Measure the sensitivity on one standard frame.

    Returns
    -------
    points : SensitivityPoints
    row : dict
        Its QA-table row (``status`` 'used').
    slit : dict
        The standard's slit-loss details ({} without a slit-loss model).

    Raises
    ------
    FluxCalibrationError, InputFileError, ValueError
        When the frame cannot be used (the caller records why).
    """
    if observation.problem:
        raise FluxCalibrationError(observation.problem)
    if not observation.spectra:
        raise FluxCalibrationError(f"{observation.frame}: no readable standard-star spectrum "
                                   "(the extraction found no object?)")
    table = observation.table
    chosen = choose_standard_spectrum(observation.spectra)
    spec = observation.spectra[chosen]
    obj = str(spec.header.get("OBJECT", ""))
    mismatch = standard_name_mismatch(obj, table.name)
    if mismatch:
        warnings.warn(f"{spec.path}: {mismatch} ({observation.table_path}); the table is used "
                      "as configured", FluxCalibrationWarning, stacklevel=2)
    airmass, choice = spectrum_airmass(spec.header, site=options.site, path=spec.path,
                                       policy=options.airmass_policy,
                                       warn_difference=options.airmass_warn_difference)
    exptime = header_float(spec.header, "EXPTIME", path=spec.path)
    fraction, details = None, {}
    if options.slit_loss_model != "none":
        traces = observation.traces
        fraction, rel_err, details = star_slit_fraction(
            spec, model=options.slit_loss_model, rectified=observation.rectified,
            trace_rows=traces[chosen] if chosen < len(traces) else None,
            spatial_scale_arcsec_per_px=options.spatial_scale_arcsec_per_px,
            seeing_exponent=options.seeing_exponent,
            centring_rms_arcsec=options.slit_centring_rms_arcsec)
        details = {**details, "slit_fraction_rel_err": rel_err}
    points = measure_sensitivity(
        spec.wave_angstrom, spec.values, spec.variance, spec.mask, exptime_s=exptime,
        airmass=airmass, flux_table=table, extinction=extinction, exclude_regions=regions,
        error_floor_mag=options.error_floor_mag, slit_fraction=fraction,
        info={"frame": observation.frame, "object": obj, "path": spec.path, **details})
    if points.for_fit.sum() == 0:
        raise FluxCalibrationError(f"{spec.path}: no pixel of the spectrum is usable and "
                                   f"covered by the flux table {table.source}")
    row = dict(object=obj, airmass=airmass, airmass_from=choice.source, exptime_s=exptime,
               wave_min_angstrom=float(np.min(points.wave_angstrom[points.for_fit])),
               wave_max_angstrom=float(np.max(points.wave_angstrom[points.for_fit])),
               status="used", name=obj or table.name)
    return points, row, details


def sensitivity_header_cards(*, extinction, slit_loss_model, standard_slit=(),
                             centring_rms_arcsec=0.0):
    """Cards of the sensitivity product's primary header set by the setup's options.

    ``standard_slit``: the slit-loss details of each used standard
    (:func:`pipeline.fluxcal.profiles.star_slit_fraction`).

    >>> sensitivity_header_cards(extinction=None, slit_loss_model="none")["SLITMOD"]
    ('none', 'slit-loss model: none, gaussian or moffat')
    """
    cards = {"EXTTAB": ((extinction.source if extinction else "none"), "extinction table"),
             "SLITCORR": (slit_loss_model != "none", "sensitivity corrected for slit loss"),
             "SLITMOD": (slit_loss_model, "slit-loss model: none, gaussian or moffat")}
    if standard_slit:
        cards["STDFWHM"] = (float(np.mean([d["fwhm_arcsec"] for d in standard_slit])),
                            "[arcsec] standard's seeing FWHM")
        cards["STDHFWHM"] = (float(np.mean([d["header_fwhm_arcsec"] for d in standard_slit])),
                             "[arcsec] standard's extracted profile FWHM")
        cards["STDSLFR"] = (float(np.mean([d["slit_fraction_at_reference"]
                                           for d in standard_slit])),
                            "standard's slit fraction at its reference wavelength")
        cards["STDSLERR"] = (float(np.sqrt(np.mean([d["slit_fraction_rel_err"] ** 2
                                                    for d in standard_slit]))),
                             "relative error of the standard's slit fraction")
        betas = [d["beta"] for d in standard_slit if "beta" in d]
        if betas:
            cards["STDBETA"] = (float(np.mean(betas)), "standard's Moffat beta")
    if slit_loss_model == "moffat":
        cards["SLITCRMS"] = (float(centring_rms_arcsec),
                             "[arcsec] assumed rms centring across the slit")
    return cards


def sensitivity_for_setup(observations, *, setup, extinction, options,
                          extinction_problem=""):
    """Fit the sensitivity of one setup from its standard-star frames.

    Parameters
    ----------
    observations : sequence of StandardObservation
    setup : str
    extinction : ExtinctionCurve or None
        None applies no extinction correction.
    options : SensitivityOptions
    extinction_problem : str
        Why the configured extinction table could not be read: then no
        standard is used (a sensitivity without the site's extinction would be
        wrong at every other airmass).

    Returns
    -------
    SetupSensitivity
    """
    bands = as_regions(options.telluric_bands, "telluric_bands")
    regions = as_regions(options.exclude_regions) + bands
    points, rows, names, inputs, problems, slit_details = [], [], [], [], [], []
    if extinction_problem:
        problems.append(f"extinction table unusable: {extinction_problem}")
        observations = []
    for observation in observations:
        row = dict(setup=setup, frame=observation.frame,
                   flux_table=Path(observation.table_path).name)
        try:
            p, measured, slit = measure_standard(observation, extinction=extinction,
                                                 regions=regions, options=options)
            names.append(measured.pop("name"))
            row.update(measured)
            points.append(p)
            inputs.append(p.info["path"])
            if slit:
                slit_details.append(slit)
        except (PipelineError, ValueError) as exc:
            problems.append(f"{observation.frame}: {exc}")
            warnings.warn(f"standard {observation.frame} not used for the sensitivity of setup "
                          f"{setup}: {exc}", FluxCalibrationWarning, stacklevel=2)
            row.update(status="not used", reason=str(exc))
        rows.append(row)

    fit, reason = None, ""
    if points:
        try:
            fit = fit_sensitivity(points, kind=options.fit_kind,
                                  knot_spacing_angstrom=options.knot_spacing_angstrom,
                                  degree=options.degree, clip_sigma=options.clip_sigma,
                                  max_iterations=options.max_iterations,
                                  max_extrapolation_angstrom=options.max_extrapolation_angstrom)
        except FluxCalibrationError as exc:
            reason = str(exc)
    else:
        reason = ("no usable standard-star spectrum: " + "; ".join(problems)) if problems else \
            "no standard-star spectrum given"
    meta = dict(setup=setup, fit_kind=options.fit_kind, degree=int(options.degree),
                slit_loss_model=options.slit_loss_model,
                telluric_bands_angstrom=[list(b) for b in bands],
                knot_spacing_angstrom=float(options.knot_spacing_angstrom),
                clip_sigma=float(options.clip_sigma),
                exclude_regions_angstrom=[list(r) for r in regions],
                extinction_table=(extinction.source if extinction is not None else "none"),
                sensitivity_definition="2.5 log10 S, S in electron cm2 / erg "
                                       "(counts/s/A above the atmosphere per unit f_lambda)")
    if fit is None:
        meta.update(status="failed", reason=reason)
        return SetupSensitivity(setup, None, tuple(points), tuple(names), tuple(inputs),
                                tuple(rows), meta, reason=reason, regions=tuple(regions))
    per = {d["frame"]: d for d in fit.info["per_standard"]}
    for row in rows:
        d = per.get(row["frame"])
        if d and row.get("status") == "used":
            row.update(n_points=d["n_used"] + d["n_rejected"], n_used=d["n_used"],
                       n_rejected=d["n_rejected"], rms_percent=d["rms_percent"],
                       offset_percent=d["offset_percent"])
        row.update(fit_rms_percent=fit.info["rms_percent"],
                   fit_rms_binned_percent=fit.info["rms_binned_percent"])
    meta.update(status="ok", reason="", rms_percent=fit.info["rms_percent"],
                rms_binned_percent=fit.info["rms_binned_percent"],
                chi2_reduced=fit.info["chi2_reduced"], wave_min_angstrom=fit.wave_min,
                wave_max_angstrom=fit.wave_max, standards=list(names))
    telluric = (telluric_template(points, fit, bands,
                                  airmass_exponent=options.telluric_airmass_exponent)
                if options.telluric_correction and bands else None)
    meta.update(telluric_correction=telluric is not None)
    cards = sensitivity_header_cards(extinction=extinction,
                                     slit_loss_model=options.slit_loss_model,
                                     standard_slit=slit_details,
                                     centring_rms_arcsec=options.slit_centring_rms_arcsec)
    return SetupSensitivity(setup, fit, tuple(points), tuple(names), tuple(inputs), tuple(rows),
                            meta, telluric=telluric, header_cards=cards, regions=tuple(regions))

