"""Combined products on disk: writer, reader and listing (``combined/`` below out_dir).

File layout of ``combined/{target}_{setup}.fits`` (coadd), ``combined/{target}_spliced.fits``
(splice) and ``combined/{target}_{setup}/{frame}.fits`` (one exposure on the group's axis):

========= ======= ==================================================================
HDU       type    content
========= ======= ==================================================================
0 FLUX    image   float64 flux density: erg s⁻¹ cm⁻² Å⁻¹ (flux-calibrated inputs) or
                  electron s⁻¹ Å⁻¹ (extracted inputs); linear ``WAVE`` (vacuum) or
                  ``AWAV`` (air) axis in the configured velocity frame (SPECSYS)
1 VAR     image   variance (``UTYPE='VarianceUncertainty'``)
2 MASK    image   uint8 bits of :mod:`pipeline.core.maskbits` (0 = good)
3 NUSED   image   int16 exposures (or setups) contributing to each pixel
4 NREJ    image   int16 exposure pixels rejected as outliers (coadds)
5 FRAMES  table   the inputs: frame, file, exptime_s, v_corr_km_s, v_bary_km_s,
                  v_helio_km_s, mid_exposure_utc, weight (median 1/var), n_rejected
========= ======= ==================================================================

Header: OBJECT, SETUP (or ``SETUPS``), ``COMBKIND`` (coadd, single, splice), ``NCOMBINE``,
``INPKIND`` (fluxed or extracted), ``EXPTIME`` (sum), the velocity-frame cards of
:func:`pipeline.combine.frame.velocity_cards` (for a coadd VELOSYS/VCORR are the
means of the inputs, each input's own in FRAMES), ``VARCORR`` (variance of long sums over
the sum of pixel variances: the input's rectification factor times the resampling's),
``SPLSCALE``/``SPLSCERR``/``SPLSAPP`` (splices), provenance ``INPUTnn`` = frames.
"""

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table

from pipeline.core import provenance
from pipeline.core.errors import InputFileError
from pipeline.core.grid import WavelengthGrid
from pipeline.core.maskbits import MASK_DTYPE, header_cards
from pipeline.core.spectra import sanitise_name

__all__ = ["CombinedSpectrum", "read_combined", "write_products", "product_stem", "LISTING_NAME"]

LISTING_NAME = "combined.ecsv"

_KEEP = ("OBJECT", "RA", "DEC", "EQUINOX", "INSTRUME", "TELESCOP", "GRATING", "GRTILT",
         "SLITWID", "FILTER", "BINSPEC", "BINSPAT", "SETUP", "FLUXCAL", "DATE-OBS", "MJD-OBS")


@dataclass(frozen=True)
class CombinedSpectrum:
    flux: np.ndarray
    variance: np.ndarray
    mask: np.ndarray
    n_used: np.ndarray
    grid: WavelengthGrid
    header: fits.Header
    frames: Table


def read_combined(path):
    """Read a combined product (see the module docstring).

    Raises
    ------
    InputFileError
        When an HDU is missing or the axis is unreadable.
    """
    path = Path(path)
    try:
        with fits.open(path, memmap=False) as hdul:
            names = [h.name for h in hdul]
            for ext in ("FLUX", "VAR", "MASK", "NUSED", "FRAMES"):
                if ext not in names:
                    raise InputFileError(path, f"HDU {ext} missing (found {names}); expected a "
                                         "product of pipeline.combine")
            header = hdul["FLUX"].header.copy()
            grid = WavelengthGrid.from_header(header, axis=1)
            return CombinedSpectrum(np.asarray(hdul["FLUX"].data, float),
                                    np.asarray(hdul["VAR"].data, float),
                                    np.asarray(hdul["MASK"].data, MASK_DTYPE),
                                    np.asarray(hdul["NUSED"].data, int), grid, header,
                                    Table(hdul["FRAMES"].data))
    except OSError as exc:
        raise InputFileError(path, f"cannot be read as FITS ({exc})") from exc


def product_stem(obj, setup=""):
    """File stem of a combined product: ``{OBJECT}_{setup}`` or ``{OBJECT}_spliced``.

    Examples
    --------
    >>> product_stem("TRG 511", "G600_t08.93"), product_stem("TRG-511")
    ('TRG_511_G600_t08.93', 'TRG-511_spliced')
    """
    return f"{sanitise_name(obj)}_{setup}" if setup else f"{sanitise_name(obj)}_spliced"


