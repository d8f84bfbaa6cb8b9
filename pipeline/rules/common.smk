# Shared set-up: the demo night, the night's inventory (taken at parse time,
# from headers only) and the path helpers every rule file uses.
import sys
from pathlib import Path

from pipeline.night.inventory import take_inventory

RAW = Path(config["raw_dir"])
OUT = Path(config["out_dir"])
INSTRUMENT = config["instrument"]
RUN_STEP = "../workflow/run_step.py"


def _demo_night_needed():
    if not config.get("make_demo_night_if_missing", True):
        return False
    if RAW.resolve() != (Path(workflow.basedir) / "demo_data" / "raw").resolve():
        return False
    return not any(RAW.glob("*.fits"))


if _demo_night_needed():
    import subprocess
    print(f"simulating the demo night into {RAW} (first run only)", file=sys.stderr)
    subprocess.run([sys.executable, "-m", "demo_data.simulate", "--out", str(RAW)],
                   check=True, cwd=workflow.basedir)

NIGHT = take_inventory(RAW, INSTRUMENT, config.get("inventory"))
if not NIGHT.records:
    raise WorkflowError(
        f"{RAW}: no raw files matching {INSTRUMENT.get('file_patterns')}; expected the folder of "
        "the night's raw FITS frames (set raw_dir, or instrument.file_patterns)")
# Snakemake hides warnings raised while it parses; say the rejections here (also in night_log.ecsv).
for _problem in NIGHT.problems():
    print(f"night inventory: {_problem}", file=sys.stderr)


def key_order_free(value):
    """``value`` with every mapping's keys sorted: params compare equal whatever the key order
    of the config file (Snakemake compares params as text)."""
    if isinstance(value, dict):
        return {key: key_order_free(value[key]) for key in sorted(value, key=str)}
    if isinstance(value, (list, tuple)):
        return [key_order_free(item) for item in value]
    return value


def out(*parts):
    return str(OUT.joinpath(*parts))


def log_path(rule_name, name):
    return str(OUT / "logs" / rule_name / f"{name}.log")


# ---- helpers of the CCD calibration rules (ccd.smk) ----

_CCD_INSTRUMENT_KEYS = ("pixel_extension", "sections", "gain_e_per_adu", "read_noise_e",
                        "saturation_adu", "dispersion_axis", "wavelength_increases_with_pixel")


def ccd_instrument(*, saturation=True):
    """The part of the instrument description the CCD steps read (biases need no saturation)."""
    ccd = {key: INSTRUMENT.get(key) for key in _CCD_INSTRUMENT_KEYS}
    ccd["pixel_extension"] = INSTRUMENT.get("pixel_extension", 0)
    ccd["binning_keyword"] = INSTRUMENT.get("keywords", {}).get("binning")
    if not saturation:
        del ccd["saturation_adu"]
    return ccd


def master_bias_path(readout):
    return out("calibrations", f"master_bias_{readout}.fits")


def master_flat_path(setup):
    return out("calibrations", f"master_flat_{setup}.fits")


def _frame_calibrations(wildcards):
    rec = NIGHT.record(wildcards.frame)
    return {"raw": rec.path, "bias": master_bias_path(NIGHT.bias_for(rec.frame_id)),
            "flat": master_flat_path(rec.setup)}


def calibration_options(wildcards):
    """The ``calibration`` section a frame's calibration reads: arcs are never searched for
    cosmic rays, so their params leave those options out (changing them does not rerun arcs)."""
    options = dict(config.get("calibration", {}))
    if NIGHT.record(wildcards.frame).frame_type not in ("standard", "science"):
        options.pop("cosmic_rays", None)
    return key_order_free(options)


# Params that name files are rule inputs instead (editing the file reruns the step); null
# means the table shipped in pipeline/data/.
_SHIPPED_DATA = Path(workflow.basedir) / "pipeline" / "data"


# ---- helpers of the wavelength calibration rules (wavelength.smk) ----

