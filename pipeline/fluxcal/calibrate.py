"""Calibration of a spectrum: extracted electrons to flux density above the atmosphere.

``f_lambda = C / (t Delta lambda S 10^(-0.4 k X))`` per pixel (:func:`calibrate_spectrum`),
with the slit fraction of a point source and the telluric transmission when given;
:func:`plan_spectrum_calibration` decides, for one spectrum, the airmass, the slit-loss
treatment and the header cards of its calibrated product.
"""

import math
import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from pipeline.core import maskbits
from pipeline.core.checks import as_1d_float, positive, same_shape
from pipeline.core.errors import FluxCalibrationWarning, PipelineError
from pipeline.core.headers import header_float
from pipeline.core.maskbits import MaskBit
from pipeline.fluxcal.extinction import as_airmass, extinction_at, spectrum_airmass, transmission
from pipeline.fluxcal.pixels import MAG_PER_REL, as_mask, exclusion_mask, pixel_edges
from pipeline.fluxcal.profiles import star_slit_fraction
from pipeline.fluxcal.slitloss import profile_fwhm_arcsec, source_kind
from pipeline.fluxcal.standards import FLUX_UNIT, table_flux_in_pixels

__all__ = ["CalibratedSpectrum", "calibrate_spectrum", "CalibrationOptions", "SpectrumCalibration",
           "slit_treatment", "fluxed_header_cards", "compare_with_table", "calibrate_one",
           "FrameCalibration", "calibrate_frame", "standard_cards"]

#: the sensitivity product's cards naming a standard star used: STD01, STD02, ...
_STANDARD_CARD = re.compile(r"STD\d\d")


@dataclass(frozen=True)
class CalibratedSpectrum:
    """A flux-calibrated 1-D spectrum.

    Parameters
    ----------
    wave_angstrom : ndarray, shape (n,), Angstrom
    flux : ndarray, shape (n,), erg / s / cm2 / Angstrom
        NaN outside the sensitivity's range (those pixels carry NO_COVERAGE).
    variance : ndarray, shape (n,), (erg / s / cm2 / Angstrom)^2
        From the counts' variance; plus the sensitivity's when
        ``info['sensitivity_error_included']``.
    mask : ndarray of uint8, shape (n,)
        The input mask, with NO_COVERAGE where no sensitivity exists and
        NONFINITE where the input was not finite.
    calibration_variance : ndarray, shape (n,), (erg / s / cm2 / Angstrom)^2
        Variance due to the sensitivity's fit error alone (fully correlated
        over neighbouring pixels, since it comes from a few coefficients).
    info : dict
        ``airmass``, ``exptime_s``, ``sensitivity_error_included`` ...
    """

    wave_angstrom: np.ndarray
    flux: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    calibration_variance: np.ndarray
    info: dict = field(default_factory=dict)


