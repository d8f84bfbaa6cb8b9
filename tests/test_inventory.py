"""Tests of pipeline.night.inventory: classification, setups, associations, rejections.

The raw frames are small synthetic FITS files written here with astropy (the
truth is what the test wrote into each header), in the demo instrument's layout:
uint16 pixels with BZERO in the PRIMARY HDU, DATASEC/BIASSEC, CCDSUM, GAIN, RDNOISE.
"""

import hashlib
import math
import warnings
from pathlib import Path

import numpy as np
import pytest
import yaml
from astropy.io import fits
from astropy.table import Table
from astropy.time import Time

from pipeline.core.errors import InputFileWarning
from pipeline.night.inventory import frame_id_from_path, take_inventory
from pipeline.night.steps import write_night_log_file

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def instrument():
    with open(REPO / "config" / "instruments" / "rls.yaml") as f:
        return yaml.safe_load(f)["instrument"]


SETUP_A = dict(GRATING="G600", GRTILT=8.93, SLITWID=1.2, CCDSUM="2 2", FILTER="NONE")
SETUP_B = dict(GRATING="G600", GRTILT=12.5, SLITWID=1.0, CCDSUM="2 2", FILTER="GG495")


def write_raw(path, imagetyp, *, shape=(40, 36), date="2026-03-14T01:00:00", obj="",
              exptime=10.0, setup=SETUP_A, extra=None, drop=(), pixels=None):
    """A raw frame: 32 data columns + 4 overscan columns, uint16 with BZERO (float32 when
    ``pixels`` are floats)."""
    ny, nx = shape
    if pixels is None:   # a bias-like level with a fixed ripple (the screening wants data)
        pixels = 1000 + (np.arange(ny * nx) % 7).reshape(shape)
    data = np.asarray(pixels)
    data = data.astype(np.uint16) if data.dtype.kind in "iu" else data.astype(np.float32)
    hdu = fits.PrimaryHDU(data)
    h = hdu.header
    h["IMAGETYP"] = imagetyp
    h["OBJECT"] = obj
    h["EXPTIME"] = exptime
    h["DATE-OBS"] = date
    h["AIRMASS"] = 1.2
    for k, v in setup.items():
        h[k] = v
    h["DATASEC"] = f"[1:{nx - 4},1:{ny}]"
    h["BIASSEC"] = f"[{nx - 3}:{nx},1:{ny}]"
    h["GAIN"] = 1.5
    h["RDNOISE"] = 4.0
    for k, v in (extra or {}).items():
        h[k] = v
    for k in drop:
        del h[k]
    hdu.writeto(path, overwrite=True)
    return path


def good_night(folder):
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    write_raw(folder / "b1.fits", "BIAS", exptime=0.0)
    write_raw(folder / "b2.fits", "BIAS", exptime=0.0)
    write_raw(folder / "f1.fits", "FLAT", exptime=5.0)
    write_raw(folder / "a_early.fits", "ARC", date="2026-03-14T00:10:00",
              extra={"LAMPS": "HgAr,Ne"})
    write_raw(folder / "a_late.fits", "ARC", date="2026-03-14T03:00:00", extra={"LAMPS": "HgAr,Ne"})
    write_raw(folder / "std1.fits", "STANDARD", obj="Tarn Std 1", date="2026-03-14T00:30:00")
    write_raw(folder / "sci1.fits", "OBJECT", obj="Ridge Nebula", date="2026-03-14T02:40:00",
              extra={"GRTILT": 8.9300001})   # header noise must not split the setup
    write_raw(folder / "focus.fits", "FOCUS")
    return folder


def inventory_quiet(folder, instrument):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        inv = take_inventory(folder, instrument)
    return inv, [w for w in caught if issubclass(w.category, InputFileWarning)]