def _base_header(source, grid, unit):
    header = fits.Header()
    for key in _KEEP:
        if key in source:
            header[key] = (source[key], source.comments[key])
    header["EXTNAME"] = "FLUX"
    header["BUNIT"] = (unit, "flux density")
    for card in grid.wcs_cards(axis=1):
        header[card[0]] = card[1:]
    return header


def _frames_table(exposures, rejected=None):
    rejected = rejected or [0] * len(exposures)
    rows = []
    for e, n_rej in zip(exposures, rejected):
        good = (e.mask == 0) & np.isfinite(e.variance) & (e.variance > 0)
        weight = float(np.median(1.0 / e.variance[good])) if good.any() else 0.0
        rows.append((e.frame, Path(e.path).name, e.exptime_s, e.choice.velocity_km_s,
                     e.choice.barycentric_km_s, e.choice.heliocentric_km_s, e.choice.time_utc,
                     weight, int(n_rej)))
    return Table(rows=rows or None, names=("frame", "file", "exptime_s", "v_corr_km_s",
                                           "v_bary_km_s", "v_helio_km_s", "mid_exposure_utc",
                                           "weight", "n_rejected"),
                 dtype=(str, str, float, float, float, float, str, float, int))


def _velocity_header(header, exposures, weights):
    from pipeline.combine.frame import velocity_cards

    cards = velocity_cards(exposures[0].choice)
    mean_v = float(np.average([e.choice.velocity_km_s for e in exposures], weights=weights))
    for key, value, comment in cards:
        if key in ("VCORR", "VBARY", "VHELIO", "VELOSYS", "MJD-AVG", "DATE-AVG"):
            continue
        header[key] = (value, comment)
    if len(exposures) == 1:
        for key, value, comment in cards:
            header[key] = (value, comment)
    else:
        header["VELOSYS"] = (round(-1000.0 * mean_v, 3), "[m/s] weighted mean of inputs (FRAMES)")
        header["VCORR"] = (round(mean_v, 6), "[km/s] weighted mean correction (FRAMES)")


def _write(path, header, flux, variance, mask, n_used, n_rejected, frames, grid):
    def image(data, name, dtype, bunit=None, comment=None):
        h = fits.Header()
        for card in grid.wcs_cards(axis=1):
            h[card[0]] = card[1:]
        if bunit:
            h["BUNIT"] = bunit
        if comment:
            h["COMMENT"] = comment
        return fits.ImageHDU(np.asarray(data, dtype=dtype), header=h, name=name)

    var = image(variance, "VAR", np.float64, f"({header['BUNIT']})2")
    var.header["UTYPE"] = ("VarianceUncertainty", "astropy.nddata uncertainty class")
    mask_hdu = image(mask, "MASK", MASK_DTYPE)
    for card in header_cards():
        mask_hdu.header.append(card)
    hdus = [fits.PrimaryHDU(np.asarray(flux, np.float64), header=header), var, mask_hdu,
            image(n_used, "NUSED", np.int16, comment="inputs contributing to each pixel"),
            image(n_rejected, "NREJ", np.int16, comment="input pixels rejected as outliers"),
            fits.BinTableHDU(frames, name="FRAMES")]
    path.parent.mkdir(parents=True, exist_ok=True)
    fits.HDUList(hdus).writeto(path, overwrite=True, checksum=True)