def calibrate_spectrum(wave_angstrom, counts_e, variance_e2, mask=None, *, exptime_s, airmass,
                       sensitivity, extinction=None, include_sensitivity_error=False,
                       slit_fraction=None, telluric=None, slit_fraction_rel_err=0.0):
    """Turn extracted electrons into flux density above the atmosphere.

    Parameters
    ----------
    wave_angstrom : array_like, shape (n,), Angstrom
        Pixel centres (air), strictly increasing.
    counts_e : array_like, shape (n,), electron
        Electrons per spectral pixel in the exposure.
    variance_e2 : array_like, shape (n,), electron^2
    mask : array_like of uint8, shape (n,), optional
    exptime_s : float, seconds
    airmass : float
    sensitivity : SensitivityFit
    extinction : ExtinctionCurve or None
        None applies no extinction correction.
    include_sensitivity_error : bool
        Add the sensitivity's fit variance to ``variance`` (it is always
        available separately as ``calibration_variance``).
    slit_fraction : array_like, shape (n,), optional
        Fraction of a point source's light that entered the slit; given, the
        flux is divided by it (total flux of the point source). Leave None for
        extended sources (flux through the slit) or when the sensitivity
        includes the standard's slit loss.
    telluric : TelluricTemplate, optional
        Divide by the telluric transmission at ``airmass``; its error joins
        ``calibration_variance``.
    slit_fraction_rel_err : float
        Relative 1-sigma error of the slit-loss correction (the source's and the
        standard's in quadrature); joins ``calibration_variance`` (grey: the same
        fraction at every pixel).

    Returns
    -------
    CalibratedSpectrum
        ``flux = C / (t * Delta lambda * S * 10**(-0.4 k X))``,
        ``variance = var(C) / (t * Delta lambda * S * 10**(-0.4 k X))**2``.

    Examples
    --------
    >>> from pipeline.fluxcal.sensitivity import SensitivityFit
    >>> fit = SensitivityFit('chebyshev', 1, np.array([40.0, 0.0]), np.zeros((2, 2)),
    ...                      np.array([4000.0, 6000.0]), 4000.0, 6000.0)
    >>> w = np.linspace(4100.0, 5900.0, 10)
    >>> s = calibrate_spectrum(w, np.full(10, 4e6), np.full(10, 4e6), exptime_s=1.0,
    ...                        airmass=1.0, sensitivity=fit)
    >>> float(s.flux[0])
    2e-12
    """
    wave = as_1d_float(wave_angstrom, "wave_angstrom")
    counts = as_1d_float(counts_e, "counts_e")
    var = as_1d_float(variance_e2, "variance_e2")
    same_shape([wave, counts, var], ["wave_angstrom", "counts_e", "variance_e2"])
    mask = as_mask(mask, wave).copy()
    exptime_s = positive(exptime_s, "exptime_s")
    airmass = as_airmass(airmass)
    dwave = np.diff(pixel_edges(wave))
    sens = sensitivity.sensitivity(wave)
    sens_rel_err = sensitivity.mag_error(wave) / MAG_PER_REL
    k = (np.zeros_like(wave) if extinction is None
         else extinction_at(extinction, wave, outside="hold"))
    conversion = exptime_s * dwave * sens * transmission(k, airmass)
    if slit_fraction is not None:
        slit_fraction = np.asarray(slit_fraction, dtype=float)
        same_shape([wave, slit_fraction], ["wave_angstrom", "slit_fraction"])
        conversion = conversion * slit_fraction
    tell_sig = np.zeros_like(wave)
    if telluric is not None:
        tell, tell_sig = telluric.transmission(wave, airmass)
        conversion = conversion * tell
    covered = np.isfinite(conversion) & (conversion > 0)
    finite = np.isfinite(counts) & np.isfinite(var)
    mask[~covered] |= maskbits.MASK_DTYPE(MaskBit.NO_COVERAGE)
    mask[~finite] |= maskbits.MASK_DTYPE(MaskBit.NONFINITE)
    good = covered & finite
    flux = np.full(wave.shape, np.nan)
    fvar = np.full(wave.shape, np.nan)
    cvar = np.full(wave.shape, np.nan)
    flux[good] = counts[good] / conversion[good]
    fvar[good] = var[good] / conversion[good] ** 2
    cvar[good] = flux[good] ** 2 * (sens_rel_err[good] ** 2 + tell_sig[good] ** 2
                                    + float(slit_fraction_rel_err) ** 2)
    if include_sensitivity_error:
        fvar = fvar + cvar
    beyond = covered & ((wave < sensitivity.wave_min) | (wave > sensitivity.wave_max))
    info = dict(exptime_s=exptime_s, airmass=airmass, n_extrapolated=int(beyond.sum()),
                extinction=(extinction.source if extinction is not None else "none"),
                sensitivity_error_included=bool(include_sensitivity_error),
                telluric_corrected=telluric is not None,
                n_no_coverage=int((~covered).sum()))
    return CalibratedSpectrum(wave, flux, fvar, mask, cvar, info)


# ----------------------------------------------------------------------------
# one frame's spectra: the decisions and the header cards
# ----------------------------------------------------------------------------

@dataclass(frozen=True)
class CalibrationOptions:
    """Options of ``flux_calibrate`` (keys of ``flux_calibration`` in the schema).

    Defaults equal config/schema.yaml. ``exclude_regions`` are left out of the
    comparison of a calibrated standard with its table; ``site`` computes a
    missing airmass.
    """

    include_sensitivity_error: bool = False
    spatial_scale_arcsec_per_px: float = None
    seeing_exponent: float = -0.2
    extended_fwhm_ratio: float = 1.5
    slit_centring_rms_arcsec: float = 0.0
    airmass_policy: str = "computed"
    airmass_warn_difference: float = 0.01
    exclude_regions: tuple = ()
    site: dict = None


@dataclass(frozen=True)
class SpectrumCalibration:
    """One calibrated spectrum and what its product needs.

    ``spectrum`` is the input (:class:`~pipeline.fluxcal.inputs.ExtractedSpectrum`),
    ``calibrated`` the result, ``header_cards`` the keywords added to the product,
    ``row`` its line of the frame's listing.
    """

    spectrum: object
    calibrated: CalibratedSpectrum
    header_cards: dict
    row: dict


