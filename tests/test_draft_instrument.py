"""Tests of the instrument-drafting command (pipeline.night.draft, pipeline.night.survey).

Two nights: one written here in another instrument's layout (the truth is what the
test writes: pixels in an extension, other keyword names, sexagesimal coordinates,
dispersion along FITS axis 1, a west-positive longitude, airmass at the start of the
exposure computed here with astropy), and frames of the demo simulator (truth:
demo_data/README.md and config/instruments/rls.yaml, the demo's instrument description).
"""

import copy
import warnings
from pathlib import Path

import astropy.units as u
import numpy as np
import pytest
import yaml
from astropy.coordinates import AltAz, EarthLocation, SkyCoord
from astropy.io import fits
from astropy.time import Time
from astropy.utils import iers

from pipeline.night import draft, survey
from pipeline.night.inventory import take_inventory
from pipeline.workflow.config_check import config_problems

REPO = Path(__file__).resolve().parents[1]
SCHEMA = yaml.safe_load((REPO / "config" / "schema.yaml").read_text())

# the invented site of the synthetic instrument: 30 S, 70 W (header LONGITUD west-positive)
LAT, LON_EAST, HEIGHT = -30.0, -70.0, 2200.0
LOCATION = EarthLocation.from_geodetic(lon=LON_EAST * u.deg, lat=LAT * u.deg, height=HEIGHT * u.m)
NY, NX = 60, 200                     # raw pixels: dispersion along FITS axis 1 (NAXIS1 = 200)
LINES_X = (23.0, 57.5, 91.2, 120.0, 150.7, 181.3)


def _pixels(kind, rng):
    y, x = np.mgrid[0:NY, 0:NX].astype(float)
    level = 500.0 + rng.normal(0.0, 3.0, (NY, NX))
    slit = np.exp(-0.5 * ((y - NY / 2) / 40.0) ** 2)        # smooth along the slit (axis 2)
    if kind == "arc":
        lines = sum(3000.0 * np.exp(-0.5 * ((x - x0) / 1.2) ** 2) for x0 in LINES_X)
        return level + lines * slit
    if kind == "flat":
        return level + 8000.0 * slit * (1.0 + 0.2 * x / NX)
    if kind == "object":
        return level + 200.0 * np.exp(-0.5 * ((y - 28.0) / 2.0) ** 2) + 50.0 * slit
    return level


def _start_airmass(coord, start):
    with iers.conf.set_temp("auto_download", False), iers.conf.set_temp("auto_max_age", None):
        altaz = coord.transform_to(AltAz(obstime=start, location=LOCATION))
    return float(1.0 / np.sin(altaz.alt.radian))           # plane-parallel sec z at the start