import re as _ws_re

WAVELENGTH_ARCS = sorted({arc.frame_id for setup in NIGHT.setups() for arc in NIGHT.arcs_for(setup)})
# wildcard values: exactly the night's arcs (a pattern matching nothing when there are none)
_WS_ARC_PATTERN = "|".join(_ws_re.escape(a) for a in WAVELENGTH_ARCS) or r"(?!x)x"
_WS_KEYWORDS = INSTRUMENT.get("keywords", {})
# the solver's options without the line list, which is an input
WAVELENGTH_OPTIONS = {k: v for k, v in config.get("wavelength_solution", {}).items()
                      if k != "line_list"}
WAVELENGTH_LINE_LIST = (config.get("wavelength_solution", {}).get("line_list")
                        or str(_SHIPPED_DATA / "arc_lines_air.csv"))
# the keys of instrument.grating the solver reads (grating.model_from_config, filter_cut_on)
_WS_GRATING_KEYS = ("groove_density_per_mm", "order", "camera_collimator_angle_deg",
                    "camera_focal_length_mm", "pixel_size_um", "detector_center_px",
                    "order_blocking_filters")
WAVELENGTH_GRATING = key_order_free({k: INSTRUMENT["grating"][k] for k in _WS_GRATING_KEYS
                                     if k in INSTRUMENT["grating"]})
WAVELENGTH_LAMPS = key_order_free(INSTRUMENT["lamps"])
WAVELENGTH_FIGURES = ("lines", "residuals", "residual_map", "dispersion")


def wavelength_solution_path(arc):
    """The 2-D wavelength map of an arc (what rectification reads)."""
    return out("wavelength", f"{arc}_solution.fits")


def wavelength_figures(arc):
    """The QA figures of an arc's solution."""
    return [out("qa", f"{arc}_wavelength_{name}.png") for name in WAVELENGTH_FIGURES]


# ---- helpers of the extraction rules (extraction.smk) ----

import math as _ex_math
import re as _ex_re

EXTRACTION_FRAMES = sorted({rec.frame_id for setup in NIGHT.setups()
                            for rec in NIGHT.frames("standard", setup=setup)
                            + NIGHT.frames("science", setup=setup)})
_EX_PATTERN = "|".join(_ex_re.escape(f) for f in EXTRACTION_FRAMES) or r"(?!x)x"
# the flexure options without the sky-line table, which is an input
EXTRACTION_FLEXURE = {k: v for k, v in config.get("flexure", {}).items() if k != "line_list"}
EXTRACTION_SKY_LINES = (config.get("flexure", {}).get("line_list")
                        or str(_SHIPPED_DATA / "sky_lines_air.ecsv"))


def extraction_reference(frame_id):
    """Trace table of the standard whose shape a science frame's faint objects borrow ([] if none)."""
    rec = NIGHT.record(frame_id)
    if rec.frame_type != "science" or not config.get("tracing", {}).get("use_standard_reference",
                                                                       True):
        return []
    standards = NIGHT.standards_for(rec.setup)
    if not standards:
        return []

    def gap(std):
        dt = abs(std.mjd - rec.mjd)
        return (dt if _ex_math.isfinite(dt) else _ex_math.inf, std.frame_id)

    return out("qa", f"{min(standards, key=gap).frame_id}_traces.ecsv")


def extraction_products(frame_id):
    """Final outputs of the extraction of one standard or science frame."""
    return [out("rectified", f"{frame_id}.fits"), out("qa", f"{frame_id}_flexure.ecsv"),
            out("qa", f"{frame_id}_traces.ecsv"), out("spectra", frame_id),
            out("qa", f"{frame_id}_rectified.png"), out("qa", f"{frame_id}_spectra.png")]


# ---- helpers of the flux calibration rules (fluxcal.smk) ----

from pipeline.fluxcal.standards import normalise_object_name as _fc_key

