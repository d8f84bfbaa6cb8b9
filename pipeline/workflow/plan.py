"""The plan of one night's reduction: paths, params and product lists for the rules.

The rule files in ``pipeline/rules/`` only wire; every value they need comes
from one :class:`NightPlan`, built once when the Snakefile is parsed from the
validated config (schema defaults filled in) and the night's inventory
(headers only). Every method is pure: it reads the config and the inventory
and returns paths, params or lists, so the plan is tested without Snakemake
(tests/test_plan.py).

Longer than 500 lines because it is the one table of every rule's inputs and params
(one short method each); a split by step family is due when it grows further.

Rerun properties the methods keep (tests/test_workflow.py checks them with the
real ``snakemake``):

* a rule's params hold exactly the config values its step reads for that
  wildcard, so changing one option reruns only the steps it affects;
* dicts go through :func:`key_order_free`, so the key order of a config file
  does not count as a change;
* config values that name files (line lists, flux and extinction tables) are
  rule inputs, not params, so editing the file reruns the step.
"""

import math
import re
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

from pipeline.core.errors import InputFileError
from pipeline.fluxcal.standards import normalise_object_name
from pipeline.night.inventory import NightInventory, take_inventory

__all__ = ["NightPlan", "key_order_free", "ensure_demo_night", "SHIPPED_DATA", "NO_MATCH"]

#: tables shipped with the package (a null line list in the config means these)
SHIPPED_DATA = Path(__file__).resolve().parents[1] / "data"
#: a wildcard constraint that matches nothing (a night without arcs or targets)
NO_MATCH = r"(?!x)x"

# the instrument keys the CCD steps read
_CCD_INSTRUMENT_KEYS = ("pixel_extension", "sections", "gain_e_per_adu", "read_noise_e",
                        "saturation_adu", "dispersion_axis", "wavelength_increases_with_pixel")
# the keys of instrument.grating the wavelength solver reads (grating.model_from_config,
# filter_cut_on); the others (blaze, beam width) serve only the setup check command
_GRATING_KEYS = ("groove_density_per_mm", "order", "camera_collimator_angle_deg",
                 "camera_focal_length_mm", "pixel_size_um", "detector_center_px",
                 "order_blocking_filters")
#: the flux_calibration keys fit_sensitivity reads, as (param name, config key)
SENSITIVITY_PARAM_KEYS = (("fit_kind", "fit_kind"), ("knot_spacing_angstrom", "knot_spacing_angstrom"),
                     ("degree", "degree"), ("clip_sigma", "clip_sigma"),
                     ("max_iterations", "max_iterations"), ("error_floor_mag", "error_floor_mag"),
                     ("max_extrapolation_angstrom", "max_extrapolation_angstrom"),
                     ("slit_loss_model", "slit_loss_model"), ("slit_centring_rms_arcsec",) * 2,
                     ("seeing_exponent", "seeing_exponent"),
                     ("exclude_regions", "exclude_regions_angstrom"),
                     ("telluric_bands", "telluric_bands_angstrom"),
                     ("telluric_correction", "telluric_correction"),
                     ("telluric_airmass_exponent", "telluric_airmass_exponent"))
WAVELENGTH_FIGURES = ("lines", "residuals", "residual_map", "dispersion")
_TARGET_TYPES = ("standard", "science")


def key_order_free(value):
    """``value`` with every mapping's keys sorted, recursively.

    Snakemake compares params as text, so without this the key order of a
    config file would count as a change.

    >>> key_order_free({"b": 1, "a": {"d": [{"z": 0, "y": 1}], "c": 2}})
    {'a': {'c': 2, 'd': [{'y': 1, 'z': 0}]}, 'b': 1}
    """
    if isinstance(value, dict):
        return {key: key_order_free(value[key]) for key in sorted(value, key=str)}
    if isinstance(value, (list, tuple)):
        return [key_order_free(item) for item in value]
    return value


def _alternatives(names):
    """A regular expression matching exactly ``names`` (nothing when empty).

    >>> _alternatives(["a.1", "b"])
    'a\\\\.1|b'
    >>> import re; re.fullmatch(_alternatives([]), "x") is None
    True
    """
    return "|".join(re.escape(name) for name in names) or NO_MATCH


def demo_night_needed(raw_dir, repo_root, *, enabled):
    """Whether the demo night must be simulated: enabled, ``raw_dir`` is the repository's
    ``demo_data/raw`` and it holds no FITS file."""
    raw_dir = Path(raw_dir)
    if not enabled or raw_dir.resolve() != (Path(repo_root) / "demo_data" / "raw").resolve():
        return False
    return not any(raw_dir.glob("*.fits"))