def test_good_night_classification(tmp_path, instrument):
    inv, warns = inventory_quiet(good_night(tmp_path), instrument)
    types = {r.frame_id: (r.frame_type, r.status) for r in inv.records}
    # truth: the IMAGETYP values written above and config/instruments/rls.yaml frame_types
    assert types == {"b1": ("bias", "ok"), "b2": ("bias", "ok"), "f1": ("flat", "ok"),
                     "a_early": ("arc", "ok"), "a_late": ("arc", "ok"),
                     "std1": ("standard", "ok"), "sci1": ("science", "ok"),
                     "focus": ("ignored", "ignored")}
    # one warning, for the ignored frame, naming the file
    assert len(warns) == 1 and "focus.fits" in str(warns[0].message)
    assert inv.problems() == [str(warns[0].message)]
    assert inv.setups() == ["G600_t08.93_s1.2_2x2_NONE"]
    assert inv.readouts() == ["2x2"]
    sci = inv.record("sci1")
    assert sci.setup == "G600_t08.93_s1.2_2x2_NONE" and sci.readout == "2x2"
    assert sci.object == "Ridge Nebula" and sci.exptime_s == 10.0
    # MJD truth from astropy.time
    assert sci.mjd == pytest.approx(Time("2026-03-14T02:40:00", scale="utc").mjd, abs=1e-9)
    assert inv.bias_for("sci1") == "2x2"
    assert [r.frame_id for r in inv.flats_for(sci.setup)] == ["f1"]
    assert [r.frame_id for r in inv.standards_for(sci.setup)] == ["std1"]
    # nearest arcs in time: sci1 at 02:40 -> a_late (03:00); std1 at 00:30 -> a_early (00:10)
    assert inv.nearest_arc("sci1").frame_id == "a_late"
    assert inv.nearest_arc("std1").frame_id == "a_early"
    assert {r.frame_id for r in inv.calibrated_frames()} == {"a_early", "a_late", "std1", "sci1"}
    assert inv.record("a_late").lamps == "HgAr,Ne"
    assert inv.record("b1").setup == ""
    with pytest.raises(KeyError, match="nope"):
        inv.record("nope")


def test_two_setups_and_frames_filter(tmp_path, instrument):
    folder = good_night(tmp_path)
    write_raw(folder / "f_b.fits", "FLAT", setup=SETUP_B)
    write_raw(folder / "a_b.fits", "ARC", setup=SETUP_B)
    write_raw(folder / "sci_b.fits", "OBJECT", obj="X", setup=SETUP_B)
    inv, _ = inventory_quiet(folder, instrument)
    assert inv.setups() == ["G600_t08.93_s1.2_2x2_NONE", "G600_t12.50_s1_2x2_GG495"]
    assert [r.frame_id for r in inv.frames("flat", setup="G600_t12.50_s1_2x2_GG495")] == ["f_b"]
    assert inv.nearest_arc("sci_b").frame_id == "a_b"
    assert len(inv.frames(None, status=None)) == len(inv.records) == 11