def slit_treatment(spectrum, sensitivity_header, options, *, rectified=None, trace_rows=None):
    """The slit fraction to divide a spectrum by (or None), its error and the SLITLOSS card.

    Only when the sensitivity was corrected for slit loss (``SLITCORR``), with the
    sensitivity's model (``SLITMOD``; 'gaussian' for products without it): a profile at
    most ``extended_fwhm_ratio`` x the standard's (``STDFWHM``) is a point source,
    divided by its own slit fraction (total flux); a wider one is extended (flux
    through the slit). Otherwise the sensitivity includes the standard's slit loss and
    nothing is divided.

    Returns
    -------
    fraction : ndarray or None
    relative_error : float
        Of the correction: the source's and the standard's (``STDSLERR``) in quadrature.
    cards : dict
        ``SLITLOSS`` ('none', 'point' or 'extended') and, for point sources, the model,
        fraction and seeing cards.
    """
    if not sensitivity_header.get("SLITCORR", False):
        return None, 0.0, {"SLITLOSS": ("none", "sensitivity includes the standard's slit loss")}
    model = str(sensitivity_header.get("SLITMOD", "gaussian"))
    if model == "moffat":
        # extended sources are decided on the header FWHM before any profile is fitted
        fwhm_header, _ = profile_fwhm_arcsec(
            spectrum.header, spectrum.wave_angstrom,
            spatial_scale_arcsec_per_px=options.spatial_scale_arcsec_per_px, path=spectrum.path)
        standard_header_fwhm = float(sensitivity_header.get("STDHFWHM",
                                                            sensitivity_header["STDFWHM"]))
        if source_kind(fwhm_header, standard_header_fwhm,
                       extended_fwhm_ratio=options.extended_fwhm_ratio) == "extended":
            return None, 0.0, {"SLITLOSS": ("extended", f"flux through the slit (FWHM "
                                            f"{fwhm_header:.2f} arcsec)")}
    fraction, rel_err, details = star_slit_fraction(
        spectrum, model=model, rectified=rectified, trace_rows=trace_rows,
        spatial_scale_arcsec_per_px=options.spatial_scale_arcsec_per_px,
        seeing_exponent=options.seeing_exponent,
        centring_rms_arcsec=options.slit_centring_rms_arcsec)
    fwhm = details["fwhm_arcsec"]
    if model == "gaussian" and source_kind(
            fwhm, float(sensitivity_header["STDFWHM"]),
            extended_fwhm_ratio=options.extended_fwhm_ratio) == "extended":
        return None, 0.0, {"SLITLOSS": ("extended", f"flux through the slit (FWHM {fwhm:.2f} "
                                        "arcsec)")}
    total_err = math.hypot(rel_err, float(sensitivity_header.get("STDSLERR", 0.0)))
    cards = {"SLITLOSS": ("point", f"total flux: slit fraction "
                          f"{details['slit_fraction_at_reference']:.3f}"),
             "SLITMOD": (model, "slit-loss model"),
             "SLITFRAC": (details["slit_fraction_at_reference"],
                          "slit fraction at SLITREFW"),
             "SLITREFW": (details["fwhm_reference_angstrom"], "[Angstrom] reference wavelength"),
             "SLITFERR": (total_err, "rel. error of the slit correction (in CALVAR)"),
             "SEEFWHM": (fwhm, "[arcsec] seeing FWHM at SLITREFW")}
    if "beta" in details:
        cards["SEEBETA"] = (details["beta"], "Moffat beta of the seeing disc")
        cards["SLITCRMS"] = (details["centring_rms_arcsec"],
                             "[arcsec] assumed rms centring across the slit")
    return fraction, total_err, cards


def standard_cards(sensitivity_header):
    """The sensitivity's ``STDnn`` cards (the standard stars used) renamed ``FCSTDnn``.

    Only ``STD`` followed by two digits: other cards starting with STD (``STDFWHM``)
    are not standards.

    >>> from astropy.io import fits
    >>> standard_cards(fits.Header({"STD01": "TRS-17", "STDFWHM": 1.1, "STD02": "TRS-4"}))
    {'FCSTD01': ('TRS-17', 'standard of the sensitivity'), 'FCSTD02': ('TRS-4', 'standard of the sensitivity')}
    """
    names = [sensitivity_header[key] for key in sensitivity_header
             if _STANDARD_CARD.fullmatch(key)]
    return {f"FCSTD{i:02d}": (name, "standard of the sensitivity")
            for i, name in enumerate(names, start=1)}