def other_night(folder):
    """A night of an invented instrument 'KESTREL-LS' in a layout unlike the demo's."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(7)
    start = Time("2026-05-02T03:00:00", scale="utc")
    with iers.conf.set_temp("auto_download", False), iers.conf.set_temp("auto_max_age", None):
        lst = start.sidereal_time("apparent", longitude=LOCATION.lon)
    coord = SkyCoord(ra=(lst.deg - 52.0) % 360 * u.deg, dec=-10.0 * u.deg)   # setting, X ~ 1.6
    plan = [("k001", "ZERO", "bias", 0.0, 14.5001), ("k002", "ZERO", "bias", 0.0, 14.5001),
            ("k003", "DOMEFLAT", "flat", 4.0, 14.4998), ("k004", "COMP", "arc", 5.0, 14.5003),
            ("k005", "OBJECT", "object", 1800.0, 14.4999), ("k006", "FOCUS", "bias", 1.0, 14.5)]
    for name, obstype, kind, exptime, tilt in plan:
        primary = fits.PrimaryHDU()
        h = primary.header
        h["INSTRUME"] = "KESTREL-LS"
        h["OBSTYPE"] = obstype
        h["OBJECT"] = "target 7" if kind == "object" else obstype.lower()
        h["EXPOSURE"] = exptime
        h["DATE-OBS"] = start.isot
        h["GRANGLE"] = tilt
        h["GRATNAME"] = "B1200"
        h["SLITWIDT"] = 1.0
        h["BINNING"] = "1x1"
        h["LAMP"] = "CuAr" if kind == "arc" else "OFF"
        h["LATITUDE"] = LAT
        h["LONGITUD"] = -LON_EAST           # degrees WEST, as some observatories write it
        h["ALTITUDE"] = HEIGHT
        if kind == "object":
            h["RA"] = coord.ra.to_string(unit=u.hourangle, sep=":", precision=2)
            h["DEC"] = coord.dec.to_string(sep=":", precision=1, alwayssign=True)
            h["AIRMASS"] = round(_start_airmass(coord, start), 4)
        sci = fits.ImageHDU(_pixels(kind, rng).astype(np.float32), name="SCI")
        sci.header["GAIN"] = 2.1
        sci.header["RDNOISE"] = 3.5
        fits.HDUList([primary, sci]).writeto(folder / f"{name}.fits")
        start = start + (exptime + 60.0) * u.s
    (folder / "k007.fits").write_text("observing notes, not an image\n")
    return folder


@pytest.fixture(scope="module")
def other(tmp_path_factory):
    folder = other_night(tmp_path_factory.mktemp("kestrel") / "raw")
    return folder, draft.draft_instrument(folder)


def test_draft_of_another_instrument_infers_what_the_headers_tell(other):
    folder, result = other
    inst = result.instrument
    assert inst["name"] == "KESTREL-LS"
    assert inst["pixel_extension"] == "SCI"
    assert inst["frame_type_keyword"] == "OBSTYPE"
    assert inst["frame_types"]["bias"] == ["ZERO"] and inst["frame_types"]["flat"] == ["DOMEFLAT"]
    assert inst["frame_types"]["arc"] == ["COMP"] and inst["frame_types"]["science"] == ["OBJECT"]
    assert inst["frame_types"]["ignore"] == ["FOCUS"]
    assert inst["frame_types"]["standard"] == [] and "standard" in result.todos
    kw = inst["keywords"]
    assert kw == {"object": "OBJECT", "exposure_time_s": "EXPOSURE", "date_obs": "DATE-OBS",
                  "airmass": "AIRMASS", "ra_deg": "RA", "dec_deg": "DEC", "grating": "GRATNAME",
                  "grating_tilt_deg": "GRANGLE", "slit_width_arcsec": "SLITWIDT",
                  "binning": "BINNING", "lamps": "LAMP"}
    assert "sexagesimal" in next(line for line in result.text.splitlines() if "ra_deg:" in line)
    assert inst["setup_keywords"] == ["GRATNAME", "GRANGLE", "SLITWIDT", "BINNING"]
    assert inst["readout_keywords"] == ["BINNING"]
    # the tilt jitters by a few 1e-4 deg: one setup within the proposed tolerance
    assert inst["setup_tolerances"] == {"GRANGLE": 0.01}
    assert "form 1 setup(s)" in result.text
    assert inst["gain_e_per_adu"] == {"keyword": "GAIN", "value": None}
    assert inst["read_noise_e"] == {"keyword": "RDNOISE", "value": None}
    # no section keywords: TODO with nulls
    assert inst["sections"]["data"] == {"keyword": None, "value": None}
    assert {"data", "overscan"} <= set(result.todos)
    assert inst["saturation_adu"] is None and "saturation_adu" in result.todos   # BITPIX -32
    # lines are narrow along NAXIS1 in the arc written above
    assert inst["dispersion_axis"] == 1
    assert inst["lamps"] == {"CuAr": ["Ar I"]}
    # the header longitude is west-positive: found from the header airmass, which is the
    # airmass at the START of the exposure (sec z computed above)
    assert inst["site"]["longitude_deg"] == pytest.approx(LON_EAST)
    assert inst["site"]["latitude_deg"] == LAT and inst["site"]["height_m"] == HEIGHT
    assert "west-positive, sign flipped" in result.text
    assert "airmass at the start of the exposure" in result.text
    for todo in ("groove_density_per_mm", "camera_focal_length_mm", "pixel_size_um",
                 "wavelength_increases_with_pixel", "spatial_scale_arcsec_per_px"):
        assert todo in result.todos
        assert inst.get(todo, inst["grating"].get(todo)) is None
    assert "k007.fits" in result.text.splitlines()[1]      # the unreadable file is named


def fill_todos(inst):
    """What a user copies from the manual of the invented instrument."""
    inst = copy.deepcopy(inst)
    inst["sections"] = {"data": {"keyword": None, "value": f"[1:{NX},1:{NY - 10}]"},
                        "overscan": {"keyword": None, "value": f"[1:{NX},{NY - 9}:{NY}]"}}
    inst["saturation_adu"] = 60000.0
    inst["wavelength_increases_with_pixel"] = True
    inst["spatial_scale_arcsec_per_px"] = 0.3
    inst["grating"].update(groove_density_per_mm=1200, order=1, camera_collimator_angle_deg=40.0,
                           camera_focal_length_mm=300.0, pixel_size_um=13.5,
                           detector_pixels_dispersion=NX)
    inst["site"]["extinction_table"] = None
    return inst


def test_filled_draft_validates_and_inventories_the_night(other):
    folder, result = other
    unfilled = yaml.safe_load((REPO / "config" / "config.yaml").read_text())  # the night's keys
    unfilled["instrument"] = result.instrument
    problems = config_problems(unfilled, SCHEMA)
    # every null left in a required key is named by its dotted key
    assert any("instrument.grating.groove_density_per_mm" in p for p in problems)
    assert any("instrument.spatial_scale_arcsec_per_px" in p for p in problems)
    config = dict(unfilled, instrument=fill_todos(result.instrument))
    assert config_problems(config, SCHEMA) == []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        inv = take_inventory(folder, config["instrument"])
    status = {r.frame_id: (r.frame_type, r.status) for r in inv.records}
    assert status == {"k001": ("bias", "ok"), "k002": ("bias", "ok"), "k003": ("flat", "ok"),
                      "k004": ("arc", "ok"), "k005": ("science", "ok"),
                      "k006": ("ignored", "ignored"), "k007": ("unknown", "rejected")}
    assert inv.setups() == ["B1200_t14.50_s1_1x1"]


def test_draft_of_the_demo_instrument_matches_its_description(tmp_path):
    import demo_data.simulate as sim

    raw = tmp_path / "raw"
    sim.make_night(raw, frames=["rls_0001", "rls_0006", "rls_0013", "rls_0014", "rls_0015"],
                   write_truth_files=False)
    result = draft.draft_instrument(raw)
    inst = result.instrument
    truth = yaml.safe_load((REPO / "config" / "instruments" / "rls.yaml").read_text())["instrument"]
    for key in ("name", "pixel_extension", "frame_type_keyword", "setup_keywords",
                "readout_keywords", "sections", "gain_e_per_adu", "read_noise_e",
                "dispersion_axis", "saturation_adu"):
        assert inst[key] == truth[key], key
    for kind in ("bias", "flat", "arc", "standard", "science"):
        assert inst["frame_types"][kind] == truth["frame_types"][kind], kind
    for key, value in inst["keywords"].items():
        assert value == truth["keywords"][key], key
    assert inst["lamps"] == {k: truth["lamps"][k] for k in ("HgAr", "Ne")}
    assert inst["site"]["latitude_deg"] == truth["site"]["latitude_deg"]
    # demo_data/README.md: AIRMASS is mid-exposure, SITELONG east-positive
    assert inst["site"]["longitude_deg"] == truth["site"]["longitude_deg"]
    assert "airmass at the middle of the exposure" in result.text


def test_dispersion_axis_from_arc_both_orientations_and_undecided():
    rng = np.random.default_rng(3)
    y, x = np.mgrid[0:80, 0:300].astype(float)
    lines = sum(np.exp(-0.5 * ((x - x0) / 1.5) ** 2) for x0 in range(20, 290, 37))
    arc = 100.0 + 5000.0 * lines + rng.normal(0, 5, x.shape)
    assert survey.dispersion_axis_from_arc(arc).value == 1
    assert survey.dispersion_axis_from_arc(arc.T).value == 2
    noise = 100.0 + rng.normal(0, 5, x.shape)
    assert survey.dispersion_axis_from_arc(noise).value is None


def test_frame_type_values_and_lamps():
    assert [survey.classify_type_value(v) for v in
            ("Bias", "zero", "SKYFLAT", "dome flat", "COMPARISON", "ThAr", "STD", "standard star",
             "OBJECT", "science", "focus", "dark", "hello")] == \
        ["bias", "bias", "flat", "flat", "arc", "arc", "standard", "standard", "science",
         "science", "ignore", "ignore", None]
    assert draft.lamp_species("HeNeAr") == ["He I", "Ne I", "Ar I"]
    assert draft.lamp_species("Xe") == ["Xe I"] and draft.lamp_species("FeAr") == ["Ar I"]


def test_command_line(tmp_path, other, capsys):
    folder, _ = other
    out = tmp_path / "kestrel.yaml"
    assert draft.main([str(folder), "-o", str(out)]) == 0
    said = capsys.readouterr().out
    assert f"wrote {out}" in said and "TODO to fill" in said
    assert yaml.safe_load(out.read_text())["instrument"]["frame_type_keyword"] == "OBSTYPE"
    assert draft.main([str(folder), "-o", str(out)]) == 2          # no silent overwrite
    assert "exists" in capsys.readouterr().err
    assert draft.main([str(folder), "-o", str(out), "--force", "--name", "K-LS"]) == 0
    assert yaml.safe_load(out.read_text())["instrument"]["name"] == "K-LS"
    empty = tmp_path / "empty"
    empty.mkdir()
    assert draft.main([str(empty), "-o", str(tmp_path / "x.yaml")]) == 2
    assert "no files matching" in capsys.readouterr().err


# -- the second invented instrument (WREN, demo_data/wren.py) ----------------------------
WREN_FILE = REPO / "config" / "instruments" / "wren.yaml"


@pytest.fixture(scope="module")
def wren_night(tmp_path_factory):
    """The small WREN night simulated by demo_data (its truth in raw/truth/index.json)."""
    import json
    import subprocess
    import sys

    raw = tmp_path_factory.mktemp("wren") / "raw"
    subprocess.run([sys.executable, "-m", "demo_data.simulate", "--instrument", "wren", "--out",
                    str(raw), "--quiet"], check=True, cwd=REPO, capture_output=True)
    return raw, json.loads((raw / "truth" / "index.json").read_text())


def test_draft_of_the_second_instrument_matches_its_instrument_file(wren_night):
    # config/instruments/wren.yaml = this draft + the optics etc. filled by hand from the
    # instrument's description: every value the draft inferred must be in the file unchanged
    raw, truth = wren_night
    inst = draft.draft_instrument(raw).instrument
    filed = yaml.safe_load(WREN_FILE.read_text())["instrument"]
    for key in ("name", "pixel_extension", "frame_type_keyword", "keywords", "setup_keywords",
                "readout_keywords", "setup_tolerances", "sections", "gain_e_per_adu",
                "read_noise_e", "saturation_adu", "dispersion_axis", "lamps"):
        assert inst[key] == filed[key], key
    for kind in ("bias", "flat", "arc", "standard", "science"):
        assert inst["frame_types"][kind] == filed["frame_types"][kind], kind
    for key in ("latitude_deg", "longitude_deg", "height_m"):
        assert inst["site"][key] == filed["site"][key] == truth["site"][key], key
    # truth: the simulator's own description of the conventions
    conv = truth["conventions"]
    assert inst["pixel_extension"] == conv["pixel_extension"]
    assert inst["dispersion_axis"] == conv["dispersion_axis_fits"]
    assert filed["wavelength_increases_with_pixel"] == conv["wavelength_increases_with_pixel"]
    wanted = {"object": "object", "exposure_time_s": "exposure_time_s", "date_obs": "date_obs",
              "airmass": "airmass", "ra_deg": "ra", "dec_deg": "dec", "grating": "grating",
              "grating_tilt_deg": "grating_tilt_deg", "slit_width_arcsec": "slit_width_arcsec",
              "binning": "binning", "filter": "filter", "lamps": "lamps"}
    assert inst["keywords"] == {ours: conv["keywords"][theirs] for ours, theirs in wanted.items()}
    assert inst["frame_types"]["bias"] == [conv["frame_types"]["BIAS"]]
    assert inst["frame_types"]["standard"] == [conv["frame_types"]["STANDARD"]]


@pytest.mark.slow
def test_whole_workflow_on_the_second_instrument(wren_night, tmp_path):
    import hashlib
    import subprocess
    import sys

    from astropy.table import Table

    raw, truth = wren_night
    before = {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in raw.glob("*.fits")}
    out = tmp_path / "out"
    run = subprocess.run([sys.executable, "-m", "snakemake", "--cores", "2", "--config",
                          f"instrument_file={WREN_FILE}", f"raw_dir={raw}", f"out_dir={out}"],
                         cwd=REPO, capture_output=True, text=True)
    assert run.returncode == 0, run.stderr[-6000:]
    after = {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in raw.glob("*.fits")}
    assert before == after                                   # raw data never modified
    log = Table.read(out / "night_log.ecsv", format="ascii.ecsv")
    rows = {str(r["frame_id"]): r for r in log}
    frames = truth["frames"]
    # every frame has the status the simulator expects; the hostile ones say why
    for fid, entry in frames.items():
        assert rows[fid]["status"] == entry["expected_pipeline_status"], fid
    reasons = {fid: str(rows[fid]["reason"]) for fid, e in frames.items() if e.get("defect")}
    assert any("truncated" in r for r in reasons.values())
    assert sum(r.startswith("not data: ") for r in reasons.values()) == 3
    # one pipeline setup per simulated setup, whatever the encoder jitter
    by_truth = {}
    for fid, entry in frames.items():
        if entry["kind"] != "bias" and rows[fid]["status"] == "ok":
            by_truth.setdefault(entry["setup"], set()).add(str(rows[fid]["setup"]))
    assert len(by_truth) == 2 and all(len(s) == 1 for s in by_truth.values())
    # the airmass used is the exposure mean, not the header's start-of-exposure value
    for fid, entry in frames.items():
        if entry["kind"] in ("standard", "science") and rows[fid]["status"] == "ok":
            assert rows[fid]["airmass_source"] == "computed"
            assert rows[fid]["airmass_used"] == pytest.approx(entry["airmass_exposure_mean"],
                                                               abs=0.003), fid
            assert rows[fid]["airmass"] == pytest.approx(entry["airmass_start"], abs=1e-3)
    manifest = Table.read(out / "manifest.ecsv", format="ascii.ecsv")
    assert "missing" not in set(str(s) for s in manifest["status"])
    assert (out / "night_report.html").exists()