@pytest.mark.parametrize("case, expect", [
    ("truncated", "truncated"),
    ("not_fits", "not a readable FITS file"),
    ("missing_keyword", "keyword EXPTIME missing"),
    ("missing_type", "keyword IMAGETYP missing"),
    ("unknown_type", "'DOMEFLATX' is not a known frame type"),
    ("wrong_shape", "shape 36 x 50 (NAXIS1 x NAXIS2) differs from the 36 x 40"),
    ("bad_section", "data section [1:99,1:40] lies outside"),
    ("empty_file", "not a readable FITS file"),
])
def test_rejections_logged_with_reason(tmp_path, instrument, case, expect):
    folder = good_night(tmp_path / "raw")
    bad = folder / "bad.fits"
    if case == "truncated":
        write_raw(bad, "OBJECT", obj="T")
        raw = bad.read_bytes()
        bad.write_bytes(raw[: len(raw) - 2000])
    elif case == "not_fits":
        bad.write_text("this is a shopping list, not an image\n" * 100)
    elif case == "empty_file":
        bad.write_bytes(b"")
    elif case == "missing_keyword":
        write_raw(bad, "OBJECT", obj="T", drop=("EXPTIME",))
    elif case == "missing_type":
        write_raw(bad, "OBJECT", obj="T", drop=("IMAGETYP",))
    elif case == "unknown_type":
        write_raw(bad, "DOMEFLATX")
    elif case == "wrong_shape":
        write_raw(bad, "OBJECT", obj="T", shape=(50, 36))
    elif case == "bad_section":
        write_raw(bad, "OBJECT", obj="T", extra={"DATASEC": "[1:99,1:40]"})
    inv, warns = inventory_quiet(folder, instrument)
    rec = inv.record("bad")
    assert rec.status == "rejected"
    assert expect in rec.reason
    # one-line warning naming the file and the reason
    msgs = [str(w.message) for w in warns if "bad.fits" in str(w.message)]
    assert len(msgs) == 1 and expect in msgs[0] and "\n" not in msgs[0]
    # the rest of the night goes on
    assert inv.record("sci1").status == "ok"
    # and the night log carries the reason
    log = tmp_path / "night_log.ecsv"
    write_night_log_file(raw_frames=[str(p) for p in sorted(folder.iterdir())],
                         night_log=str(log), raw_dir=str(folder), instrument=instrument)
    table = Table.read(log, format="ascii.ecsv")
    row = table[list(table["frame_id"]).index("bad")]
    assert row["status"] == "rejected" and expect in row["reason"]


def test_missing_calibrations_reject_science(tmp_path, instrument):
    folder = tmp_path
    write_raw(folder / "f1.fits", "FLAT")
    write_raw(folder / "sci1.fits", "OBJECT", obj="Y")
    write_raw(folder / "f_b.fits", "FLAT", setup=SETUP_B)
    write_raw(folder / "b1.fits", "BIAS", setup=SETUP_B)
    write_raw(folder / "sci_b.fits", "OBJECT", obj="Z", setup=SETUP_B)
    inv, warns = inventory_quiet(folder, instrument)
    # setup A has a flat but no arc; setup B has a flat but no arc either
    assert inv.record("sci1").status == "rejected"
    assert inv.record("sci1").reason == "no usable arcs for setup G600_t08.93_s1.2_2x2_NONE"
    assert inv.setups() == []
    # a different binning has no bias
    write_raw(folder / "a1.fits", "ARC")
    write_raw(folder / "sci_1x1.fits", "OBJECT", obj="Q",
              setup={**SETUP_A, "CCDSUM": "1 1"})
    write_raw(folder / "f_wide.fits", "FLAT", shape=(40, 44), setup={**SETUP_A, "FILTER": "W"})
    inv, _ = inventory_quiet(folder, instrument)
    assert inv.record("sci_1x1").reason == "no usable bias for readout mode 1x1"
    # alone in its setup, but not the shape of the biases of its readout mode
    assert inv.record("f_wide").reason == ("shape 44 x 40 (NAXIS1 x NAXIS2) differs from the "
                                           "36 x 40 of the biases of readout mode 2x2")
    assert inv.record("sci1").status == "ok"
    with pytest.raises(KeyError, match="no usable bias"):
        inv.bias_for("sci_1x1")


def test_raw_files_untouched_and_ids(tmp_path, instrument):
    folder = good_night(tmp_path)
    before = {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in folder.iterdir()}
    inventory_quiet(folder, instrument)
    after = {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in folder.iterdir()}
    assert before == after
    assert frame_id_from_path("/x/night 3 (b).fits.gz") == "night-3-b"
    assert frame_id_from_path("r0001.fit") == "r0001"