def fluxed_header_cards(*, sensitivity_name, sensitivity_header, airmass_choice, info,
                        slit_cards, extinction_source, include_sensitivity_error):
    """Keywords added to a calibrated spectrum's header (values or (value, comment)).

    ``FLUXCAL = 'ABSOLUTE'`` follows the archive convention for spectra whose flux is in
    absolute physical units (string 'ABSOLUTE' or 'UNCALIBRATED'); what the flux of a
    point or extended source refers to is in ``SLITLOSS``.
    """
    cards = {
        "FLUXCAL": ("ABSOLUTE", "flux in absolute units (BUNIT)"),
        "SENSFILE": (sensitivity_name, "sensitivity product used"),
        **airmass_choice.cards(),
        "NEXTRAP": (info["n_extrapolated"], "pixels with extrapolated sensitivity"),
        **slit_cards,
        "TELLCOR": (info["telluric_corrected"],
                    "telluric bands divided by the standard's template"),
        "EXTTAB": (extinction_source, "extinction table"),
        "SENSERR": ("included" if include_sensitivity_error else "not in VAR",
                    "sensitivity error; always in HDU CALVAR"),
    }
    cards.update(standard_cards(sensitivity_header))
    return cards


def compare_with_table(calibrated, table, exclude_regions):
    """Median ratio and rms (%) of a calibrated standard over its flux table, or {}.

    Over good pixels outside ``exclude_regions`` covered by the table; {} with
    10 such pixels or fewer.
    """
    ref_flux = table_flux_in_pixels(table, pixel_edges(calibrated.wave_angstrom))
    ok = ((calibrated.mask == 0) & np.isfinite(ref_flux) & np.isfinite(calibrated.flux)
          & ~exclusion_mask(calibrated.wave_angstrom, exclude_regions))
    if ok.sum() <= 10:
        return {}
    ratio = calibrated.flux[ok] / ref_flux[ok]
    return {"table_ratio_median": float(np.median(ratio)),
            "table_ratio_rms_percent": float(100.0 * np.sqrt(np.mean((ratio - 1.0) ** 2)))}


def calibrate_one(spectrum, *, sensitivity, sensitivity_header, sensitivity_name, extinction,
                  options, setup="", reference=None, rectified=None, trace_rows=None):
    """Calibrate one extracted spectrum with a setup's sensitivity.

    Parameters
    ----------
    spectrum : ExtractedSpectrum
    sensitivity : SensitivityFit
        With ``info['telluric']`` when the product stores a telluric template.
    sensitivity_header : astropy.io.fits.Header
        The sensitivity product's primary header (SLITCORR, STDFWHM, STDnn).
    sensitivity_name : str
        File name of the sensitivity product (card SENSFILE).
    extinction : ExtinctionCurve or None
    options : CalibrationOptions
    setup : str
        The rule's setup; a spectrum whose SETUP differs is warned about.
    reference : FluxTable, optional
        A standard's own table: the result is compared with it.
    rectified, trace_rows : Frame and ndarray, optional
        The rectified frame and the spectrum's trace on it (the 'moffat' slit-loss
        model measures the star's profile there).

    Returns
    -------
    SpectrumCalibration

    Raises
    ------
    InputFileError, ValueError
        When a keyword the calibration needs is missing or wrong.
    """
    spec_setup = str(spectrum.header.get("SETUP", setup))
    if setup and spec_setup != setup:
        warnings.warn(f"{spectrum.path}: SETUP {spec_setup!r} differs from the rule's setup "
                      f"{setup!r}; calibrated with the sensitivity of {setup!r}",
                      FluxCalibrationWarning, stacklevel=2)
    airmass, choice = spectrum_airmass(spectrum.header, site=options.site, path=spectrum.path,
                                       policy=options.airmass_policy,
                                       warn_difference=options.airmass_warn_difference)
    exptime = header_float(spectrum.header, "EXPTIME", path=spectrum.path)
    fraction, slit_err, slit_cards = slit_treatment(spectrum, sensitivity_header, options,
                                                    rectified=rectified, trace_rows=trace_rows)
    cal = calibrate_spectrum(spectrum.wave_angstrom, spectrum.values, spectrum.variance,
                             spectrum.mask, exptime_s=exptime, airmass=airmass,
                             sensitivity=sensitivity, extinction=extinction,
                             include_sensitivity_error=options.include_sensitivity_error,
                             slit_fraction=fraction, slit_fraction_rel_err=slit_err,
                             telluric=sensitivity.info.get("telluric"))
    cards = fluxed_header_cards(
        sensitivity_name=sensitivity_name, sensitivity_header=sensitivity_header,
        airmass_choice=choice, info=cal.info, slit_cards=slit_cards,
        extinction_source=(extinction.source if extinction else "none"),
        include_sensitivity_error=options.include_sensitivity_error)
    notes = []
    if cal.info["n_extrapolated"]:
        notes.append(f"{cal.info['n_extrapolated']} pixels use the sensitivity "
                     "extrapolated beyond the standard's fitted range")
    if cal.info["n_no_coverage"]:
        notes.append(f"{cal.info['n_no_coverage']} pixels outside the "
                     "sensitivity's range (NaN, NO_COVERAGE)")
    row = {"status": "calibrated", "reason": "; ".join(notes)}
    if reference is not None:
        row.update(compare_with_table(cal, reference, options.exclude_regions))
    return SpectrumCalibration(spectrum, cal, cards, row)