def write_products(out_dir, results, splices, *, options):
    """Write every coadd, its exposures, every splice, their QA figures and the listing."""
    from pipeline.combine.qa import plot_group

    out_dir.mkdir(parents=True, exist_ok=True)
    rows = []
    for result in results:
        plan = result.plan
        stem = product_stem(plan.object, plan.setup)
        weights = [max(float(np.nansum(1.0 / e.variance[(e.mask == 0) & (e.variance > 0)])), 1e-300)
                   for e in result.exposures]
        for exp in result.exposures:          # each exposure on the group's axis
            header = _base_header(exp.header, result.grid, result.unit)
            header["FRAMEID"] = (exp.frame, "frame id of the exposure")
            header["EXPTIME"] = exp.header.get("EXPTIME")
            header["COMBKIND"] = ("single", "one exposure on the group's axis")
            header["INPKIND"] = (plan.input_kind, "fluxed or extracted inputs")
            header["VARCORR"] = (round(exp.covariance_factor, 4), "var of long sums / sum of vars")
            _velocity_header(header, [exp], [1.0])
            provenance.stamp(header, inputs=[f"{exp.frame}.fits"])
            n = np.where(exp.mask == 0, 1, 0)
            _write(out_dir / stem / f"{exp.frame}.fits", header, exp.flux, exp.variance, exp.mask,
                   n, np.zeros_like(n), _frames_table([exp]), result.grid)
        header = _base_header(result.exposures[0].header, result.grid, result.unit)
        header["COMBKIND"] = ("coadd" if len(result.exposures) > 1 else "single",
                              "inverse-variance mean of exposures")
        header["NCOMBINE"] = (len(result.exposures), "exposures combined")
        header["INPKIND"] = (plan.input_kind, "fluxed or extracted inputs")
        header["EXPTIME"] = (float(np.nansum([e.exptime_s for e in result.exposures])),
                             "[s] sum of the exposure times")
        header["CLIPSIG"] = (float(options["clip_sigma"]), "outlier rejection threshold, sigma")
        header["NREJTOT"] = (int(result.info["n_rejected_total"]), "exposure pixels rejected")
        header["VARCORR"] = (round(result.covariance_factor, 4), "var of long sums / sum of vars")
        header["SNRMED"] = (round(result.info["snr_median"], 3), "median S/N per pixel")
        _velocity_header(header, list(result.exposures), weights)
        provenance.stamp(header, inputs=[f"{e.frame}.fits" for e in result.exposures])
        _write(out_dir / f"{stem}.fits", header, result.flux, result.variance, result.mask,
               result.n_used, result.n_rejected,
               _frames_table(result.exposures, result.info["rejected_per_exposure"]), result.grid)
        plot_group(result, out_dir / f"{stem}_coadd.png")
        rows.append((plan.object, plan.setup, f"{stem}.fits",
                     "coadd" if len(result.exposures) > 1 else "single", len(result.exposures),
                     ",".join(plan.frames), plan.input_kind, result.unit,
                     result.info["snr_median"], result.info["n_rejected_total"], math.nan,
                     math.nan, plan.reason))
    for obj, members, spliced in splices:
        grid = spliced["grid"]
        exposures = [e for m in members for e in m.exposures]
        header = _base_header(members[0].exposures[0].header, grid, members[0].unit)
        header.remove("SETUP", ignore_missing=True)
        header["SETUPS"] = ",".join(m.plan.setup for m in members)[:68]   # no room for a comment
        header["COMBKIND"] = ("splice", "two setups on one grid")
        header["NCOMBINE"] = (len(exposures), "exposures in the setups' coadds")
        header["INPKIND"] = (members[0].plan.input_kind, "fluxed or extracted inputs")
        scale = spliced["scale"]
        header["SPLSCALE"] = (round(scale.scale, 6) if math.isfinite(scale.scale) else -1.0,
                              "flux scale red/blue in the overlap")
        header["SPLSCERR"] = (round(scale.scale_err, 6) if math.isfinite(scale.scale_err) else -1.0,
                              "its 1-sigma error")
        header["SPLSAPP"] = (bool(spliced["applied"]), "scale applied to the redder setup")
        header["SPLOVLO"] = (round(scale.range_angstrom[0], 2), "[Angstrom] overlap start")
        header["SPLOVHI"] = (round(scale.range_angstrom[1], 2), "[Angstrom] overlap end")
        header["VARCORR"] = (round(spliced["covariance_factor"], 4), "var of long sums / sum")
        _velocity_header(header, exposures, [1.0] * len(exposures))
        provenance.stamp(header, inputs=[f"{e.frame}.fits" for e in exposures])
        stem = product_stem(obj)
        n = spliced["n_used"]
        _write(out_dir / f"{stem}.fits", header, spliced["flux"], spliced["variance"],
               spliced["mask"], n, np.zeros_like(n), _frames_table(exposures), grid)
        rows.append((obj, ",".join(m.plan.setup for m in members), f"{stem}.fits", "splice",
                     len(exposures), ",".join(e.frame for e in exposures),
                     members[0].plan.input_kind, members[0].unit, math.nan, 0, scale.scale,
                     scale.scale_err, "scale applied" if spliced["applied"] else
                     "scale measured only (flux-calibrated)"))
    listing = Table(rows=rows or None,
                    names=("object", "setup", "file", "kind", "n_exposures", "frames",
                           "input_kind", "unit", "snr_median", "n_rejected", "splice_scale",
                           "splice_scale_err", "note"),
                    dtype=(str, str, str, str, int, str, str, str, float, int, float, float, str))
    listing.meta.update({"description": "combined spectra of the night (pipeline.combine)",
                         "velocity_frame": options["velocity_frame"],
                         "vacuum_wavelengths": bool(options["vacuum_wavelengths"]),
                         "air_vacuum_formula": options["air_vacuum_formula"]})
    listing.write(out_dir / LISTING_NAME, format="ascii.ecsv", overwrite=True)
    return listing