def test_gzip_and_duplicate_ids(tmp_path, instrument):
    import gzip
    folder = good_night(tmp_path)
    raw = (folder / "sci1.fits").read_bytes()
    (folder / "sci1.fits.gz").write_bytes(gzip.compress(raw))
    inv, _ = inventory_quiet(folder, instrument)
    ids = [r.frame_id for r in inv.records]
    assert len(ids) == len(set(ids))
    assert {"sci1", "sci1-2"} <= set(ids)
    # truncated gzip file
    (folder / "sci1.fits.gz").write_bytes(gzip.compress(raw[:-1000]))
    inv, _ = inventory_quiet(folder, instrument)
    gz = [r for r in inv.records if r.path.endswith(".gz")][0]
    assert gz.status == "rejected" and "truncated" in gz.reason


def test_not_a_folder(tmp_path, instrument):
    from pipeline.core.errors import InputFileError
    with pytest.raises(InputFileError, match="raw_dir is not a folder"):
        take_inventory(tmp_path / "missing", instrument)


def test_empty_night_log(tmp_path, instrument):
    log = tmp_path / "out" / "night_log.ecsv"
    write_night_log_file(raw_frames=[], night_log=str(log), raw_dir=str(tmp_path),
                         instrument=instrument)
    assert len(Table.read(log, format="ascii.ecsv")) == 0


def test_night_log_columns(tmp_path, instrument):
    folder = good_night(tmp_path / "raw")
    log = tmp_path / "night_log.ecsv"
    write_night_log_file(raw_frames=[str(p) for p in folder.iterdir()], night_log=str(log),
                         raw_dir=str(folder), instrument=instrument)
    t = Table.read(log, format="ascii.ecsv")
    for col in ("path", "frame_type", "setup", "object", "exptime_s", "date_obs", "status",
                "reason"):
        assert col in t.colnames
    row = t[list(t["frame_id"]).index("sci1")]
    assert row["nearest_arc"] == "a_late" and row["bias"] == "2x2"
    assert math.isclose(row["exptime_s"], 10.0)
    assert str(t["exptime_s"].unit) == "s"


# -- setups matched within tolerances (pipeline.night.setups) ------------------------
from pipeline.night.setups import cluster_values, group_setups  # noqa: E402


def tolerant(instrument, **tolerances):
    return {**instrument, "setup_tolerances": tolerances}