@dataclass(frozen=True)
class FrameCalibration:
    """Everything the writers of ``flux_calibrate`` need for one frame.

    ``products`` pairs each output path with its :class:`SpectrumCalibration`;
    ``rows`` and ``meta`` make the listing; ``plotted`` (label, CalibratedSpectrum)
    the QA figure; ``reason`` says why nothing was calibrated ('' otherwise).
    """

    products: tuple
    rows: tuple
    meta: dict
    plotted: tuple
    reason: str = ""


def calibrate_frame(entries, *, frame, out_dir, setup, sensitivity, sensitivity_header,
                    sensitivity_name, extinction, options, reason="", reference=None,
                    rectified=None):
    """Calibrate the spectra of one frame (or record why they stay uncalibrated).

    Parameters
    ----------
    entries : sequence of (path, listed, spectrum, trace_rows)
        Each input file, its row of the extraction listing (dict), the
        :class:`~pipeline.fluxcal.inputs.ExtractedSpectrum` read from it (or the
        message (str) of why it could not be read) and its trace on the rectified
        frame (or None).
    rectified : Frame, optional
        The frame's rectified frame (the 'moffat' slit-loss model).
    frame, setup : str
    out_dir : str or Path
        Where the calibrated files go (one per input, same file name).
    sensitivity : SensitivityFit or None
        None: nothing is calibrated and every row says ``reason``.
    sensitivity_header, sensitivity_name, extinction, options, reference
        See :func:`calibrate_one`.
    reason : str
        Why there is no sensitivity.

    Returns
    -------
    FrameCalibration
    """
    products, rows, plotted = [], [], []
    for path, listed, spectrum, trace_rows in entries:
        row = dict(object=listed.get("object", ""), aperture=listed.get("label", ""),
                   input_file=str(path), file=str(path), status="uncalibrated", reason=reason)
        if sensitivity is not None:
            try:
                if isinstance(spectrum, str):
                    raise ValueError(spectrum)
                row["object"] = row["object"] or spectrum.header.get("OBJECT", "")
                done = calibrate_one(spectrum, sensitivity=sensitivity,
                                     sensitivity_header=sensitivity_header,
                                     sensitivity_name=sensitivity_name, extinction=extinction,
                                     options=options, setup=setup, reference=reference,
                                     rectified=rectified, trace_rows=trace_rows)
                target = Path(out_dir) / Path(path).name
                row.update(done.row, file=str(target))
                products.append((target, done))
                plotted.append((f"{row['object']} {row['aperture']}".strip(), done.calibrated))
            except (PipelineError, ValueError) as exc:
                row.update(status="uncalibrated", reason=str(exc))
                warnings.warn(f"{path}: left uncalibrated: {exc}", FluxCalibrationWarning,
                              stacklevel=2)
        rows.append(row)
    calibrated = sensitivity is not None
    if not calibrated:
        warnings.warn(f"frame {frame}: spectra left uncalibrated ({reason}); the extraction "
                      "products are its spectra", FluxCalibrationWarning, stacklevel=2)
    meta = dict(frame=frame, setup=setup, calibrated=calibrated,
                reason="" if calibrated else reason, sensitivity=sensitivity_name,
                flux_unit=FLUX_UNIT,
                sensitivity_error=("included in VAR" if options.include_sensitivity_error
                                   else "not in VAR; see HDU CALVAR"))
    return FrameCalibration(tuple(products), tuple(rows), meta, tuple(plotted),
                            "" if calibrated else reason)