FLUXCAL = config.get("flux_calibration", {})
_FC_TABLES = {_fc_key(name): path for name, path in FLUXCAL.get("standard_flux_tables", {}).items()}
_FC_SITE = {key: INSTRUMENT["site"][key] for key in ("latitude_deg", "longitude_deg", "height_m")}
_FC_EXTINCTION = INSTRUMENT["site"].get("extinction_table") or []


def fluxcal_standards(setup):
    """(frame record, flux-table path) of the setup's usable standards that have a table."""
    return [(rec, _FC_TABLES[_fc_key(rec.object)]) for rec in NIGHT.standards_for(setup)
            if _fc_key(rec.object) in _FC_TABLES]


def fluxcal_missing_reason(setup):
    """Why a setup gets no sensitivity ('' when it gets one)."""
    if fluxcal_standards(setup):
        return ""
    standards = NIGHT.standards_for(setup)
    if not standards:
        return f"setup {setup} has no usable standard-star frame"
    names = sorted({rec.object for rec in standards})
    return (f"no flux table for standard OBJECT {', '.join(repr(n) for n in names)} "
            "(add it to flux_calibration.standard_flux_tables)")


def sensitivity_products(setup):
    """Sensitivity product, QA table and figure of a setup, plus its calibrated standards."""
    if not fluxcal_standards(setup):
        return []
    files = [out("flux", f"sensitivity_{setup}.fits"), out("flux", f"sensitivity_{setup}_qa.ecsv"),
             out("qa", f"sensitivity_{setup}.png")]
    for rec, _ in fluxcal_standards(setup):
        files += fluxcal_products(rec.frame_id)
    return files


def fluxcal_products(frame_id):
    """Calibrated spectra directory and QA figure of a science or standard frame."""
    rec = NIGHT.record(frame_id)
    if rec.frame_type not in ("science", "standard") or rec.status != "ok":
        return []
    return [out("spectra_fluxed", frame_id), out("qa", f"{frame_id}_fluxed.png")]


def _fc_own_table(frame_id):
    """A standard frame's flux table (for the end-to-end check); [] for other frames."""
    rec = NIGHT.record(frame_id)
    if rec.frame_type != "standard":
        return []
    return _FC_TABLES.get(_fc_key(rec.object), [])


def _fc_sensitivity_input(wildcards):
    setup = NIGHT.record(wildcards.frame).setup
    return out("flux", f"sensitivity_{setup}.fits") if fluxcal_standards(setup) else []


# ---- helpers of the product lists rules (products.smk) ----

def calibration_outputs():
    files = [out("calibrations", f"master_bias_{readout}.fits") for readout in NIGHT.readouts()]
    files += [out("calibrations", f"master_flat_{setup}.fits") for setup in NIGHT.setups()]
    for setup in NIGHT.setups():
        for rec in NIGHT.arcs_for(setup) + NIGHT.frames("standard", setup=setup) + NIGHT.frames(
            "science", setup=setup
        ):
            files.append(out("calibrated", f"{rec.frame_id}.fits"))
    return files


def wavelength_outputs():
    files = []
    for setup in NIGHT.setups():
        for arc in NIGHT.arcs_for(setup):
            files += [
                out("wavelength", f"{arc.frame_id}_lines.ecsv"),
                out("wavelength", f"{arc.frame_id}_solution.fits"),
                out("wavelength", f"{arc.frame_id}_qa.ecsv"),
            ]
    return files


def reduction_products():
    files = [out("night_log.ecsv")] + calibration_outputs() + wavelength_outputs()
    for setup in NIGHT.setups():
        for rec in NIGHT.frames("standard", setup=setup) + NIGHT.frames("science", setup=setup):
            files += extraction_products(rec.frame_id)
        for rec in NIGHT.frames("science", setup=setup):
            files += fluxcal_products(rec.frame_id)
        files += sensitivity_products(setup)
    return list(dict.fromkeys(files))


def all_products():
    return reduction_products() + [out("manifest.ecsv"), out("night_report.html")]