def ensure_demo_night(raw_dir, repo_root, *, enabled):
    """Simulate the demo night into ``raw_dir`` when :func:`demo_night_needed`.

    Runs the simulator as a separate program (``python -m demo_data.simulate``):
    the pipeline never imports it.
    """
    if demo_night_needed(raw_dir, repo_root, enabled=enabled):
        print(f"simulating the demo night into {raw_dir} (first run only)", file=sys.stderr)
        subprocess.run([sys.executable, "-m", "demo_data.simulate", "--out", str(raw_dir)],
                       check=True, cwd=str(repo_root))


@dataclass(frozen=True)
class NightPlan:
    """Paths, params and product lists of one night's reduction.

    Parameters
    ----------
    config : dict
        The validated config, schema defaults filled in
        (:func:`pipeline.workflow.config_check.validated_config`).
    night : NightInventory
        The night's inventory.
    """

    config: dict
    night: NightInventory

    @classmethod
    def from_config(cls, config):
        """Take the inventory of ``config['raw_dir']`` and build the plan.

        Raises
        ------
        InputFileError
            When ``raw_dir`` is not a folder or holds no raw file.
        """
        instrument = config["instrument"]
        night = take_inventory(config["raw_dir"], instrument, config["inventory"])
        if not night.records:
            raise InputFileError(
                config["raw_dir"], f"no raw files matching {instrument['file_patterns']}; "
                "expected the folder of the night's raw FITS frames (set raw_dir, or "
                "instrument.file_patterns)")
        return cls(config, night)

    # -- basics ---------------------------------------------------------------------
    @property
    def instrument(self):
        return self.config["instrument"]

    @property
    def raw_dir(self):
        return str(self.config["raw_dir"])

    def out(self, *parts):
        """A path below ``out_dir``."""
        return str(Path(self.config["out_dir"]).joinpath(*parts))

    @staticmethod
    def folder_of(path):
        """The folder of ``path`` (params naming ``out_dir`` derive it from an output, so
        the rule also runs where the file system is not shared)."""
        return str(Path(path).parent)

    def log(self, rule, name):
        """The log file of one job."""
        return self.out("logs", rule, f"{name}.log")

    def frame_type(self, frame_id):
        return self.night.record(frame_id).frame_type

    def setup_of(self, frame_id):
        return self.night.record(frame_id).setup

    def report_title(self, *, incomplete=False):
        state = " (incomplete)" if incomplete else ""
        return f"{self.instrument['name']} night report{state}: {self.config['raw_dir']}"

    # -- night log ------------------------------------------------------------------
    def raw_paths(self):
        """Every raw file of the night (the night log's inputs)."""
        return [rec.path for rec in self.night.records]

    def screening(self):
        """The ``inventory`` section: how raw pixels are screened when the night is taken."""
        return key_order_free(self.config["inventory"])

    # -- CCD calibration --------------------------------------------------------------
    def ccd_instrument(self, *, saturation=True):
        """The part of the instrument description the CCD steps read (biases need no
        saturation level)."""
        ccd = {key: self.instrument[key] for key in _CCD_INSTRUMENT_KEYS}
        ccd["binning_keyword"] = self.instrument["keywords"].get("binning")
        if not saturation:
            del ccd["saturation_adu"]
        return key_order_free(ccd)

    def keywords(self):
        """The configured header keywords (calibrate_frame copies them to the standard names)."""
        return key_order_free(self.instrument["keywords"])

    def section(self, name):
        """A step's config section, key order free."""
        return key_order_free(self.config[name])

    def bias_frames(self, readout):
        return [rec.path for rec in self.night.frames("bias") if rec.readout == readout]

    def flat_frames(self, setup):
        return [rec.path for rec in self.night.flats_for(setup)]

    def master_bias_path(self, readout):
        return self.out("calibrations", f"master_bias_{readout}.fits")

    def master_flat_path(self, setup):
        return self.out("calibrations", f"master_flat_{setup}.fits")

    def setup_bias_path(self, setup):
        """The master bias of the readout mode of ``setup``'s flats."""
        return self.master_bias_path(self.night.setup_readout(setup))

    def frame_calibrations(self, frame_id):
        """Raw file, master bias and master flat of a frame to calibrate."""
        rec = self.night.record(frame_id)
        return {"raw": rec.path, "bias": self.master_bias_path(self.night.bias_for(frame_id)),
                "flat": self.master_flat_path(rec.setup)}

    def calibration_options(self, frame_id):
        """The ``calibration`` section a frame's calibration reads: arcs are never searched
        for cosmic rays, so their params leave those options out (changing them does not
        rerun arcs)."""
        options = dict(self.config["calibration"])
        if self.frame_type(frame_id) not in _TARGET_TYPES:
            options.pop("cosmic_rays", None)
        return key_order_free(options)

    # -- wavelength calibration ----------------------------------------------------------
    def arcs(self):
        """The night's usable arcs of the used setups (sorted ids)."""
        return sorted({arc.frame_id for setup in self.night.setups()
                       for arc in self.night.arcs_for(setup)})

    def arc_pattern(self):
        """Wildcard constraint matching exactly the night's arcs."""
        return _alternatives(self.arcs())

    def arc_line_options(self):
        return key_order_free(self.config["arc_lines"])

    def line_list(self):
        """The arc line list (an input): the configured file or the shipped one."""
        return (self.config["wavelength_solution"]["line_list"]
                or str(SHIPPED_DATA / "arc_lines_air.csv"))

    def wavelength_params(self):
        """Static params of ``solve_wavelength``: the grating keys the solver reads, the
        lamp map and its options (without the line list, an input). The calibrated arc
        carries the standard keywords (GRTILT, LAMPS, FILTER) whatever the instrument calls
        them, so no keyword names are passed."""
        grating = self.instrument["grating"]
        params = {"grating": key_order_free({k: grating[k] for k in _GRATING_KEYS if k in grating}),
                  "lamps": key_order_free(self.instrument["lamps"])}
        params.update({k: v for k, v in self.config["wavelength_solution"].items()
                       if k != "line_list"})
        return params

    def wavelength_solution_path(self, arc):
        """The 2-D wavelength map of an arc (what rectification reads)."""
        return self.out("wavelength", f"{arc}_solution.fits")

    def wavelength_figures(self, arc):
        """The QA figures of an arc's solution."""
        return [self.out("qa", f"{arc}_wavelength_{name}.png") for name in WAVELENGTH_FIGURES]

    def frame_wavelength(self, frame_id):
        """The wavelength solution a standard or science frame is rectified with (the
        nearest arc of its setup)."""
        return self.wavelength_solution_path(self.night.nearest_arc(frame_id).frame_id)

    # -- extraction -----------------------------------------------------------------------
    def targets(self):
        """Usable standard and science frames of the used setups (sorted ids)."""
        return sorted({rec.frame_id for setup in self.night.setups() for kind in _TARGET_TYPES
                       for rec in self.night.frames(kind, setup=setup)})

    def target_pattern(self):
        """Wildcard constraint matching exactly the night's standards and science frames."""
        return _alternatives(self.targets())

    def sky_lines(self):
        """The night-sky line table (an input): the configured file or the shipped one."""
        return self.config["flexure"]["line_list"] or str(SHIPPED_DATA / "sky_lines_air.ecsv")

    def flexure_options(self):
        """The flexure options without the sky-line table, which is an input."""
        return key_order_free({k: v for k, v in self.config["flexure"].items()
                               if k != "line_list"})

    def extraction_reference(self, frame_id):
        """Trace table of the standard whose shape a science frame's faint objects borrow
        (the setup's standard nearest in time; ``[]`` when none or not wanted)."""
        rec = self.night.record(frame_id)
        if rec.frame_type != "science" or not self.config["tracing"]["use_standard_reference"]:
            return []
        standards = self.night.standards_for(rec.setup)
        if not standards:
            return []

        def gap(std):
            dt = abs(std.mjd - rec.mjd)
            return (dt if math.isfinite(dt) else math.inf, std.frame_id)

        return self.out("qa", f"{min(standards, key=gap).frame_id}_traces.ecsv")

    def extraction_products(self, frame_id):
        """Final outputs of the extraction of one standard or science frame."""
        return [self.out("rectified", f"{frame_id}.fits"),
                self.out("qa", f"{frame_id}_flexure.ecsv"),
                self.out("qa", f"{frame_id}_traces.ecsv"), self.out("spectra", frame_id),
                self.out("qa", f"{frame_id}_rectified.png"),
                self.out("qa", f"{frame_id}_spectra.png")]

    # -- flux calibration ---------------------------------------------------------------
    @property
    def _flux_tables(self):
        tables = self.config["flux_calibration"]["standard_flux_tables"]
        return {normalise_object_name(name): path for name, path in tables.items()}

    def site(self):
        """Site coordinates (the airmass of each spectrum is recomputed from them)."""
        site = self.instrument["site"]
        return {key: site[key] for key in ("latitude_deg", "longitude_deg", "height_m")}

    def extinction_table(self):
        """The site's extinction table (an input; ``[]`` when none is configured)."""
        return self.instrument["site"].get("extinction_table") or []

    def fluxcal_standards(self, setup):
        """(frame record, flux-table path) of the setup's usable standards that have a table."""
        tables = self._flux_tables
        return [(rec, tables[normalise_object_name(rec.object)])
                for rec in self.night.standards_for(setup)
                if normalise_object_name(rec.object) in tables]

    def standard_spectra(self, setup):
        return [self.out("spectra", rec.frame_id) for rec, _ in self.fluxcal_standards(setup)]

    def standard_rectified(self, setup):
        return [self.out("rectified", f"{rec.frame_id}.fits")
                for rec, _ in self.fluxcal_standards(setup)]

    def airmass_params(self):
        return {"airmass_policy": self.config["observing"]["airmass"],
                "airmass_warn_difference": self.config["observing"]["airmass_warn_difference"]}

    def standard_flux_tables(self, setup):
        return [table for _, table in self.fluxcal_standards(setup)]

    def fluxcal_missing_reason(self, setup):
        """Why a setup gets no sensitivity (``''`` when it gets one)."""
        if self.fluxcal_standards(setup):
            return ""
        standards = self.night.standards_for(setup)
        if not standards:
            return f"setup {setup} has no usable standard-star frame"
        names = sorted({rec.object for rec in standards})
        return (f"no flux table for standard OBJECT {', '.join(repr(n) for n in names)} "
                "(add it to flux_calibration.standard_flux_tables)")

    def frame_uncalibrated_reason(self, frame_id):
        return self.fluxcal_missing_reason(self.setup_of(frame_id))

    def sensitivity_params(self):
        """Static params of ``fit_sensitivity``: the fit options, the slit-loss model and
        the site."""
        fluxcal = self.config["flux_calibration"]
        params = {name: fluxcal[key] for name, key in SENSITIVITY_PARAM_KEYS}
        params["spatial_scale_arcsec_per_px"] = self.instrument["spatial_scale_arcsec_per_px"]
        params.update(site=self.site(), **self.airmass_params())
        return params

    def flux_calibrate_params(self):
        """Static params of ``flux_calibrate`` (the per-frame ones are methods)."""
        fluxcal = self.config["flux_calibration"]
        return {"include_sensitivity_error": fluxcal["include_sensitivity_error"],
                "spatial_scale_arcsec_per_px": self.instrument["spatial_scale_arcsec_per_px"],
                "seeing_exponent": fluxcal["seeing_exponent"],
                "extended_fwhm_ratio": fluxcal["extended_fwhm_ratio"],
                "slit_centring_rms_arcsec": fluxcal["slit_centring_rms_arcsec"],
                **self.airmass_params(), "site": self.site()}

    def own_flux_table(self, frame_id):
        """A standard frame's flux table (for the end-to-end check); ``[]`` for other frames."""
        rec = self.night.record(frame_id)
        if rec.frame_type != "standard":
            return []
        return self._flux_tables.get(normalise_object_name(rec.object), [])

    def check_exclude_regions(self, frame_id):
        """Regions a standard's check against its own table leaves out (``[]`` for science)."""
        if not self.own_flux_table(frame_id):
            return []
        fluxcal = self.config["flux_calibration"]
        return fluxcal["exclude_regions_angstrom"] + fluxcal["telluric_bands_angstrom"]

    def sensitivity_path(self, setup):
        return self.out("flux", f"sensitivity_{setup}.fits")

    def frame_sensitivity(self, frame_id):
        """The sensitivity a frame is calibrated with (``[]`` when its setup has none)."""
        setup = self.setup_of(frame_id)
        return self.sensitivity_path(setup) if self.fluxcal_standards(setup) else []

    def sensitivity_products(self, setup):
        """Sensitivity product, QA table and figure of a setup, plus its calibrated standards."""
        if not self.fluxcal_standards(setup):
            return []
        files = [self.sensitivity_path(setup), self.out("flux", f"sensitivity_{setup}_qa.ecsv"),
                 self.out("qa", f"sensitivity_{setup}.png")]
        for rec, _ in self.fluxcal_standards(setup):
            files += self.fluxcal_products(rec.frame_id)
        return files

    def fluxcal_products(self, frame_id):
        """Calibrated spectra directory and QA figure of a science or standard frame."""
        rec = self.night.record(frame_id)
        if rec.frame_type not in _TARGET_TYPES or rec.status != "ok":
            return []
        return [self.out("spectra_fluxed", frame_id), self.out("qa", f"{frame_id}_fluxed.png")]

    # -- product lists ----------------------------------------------------------------------
    def calibration_outputs(self):
        """Master biases and flats, and every calibrated arc, standard and science frame."""
        files = [self.master_bias_path(readout) for readout in self.night.readouts()]
        files += [self.master_flat_path(setup) for setup in self.night.setups()]
        for setup in self.night.setups():
            for rec in (self.night.arcs_for(setup) + self.night.frames("standard", setup=setup)
                        + self.night.frames("science", setup=setup)):
                files.append(self.out("calibrated", f"{rec.frame_id}.fits"))
        return files

    def wavelength_outputs(self):
        """Lines, solution and QA table of every arc."""
        files = []
        for setup in self.night.setups():
            for arc in self.night.arcs_for(setup):
                files += [self.out("wavelength", f"{arc.frame_id}_lines.ecsv"),
                          self.out("wavelength", f"{arc.frame_id}_solution.fits"),
                          self.out("wavelength", f"{arc.frame_id}_qa.ecsv")]
        return files

    def reduction_products(self):
        """Every product of the night before the manifest (what the manifest checks)."""
        files = [self.out("night_log.ecsv")] + self.calibration_outputs() + self.wavelength_outputs()
        for setup in self.night.setups():
            for rec in (self.night.frames("standard", setup=setup)
                        + self.night.frames("science", setup=setup)):
                files += self.extraction_products(rec.frame_id)
            for rec in self.night.frames("science", setup=setup):
                files += self.fluxcal_products(rec.frame_id)
            files += self.sensitivity_products(setup)
        files += [self.out("combined")] if self.targets() else []   # combine_spectra
        return list(dict.fromkeys(files))

    # -- combined spectra (combine.smk) --------------------------------------------------------
    def combine_inputs(self):
        """Extracted and (where the workflow makes them) calibrated spectra of every target."""
        made = [f for f in self.reduction_products() if "/spectra_fluxed/" in f]
        return {"spectra": [self.out("spectra", f) for f in self.targets()], "fluxed": made}

    def report_limits(self):
        """The configured limits the report marks each calibration against."""
        return {"read_noise_tolerance": self.config["bias"]["read_noise_tolerance"],
                "gain_tolerance": self.config["flat"]["gain_tolerance"],
                "wavelength_max_rms_px": self.config["wavelength_solution"]["max_rms_px"],
                "sensitivity_max_rms_percent":
                    self.config["report"]["sensitivity_max_rms_percent"]}

    def report_params(self):
        """Static params of ``night_report`` (and of the report of an incomplete night)."""
        return {"limits": self.report_limits(),
                "spatial_scale_arcsec_per_px": self.instrument["spatial_scale_arcsec_per_px"]}

    def all_products(self):
        """What ``rule all`` asks for."""
        return self.reduction_products() + [self.out("manifest.ecsv"),
                                            self.out("night_report.html")]


def write_incomplete_night(plan):
    """Write the manifest (failed products marked missing) and the report after some jobs
    failed, so the morning report still shows the night (the workflow's ``onerror``)."""
    # imported here: only a failed run needs them, and the Snakefile parses on every job
    from pipeline.products.manifest import write_manifest_file
    from pipeline.products.report import write_night_report_file

    night_log = plan.out("night_log.ecsv")
    try:
        if Path(night_log).exists():
            write_manifest_file(products=plan.reduction_products(), night_log=night_log,
                                manifest=plan.out("manifest.ecsv"), out_dir=plan.out())
            write_night_report_file(manifest=plan.out("manifest.ecsv"), night_log=night_log,
                                    report=plan.out("night_report.html"), out_dir=plan.out(),
                                    title=plan.report_title(incomplete=True),
                                    **plan.report_params())
            print(f"incomplete night: see {plan.out('night_report.html')} and "
                  f"{plan.out('manifest.ecsv')}", file=sys.stderr)
    except Exception as exc:  # the handler must never hide the failure that called it
        print(f"could not write the manifest of the incomplete night: {exc}", file=sys.stderr)