def night_with_tilts(folder, tilts, *, kind="OBJECT"):
    """Bias, flat and arc at 8.93, then one frame of ``kind`` per tilt value."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    write_raw(folder / "b1.fits", "BIAS", exptime=0.0)
    write_raw(folder / "f1.fits", "FLAT", exptime=5.0)
    write_raw(folder / "a1.fits", "ARC")
    for i, tilt in enumerate(tilts):
        write_raw(folder / f"s{i}.fits", kind, obj="T", setup={**SETUP_A, "GRTILT": tilt})
    return folder


def test_cluster_values_single_linkage():
    # values straddling the 2-decimal rounding boundary 8.925 are one cluster
    assert cluster_values([8.9249, 8.9251], 0.01).tolist() == [0, 0]
    # a chain of gaps each below the tolerance is one cluster, whatever its span
    assert cluster_values([8.93, 8.938, 8.946, 8.954], 0.01).tolist() == [0, 0, 0, 0]
    # a gap above the tolerance splits; labels follow increasing value, input order kept
    assert cluster_values([8.97, 8.93, 8.931], 0.01).tolist() == [1, 0, 0]
    # no tolerance: 1e-6 relative (header float noise) joins, 1e-4 does not
    assert cluster_values([8.93, 8.9300001, 8.9301], None).tolist() == [0, 0, 1]
    assert cluster_values([], 0.01).size == 0
    with pytest.raises(ValueError, match="tolerance"):
        cluster_values([1.0], -1.0)


def test_setup_straddling_a_rounding_boundary_is_one_setup(tmp_path, instrument):
    # encoder jitter of 2e-4 deg across the boundary of the 2-decimal id (8.925)
    folder = night_with_tilts(tmp_path, [8.9249, 8.9251, 8.9252])
    inv, warns = inventory_quiet(folder, tolerant(instrument, GRTILT=0.01))
    setups = {inv.record(f"s{i}").setup for i in range(3)}
    assert len(setups) == 1
    # the id shows the cluster median 8.9251 (+ the flat/arc at 8.93 join: 0.005 < 0.01)
    assert inv.record("s0").setup == inv.record("f1").setup == "G600_t08.93_s1.2_2x2_NONE"
    assert all(inv.record(f"s{i}").ok for i in range(3))
    assert not warns


def test_jitter_larger_than_printed_precision_and_distinct_tilts(tmp_path, instrument):
    # jitter of 0.02 deg in all (> the 0.01 printed precision), in steps < the tolerance
    folder = night_with_tilts(tmp_path, [8.921, 8.928, 8.935, 8.941])
    inv, warns = inventory_quiet(folder, tolerant(instrument, GRTILT=0.01))
    assert len({inv.record(f"s{i}").setup for i in range(4)} | {inv.record("f1").setup}) == 1
    assert inv.setups() == ["G600_t08.93_s1.2_2x2_NONE"]
    assert not warns
    # two truly different tilts (0.04 deg apart, 4 tolerances) stay apart
    folder = night_with_tilts(tmp_path / "two", [8.93, 8.97, 8.9702])
    write_raw(folder / "f2.fits", "FLAT", setup={**SETUP_A, "GRTILT": 8.9699})
    write_raw(folder / "a2.fits", "ARC", setup={**SETUP_A, "GRTILT": 8.9701})
    inv, _ = inventory_quiet(folder, tolerant(instrument, GRTILT=0.01))
    assert inv.setups() == ["G600_t08.93_s1.2_2x2_NONE", "G600_t08.97_s1.2_2x2_NONE"]
    assert inv.record("s1").setup == inv.record("s2").setup == inv.record("f2").setup
    assert inv.nearest_arc("s2").frame_id == "a2"


def test_setup_ids_without_tolerance_and_text_normalised(tmp_path, instrument):
    # no tolerance configured: distinct values; ids gain decimals so they stay distinct
    folder = night_with_tilts(tmp_path, [8.931, 8.934])
    inv, _ = inventory_quiet(folder, instrument | {"setup_tolerances": {}})
    assert {inv.record("s0").setup, inv.record("s1").setup} == \
        {"G600_t08.931_s1.2_2x2_NONE", "G600_t08.934_s1.2_2x2_NONE"}
    assert inv.record("f1").setup == "G600_t08.930_s1.2_2x2_NONE"
    # text: case and blanks do not split a setup
    folder = night_with_tilts(tmp_path / "text", [])
    write_raw(folder / "s_lower.fits", "OBJECT", obj="T",
              setup={**SETUP_A, "GRATING": " g600 ", "FILTER": "none"})
    inv, _ = inventory_quiet(folder, instrument)
    assert inv.record("s_lower").setup == inv.record("f1").setup == "G600_t08.93_s1.2_2x2_NONE"
    assert inv.record("s_lower").ok


def test_chained_setup_is_reported(tmp_path, instrument):
    # a slow drift over 0.05 deg in steps of 0.008 chains into one setup: said, not hidden
    folder = night_with_tilts(tmp_path, [8.938, 8.946, 8.954, 8.962, 8.970, 8.978])
    inv, warns = inventory_quiet(folder, tolerant(instrument, GRTILT=0.01))
    assert len({r.setup for r in inv.records if r.frame_type != "bias"}) == 1
    msgs = [str(w.message) for w in warns]
    assert any("GRTILT: values 8.93 to 8.978 form one setup" in m
               and "instrument.setup_tolerances.GRTILT" in m for m in msgs)
    groups = group_setups([{"T": 1.0}, None, {"T": 1.5}], ["T"], tolerances={"T": 1.0})
    assert groups.ids == ("1.25", "", "1.25") and groups.centres == {"T": (1.25,)}


def test_setup_keyword_not_a_number_rejects_that_frame(tmp_path, instrument):
    folder = night_with_tilts(tmp_path, [8.93])
    write_raw(folder / "s_bad.fits", "OBJECT", obj="T", setup={**SETUP_A, "GRTILT": "eight"})
    inv, _ = inventory_quiet(folder, instrument)
    bad = inv.record("s_bad")
    assert bad.status == "rejected" and bad.reason == "keyword GRTILT = 'eight'; expected a number"
    assert inv.record("s0").ok


# -- frames that are not data (pipeline.night.screening) -----------------------------
def _star_frame(shape=(40, 36), fraction=0.05):
    pixels = 1000 + (np.arange(shape[0] * shape[1]) % 7).reshape(shape)
    pixels = pixels.astype(float)
    n = int(round(fraction * shape[0] * (shape[1] - 4)))
    pixels[:, 10:32].flat[:n] = 65535        # a saturated core on a few rows
    return pixels.astype(np.uint16)


def _nan_frame(shape=(40, 36)):
    pixels = 1000.0 + (np.arange(shape[0] * shape[1]) % 7).reshape(shape)
    pixels[:30] = np.nan                      # 75 % of the rows lost
    return pixels


@pytest.mark.parametrize("case, pixels, expect", [
    ("saturated", np.full((40, 36), 65535), "% of the sampled pixels are at or above saturation"),
    ("zero", np.zeros((40, 36), dtype=np.uint16), "every sampled pixel is 0"),
    ("constant", np.full((40, 36), 1234), "every sampled pixel has the same value 1234"),
    ("nan", None, "75% of the sampled pixels are NaN or infinite"),
])
def test_frames_that_are_not_data_are_rejected_with_reason(tmp_path, instrument, case, pixels,
                                                           expect):
    folder = good_night(tmp_path / "raw")
    pixels = _nan_frame() if case == "nan" else pixels
    write_raw(folder / "bad.fits", "FLAT", pixels=pixels)
    write_raw(folder / "star.fits", "OBJECT", obj="Bright", pixels=_star_frame())
    inv, warns = inventory_quiet(folder, instrument)
    rec = inv.record("bad")
    assert rec.status == "rejected" and rec.reason.startswith("not data: ")
    assert expect in rec.reason and "left out of the night" in rec.reason
    msgs = [str(w.message) for w in warns if "bad.fits" in str(w.message)]
    assert len(msgs) == 1 and expect in msgs[0]
    # the rest of the night goes on: the flat of the setup and a star with 5 % saturated pixels
    assert inv.record("f1").ok and inv.record("star").ok and inv.record("sci1").ok
    assert [r.frame_id for r in inv.flats_for(inv.record("sci1").setup)] == ["f1"]


def test_screening_thresholds_and_sample(tmp_path, instrument):
    from pipeline.night.screening import pixel_problem, read_row_sample

    folder = good_night(tmp_path)
    write_raw(folder / "star.fits", "OBJECT", obj="Bright", pixels=_star_frame(fraction=0.3))
    # 30 % saturated passes the default 0.5, fails a stricter limit
    inv, _ = inventory_quiet(folder, instrument)
    assert inv.record("star").ok
    with pytest.warns(InputFileWarning, match="star.fits: rejected: not data"):
        inv = take_inventory(folder, instrument, {"max_saturated_fraction": 0.2})
    assert inv.record("star").status == "rejected"
    # rows are sampled evenly within the data section, scaled by BZERO (raw ADU)
    from pipeline.core.headers import parse_section
    sample = read_row_sample(folder / "star.fits", n_rows=4, section=parse_section("[1:32,1:40]"))
    assert sample.shape == (4, 32) and sample.max() == 65535.0 and sample.min() >= 1000.0
    assert read_row_sample(folder / "star.fits", n_rows=100).shape == (40, 36)
    # saturation test off without a level; infinities count as not finite
    assert pixel_problem(np.full(10, 70000.0), saturation_adu=None) is not None  # constant
    assert pixel_problem(np.r_[np.full(6, np.inf), np.arange(4.0)], saturation_adu=None) \
        .startswith("not data: 60%")
    assert pixel_problem(np.array([]), saturation_adu=1.0) is None


def test_date_alone_completed_by_the_configured_time_keyword(tmp_path, instrument):
    folder = good_night(tmp_path)
    write_raw(folder / "sci_ut.fits", "OBJECT", obj="T", date="2026-03-14",
              extra={"UTSTART": "02:30:00", "UT": "09:00:00"})
    inv, _ = inventory_quiet(folder, {**instrument,
                                      "keywords": {**instrument["keywords"], "time_obs": "UTSTART"}})
    assert inv.record("sci_ut").mjd == pytest.approx(Time("2026-03-14T02:30:00").mjd, abs=1e-9)
    inv, _ = inventory_quiet(folder, instrument)           # not configured: UT is tried
    assert inv.record("sci_ut").mjd == pytest.approx(Time("2026-03-14T09:00:00").mjd, abs=1e-9)


def test_night_log_records_the_airmass_used(tmp_path, instrument, caplog):
    import astropy.units as u
    from astropy.coordinates import AltAz, EarthLocation, SkyCoord
    from astropy.utils import iers

    folder = good_night(tmp_path / "raw")
    site = instrument["site"]
    where = EarthLocation.from_geodetic(lon=site["longitude_deg"] * u.deg,
                                        lat=site["latitude_deg"] * u.deg, height=site["height_m"] * u.m)
    start = Time("2026-03-14T02:40:00", scale="utc")
    target = SkyCoord(150.0 * u.deg, -30.0 * u.deg)
    with iers.conf.set_temp("auto_download", False), iers.conf.set_temp("auto_max_age", None):
        alt = target.transform_to(AltAz(obstime=start + 600 * u.s, location=where)).alt
    mid_secz = float(1 / np.sin(alt.radian))     # astropy, mid-exposure, plane-parallel
    # sexagesimal coordinates; the header airmass is 0.05 off the truth
    write_raw(folder / "sci_sky.fits", "OBJECT", obj="Sky target", date=start.isot,
              exptime=1200.0, extra={"RA": "10:00:00", "DEC": "-30:00:00",
                                     "AIRMASS": round(mid_secz + 0.05, 4)})
    log = tmp_path / "night_log.ecsv"
    with caplog.at_level("WARNING", logger="pipeline.night_log"):
        write_night_log_file(raw_frames=[], night_log=str(log), raw_dir=str(folder),
                             instrument=instrument, observing={"airmass": "computed"})
    t = Table.read(log, format="ascii.ecsv")
    row = t[list(t["frame_id"]).index("sci_sky")]
    assert row["airmass_source"] == "computed"
    # exposure mean vs the mid-exposure sec z of astropy: within 0.005 at X ~ 1.1-1.5
    assert row["airmass_computed"] == pytest.approx(mid_secz, abs=0.005)
    assert row["airmass_used"] == row["airmass_computed"]
    assert any("sci_sky: header AIRMASS" in r.getMessage() and "differs" in r.getMessage()
               for r in caplog.records)
    # no coordinates: the header value, and why
    sci1 = t[list(t["frame_id"]).index("sci1")]
    assert sci1["airmass_source"] == "header" and sci1["airmass_used"] == 1.2
    assert any("sci1: airmass not computed: RA, DEC missing" in r.getMessage()
               for r in caplog.records)
    # frames that are not targets get no airmass choice
    assert t[list(t["frame_id"]).index("f1")]["airmass_source"] == "-"
    assert t.meta["iers_table"].startswith("astropy-iers-data")
