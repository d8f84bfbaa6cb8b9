"""Tests of the demo-night simulator (demo_data/) against independent truth.

Check values and their sources:
* line positions: the grating equation solved here, in the test, from the true
  parameters (m lambda = d cos(gamma) (sin alpha + sin beta); camera
  X = X_c + offset + f tan(beta - beta_c)/p; distortion and line tilt as
  documented in demo_data/README.md),
* photon numbers: f_lambda * area * lambda/(h c) * throughput * atmosphere
  integrated here with scipy.integrate.quad,
* line lists: the shared reference tables (../shared/reference, sources in its
  README.md),
* extinction shape: the La Silla mean curve (TUG77) of ../shared/reference,
* noise: Poisson and Gaussian statistics (photon-transfer relation, common practice).
"""

import ast
import csv
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from scipy.integrate import quad
from scipy.special import erf
from scipy.stats import trim_mean

import demo_data.simulate as sim
from demo_data import sources as src
from demo_data.observing import air_to_vac

REPO = Path(__file__).resolve().parents[1]
# published tables shipped with the tests (copies of the project's shared reference folder)
REF = REPO / "tests" / "reference"
PNG_DIR = Path("/tmp/test_simulator_png")


def _ref_rows(name):
    path = REF / name
    if not path.exists():
        raise FileNotFoundError(f"reference table {path} missing; it ships in tests/reference")
    with open(path, newline="") as fh:
        return list(csv.DictReader(line for line in fh if not line.startswith("#")))


def _own_rows(name):
    with open(REPO / "demo_data" / "data" / name, newline="") as fh:
        return list(csv.DictReader(line for line in fh if not line.startswith("#")))


# ----------------------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def inst():
    return sim.make_instrument()


@pytest.fixture(scope="module")
def night_dir(tmp_path_factory):
    """The small demo night made through the documented command line."""
    out = tmp_path_factory.mktemp("night") / "raw"
    subprocess.run([sys.executable, "-m", "demo_data.simulate", "--out", str(out), "--quiet"],
                   check=True, cwd=REPO, timeout=900)
    return out


@pytest.fixture(scope="module")
def index(night_dir):
    return json.loads((night_dir / "truth" / "index.json").read_text())


# ----------------------------------------------------------------------------- independent optics
def grating_x_binned(wave, y_b, p, *, bx=2, by=2, flexure_b=0.0):
    """Binned canonical x of wavelength ``wave`` at binned row ``y_b``, solved here.

    Written independently of demo_data.optics from the documented model.
    """
    Y = by * np.asarray(y_b, float) + 0.5 * (by - 1)
    d = 1.0e7 / p["groove_density_per_mm"]
    alpha = np.deg2rad(p["tilt_deg"] + p["camera_collimator_angle_deg"] / 2)
    beta_c = np.deg2rad(p["tilt_deg"] - p["camera_collimator_angle_deg"] / 2)
    xc, yc = (p["nx_phys"] - 1) / 2, (p["ny_phys"] - 1) / 2
    f, pix = p["camera_focal_length_mm"], p["pixel_size_mm"]
    gamma = np.arctan((Y - yc) * pix / f)
    beta = np.arcsin(p["order"] * np.asarray(wave, float) / (d * np.cos(gamma)) - np.sin(alpha))
    x_ideal = xc + p["detector_offset_px"] + f * np.tan(beta - beta_c) / pix
    u = (x_ideal - xc) / (p["nx_phys"] / 2)
    X = x_ideal + p["distortion_a3_px"] * u ** 3 + p["line_tilt_px_per_px"] * (Y - yc) + bx * flexure_b
    return (X - 0.5 * (bx - 1)) / bx


def _isolated(xc, *, sep=14.0, lo=15.0, hi=1008.0):
    return [i for i in range(len(xc))
            if lo < xc[i] < hi and np.all(np.abs(np.delete(xc, i) - xc[i]) > sep)]


# ----------------------------------------------------------------------------- optics
@pytest.mark.parametrize("grtilt, lamps, flexure", [(8.93, "HgAr,Ne", 0.13), (11.83, "Ne,He,Ar", -0.21)])
def test_arc_lines_sit_where_the_grating_equation_puts_them(inst, grtilt, lamps, flexure):
    arc = sim.make_arc(inst, grtilt, lamps=lamps, flexure_x_px=flexure, filter_name="NONE",
                       poisson=False, read_noise=False, cosmic_rays=False)
    p = arc.truth.optics.to_dict()
    lines = arc.truth.info["lines"]
    rows = np.arange(256)
    solved = grating_x_binned(lines["wavelength_air_angstrom"][:, None], rows[None, :], p,
                              flexure_b=flexure)
    # the simulator's own line table against the grating equation solved here
    np.testing.assert_allclose(lines["x_px_per_row"], solved, atol=1e-3, rtol=0)
    # the rendered pixels: first moment of each isolated line in every 5th row
    img = arc.truth.illumination_e.astype(float)
    iso = _isolated(solved[:, 128])
    assert len(iso) >= 8, f"only {len(iso)} isolated lines"
    worst = 0.0
    for i in iso:
        for y in range(8, 248, 5):
            x0 = solved[i, y]
            lo, hi = int(round(x0)) - 7, int(round(x0)) + 8
            prof = img[y, lo:hi]
            centroid = (prof * np.arange(lo, hi)).sum() / prof.sum()
            worst = max(worst, abs(centroid - x0))
    assert worst < 1e-3, f"rendered line centroid off the grating equation by {worst:.5f} px"


def test_true_optics_differ_from_nominal_as_specified(inst):
    for grtilt in (8.93, 11.83):
        optics = inst.optics(grtilt)
        assert 0.1 <= abs(optics.tilt_deg - grtilt) <= 0.3
    err = abs(inst.focal_length_mm / 250.0 - 1)  # nominal 250 mm: config/instruments/rls.yaml
    assert 0.005 <= err <= 0.01


def test_lines_are_tilted_and_curved_along_the_slit(inst):
    arc = sim.make_arc(inst, 8.93, poisson=False, read_noise=False, cosmic_rays=False)
    x = arc.truth.line_x_px(5460.735)  # Hg I, ASDq
    tilt = x[-1] - x[0]
    # shear 0.0045 unbinned px per unbinned row over 510 rows, in binned px, plus curvature
    assert 0.8 < tilt < 1.6
    mid = x[128] - 0.5 * (x[0] + x[-1])
    assert abs(mid) > 0.01, "no curvature along the slit"


def test_wavelength_map_inverts_the_grating_equation(night_dir, index):
    for name, setup in index["setups"].items():
        wmap = fits.getdata(night_dir / "truth" / setup["wavelength_map"])
        assert wmap.shape == (256, 1024)
        assert np.all(np.diff(wmap, axis=1) > 0), "wavelength must increase with canonical x"
        rng = np.random.default_rng(5)
        ys, xs = rng.integers(0, 256, 300), rng.integers(0, 1024, 300)
        x_back = grating_x_binned(wmap[ys, xs], ys, setup["optics"])
        np.testing.assert_allclose(x_back, xs, atol=1e-6)


def test_flexure_shifts_the_wavelength_scale(inst):
    optics = inst.optics(8.93)
    base = sim.wavelength_map(inst, optics)
    shifted = sim.wavelength_map(inst, optics, flexure_x_px=0.3)
    # lambda_flexed(x) = lambda_0(x - 0.3): compare by interpolation along a row
    x = np.arange(1024.0)
    np.testing.assert_allclose(shifted[100, 5:-5], np.interp(x[5:-5] - 0.3, x, base[100]), atol=2e-4)


def test_raw_orientation_wavelength_decreases_with_row(night_dir, index):
    setup = index["setups"]["G600_t08.93_NONE"]
    wmap = fits.getdata(night_dir / "truth" / setup["wavelength_map"])
    raw_order = wmap.T[::-1]           # raw[r, c] = canonical[c, nx - 1 - r]
    assert np.all(np.diff(raw_order, axis=0) < 0)
    # the brightest Hg line in the first arc lies where the map says, in RAW pixels
    data = fits.getdata(night_dir / "rls_0013.fits").astype(float)
    r = np.argmin(np.abs(raw_order[:, 128] - 5460.735))
    col = data[:, 128]
    assert abs(np.argmax(col[r - 10:r + 11]) - 10) <= 1


# ----------------------------------------------------------------------------- line lists
def test_arc_line_table_is_the_verified_reference_rows():
    ref = _ref_rows("arc_lines_air.csv")
    verified = {(r["species"], r["wavelength_air_angstrom"]): r for r in ref if r["source"] != "memory"}
    own = _own_rows("arc_lines_air.csv")
    assert len(own) == len(verified)
    for row in own:
        key = (row["species"], row["wavelength_air_angstrom"])
        assert key in verified, f"{key} is not a verified reference row"
        assert row["relative_intensity"] == verified[key]["relative_intensity"]
        assert row["source"] == verified[key]["source"]
    # and what the lamps emit is taken from it
    waves, rates, species = src.lamp_lines("HgAr,Ne")
    assert set(species) == {"Hg I", "Ar I", "Ne I"}
    ref_w = {float(r["wavelength_air_angstrom"]) for r in verified.values()
             if r["species"] in ("Hg I", "Ar I", "Ne I")}
    assert set(waves.tolist()) == ref_w
    assert np.all(rates > 0)


def test_sky_line_table_matches_reference():
    ref = _ref_rows("sky_lines_air.csv")
    own = _own_rows("sky_lines_air.csv")
    assert [(r["species"], r["wavelength_air_angstrom"], r["source"]) for r in own] == \
        [(r["species"], r["wavelength_air_angstrom"], r["source"]) for r in ref]


# ----------------------------------------------------------------------------- photon numbers and noise
def test_standard_star_counts_match_expected_photons(inst):
    # a straight slit (no width ripple) and a Gaussian star: the slit fraction is the erf
    straight = sim.make_instrument(slit_ripple=())
    airmass, exptime, seeing = 1.3, 60.0, 1.1
    frame = sim.make_science(straight, 8.93, target="TRS-17", exptime_s=exptime, airmass=airmass,
                             flexure_x_px=0.0, seeing_fwhm_arcsec=seeing, slit_offset_arcsec=0.0,
                             sky=False, cosmic_rays=False, frame_type="STANDARD", seed=11)
    optics = frame.truth.optics
    y_trace = 2 * frame.truth.info["trace"]["trace_y_px"][512] + 0.5
    lam0, lam1 = optics.wavelength_of(-0.5, y_trace), optics.wavelength_of(2047.5, y_trace)
    h_c = 6.62607015e-27 * 2.99792458e18  # erg A, CODATA exact

    def photons(lam):
        sigma = seeing * (lam / 5000.0) ** -0.2 / 2.3548
        slit = erf(0.6 / (np.sqrt(2) * sigma))            # 1.2" slit, centred Gaussian star
        vac = air_to_vac(lam)    # the star is defined at vacuum wavelengths; photon energy hc/lambda_vac
        return (src.standard_star_flux(vac) * src.TELESCOPE_AREA_CM2 * vac / h_c
                * src.throughput(lam, optics, "NONE") * 10 ** (-0.4 * src.extinction_mag_per_airmass(lam) * airmass)
                * src.telluric_transmission(lam, airmass) * slit * exptime)

    expected, _ = quad(photons, lam0, lam1, limit=400)
    model = frame.truth.components["object"].sum()
    # the vignetting at the star's row (1 - 0.05 t^2, t ~ 0.002) is below 1e-6
    assert model == pytest.approx(expected, rel=1e-3)
    # the written pixels: bias removed with the true bias, gain, response and dark divided out
    det = inst.detector
    adu = frame.raw.astype(float) - frame.truth.info["bias_adu"]
    e = sim.raw_to_canonical(adu, det.nyb) * det.gain_e_per_adu - det.dark_e_per_s() * exptime
    resp = det.pixel_response()
    measured = (e / resp).sum()
    var = ((frame.truth.expected_e + det.read_noise_e ** 2 + det.gain_e_per_adu ** 2 / 12) / resp ** 2).sum()
    assert abs(measured - expected) < 4 * np.sqrt(var), \
        f"{measured:.0f} vs {expected:.0f} (sigma {np.sqrt(var):.0f})"


def test_flat_pair_photon_transfer_gives_true_gain_and_poisson_noise(inst):
    f1 = sim.make_flat(inst, 8.93, exptime_s=6.0, seed=1, cosmic_rays=False)
    f2 = sim.make_flat(inst, 8.93, exptime_s=6.0, seed=2, cosmic_rays=False)
    b1 = f1.raw.astype(float) - f1.truth.info["bias_adu"]
    b2 = f2.raw.astype(float) - f2.truth.info["bias_adu"]
    region = (slice(100, 900), slice(20, 60))   # raw rows x data columns, well illuminated
    diff_var = np.var(b1[region] - b2[region]) / 2
    mean = 0.5 * (b1[region] + b2[region]).mean()
    rn_adu = inst.detector.read_noise_e / inst.detector.gain_e_per_adu
    gain = mean / (diff_var - rn_adu ** 2 - 1 / 12)
    assert gain == pytest.approx(inst.detector.gain_e_per_adu, rel=0.02)
    assert f1.header["GAIN"] != pytest.approx(inst.detector.gain_e_per_adu, rel=0.01)
    # per-pixel normalised residuals of the whole flat: unit variance (Poisson + read noise)
    e = f1.electrons()
    chi = (e - f1.truth.expected_e) / np.sqrt(f1.variance() + inst.detector.gain_e_per_adu ** 2 / 12)
    assert np.var(chi) == pytest.approx(1.0, abs=0.01)


def test_bias_overscan_tracks_rows_and_read_noise(inst):
    bias = sim.make_bias(inst, seed=9, cosmic_rays=False)
    raw = bias.raw.astype(float)
    pattern = inst.detector.bias_pattern_adu()
    data_rows = (raw[:, :256] - pattern).mean(axis=1)
    over_rows = raw[:, 256:].mean(axis=1)
    rn_adu = inst.detector.read_noise_e / inst.detector.gain_e_per_adu
    resid = data_rows - over_rows
    # residual set by read noise only: rn * sqrt(1/256 + 1/32)
    assert np.std(resid) == pytest.approx(rn_adu * np.sqrt(1 / 256 + 1 / 32), rel=0.1)
    assert np.std(over_rows) > 2 * np.std(resid), "overscan carries no row structure"
    assert 990 < np.median(raw) < 1010
    noise = np.std(raw[:, :256] - pattern - over_rows[:, None]) * inst.detector.gain_e_per_adu
    assert noise == pytest.approx(inst.detector.read_noise_e, rel=0.05)


def test_cosmic_rays_scale_with_exposure_and_are_in_the_pixels(inst):
    det = inst.detector
    area = (det.nx_phys * 0.0015) * (det.ny_phys * 0.0015)  # cm^2: 15-um pixels
    counts = {}
    for t in (60.0, 1200.0):
        n = [sim.make_science(inst, 8.93, target=None, exptime_s=t, sky=False, seed=s).truth.info["n_cosmic"]
             for s in (1, 2)]
        counts[t] = sum(n)
        mean = 2 * det.cosmic_ray_rate_per_cm2_s * area * (t + det.readout_time_s)
        assert abs(counts[t] - mean) < 4 * np.sqrt(mean) + 1
    assert counts[1200.0] > 5 * counts[60.0]
    frame = sim.make_science(inst, 8.93, target=None, exptime_s=1200.0, seed=3)
    hit = frame.truth.cosmic_e > 300
    excess = (frame.electrons() - frame.truth.expected_e)[hit]
    assert np.mean(excess > 5 * np.sqrt(frame.variance()[hit])) > 0.97


def test_saturated_group_only_in_the_bright_star_frame(night_dir, index):
    for fid, entry in index["frames"].items():
        if entry["kind"] in ("arc", "flat", "standard") or entry.get("target") in ("TRG-511", "TRV-9"):
            if entry["defect"]:
                continue
            assert fits.getdata(night_dir / entry["file"]).max() < 65000, fid
    data = fits.getdata(night_dir / "rls_0021.fits")
    nsat = np.count_nonzero(data >= 65000)   # config saturation_adu
    assert 5 <= nsat < 0.02 * data.size
    assert index["frames"]["rls_0021"]["target"] == "TRB-2"


# ----------------------------------------------------------------------------- targets
def test_trace_and_galaxy_lines_match_truth(inst):
    star = sim.make_science(inst, 8.93, target="TRV-9", exptime_s=900, sky=False, cosmic_rays=False,
                            poisson=False, read_noise=False, trace_y_px=140.0, trace_drift_px=(1.6, 0.8))
    obj = star.truth.components["object"].astype(float)
    y = np.arange(256)[:, None]
    centroid = (obj * y).sum(axis=0) / obj.sum(axis=0)
    tr = star.truth.info["trace"]
    np.testing.assert_allclose(centroid[10:-10], tr["trace_y_px"][10:-10], atol=5e-3)
    np.testing.assert_allclose(obj.sum(axis=0), tr["object_electrons"], rtol=1e-5)
    assert tr["trace_y_px"].max() - tr["trace_y_px"].min() > 2.0   # drifts a few pixels

    gal = sim.make_science(inst, 8.93, target="TRG-511", exptime_s=1200, sky=False, cosmic_rays=False,
                           poisson=False, read_noise=False)
    line = next(ln for ln in gal.truth.info["galaxy_lines"] if ln["name"] == "[O III] 5007")
    z = src.TARGETS["TRG-511"].redshift
    assert line["observed_wavelength_angstrom"] == pytest.approx(5006.84 * (1 + z))
    img = gal.truth.components["object"].astype(float)
    xl = gal.truth.line_x_px(line["observed_wavelength_angstrom"])
    x0 = int(round(xl[104]))
    cont = 0.5 * (img[:, x0 - 14:x0 - 9].mean(axis=1) + img[:, x0 + 10:x0 + 15].mean(axis=1))
    net = img[:, x0 - 8:x0 + 9] - cont[:, None]
    assert net.sum() == pytest.approx(line["electrons_in_frame"], rel=0.03)
    # rotation: the line centre moves along the slit by ~ +-2 v_max/c in wavelength
    cx = (net * np.arange(x0 - 8, x0 + 9)).sum(axis=1) / net.sum(axis=1)
    disp = np.gradient(gal.truth.wavelength_map()[104])[x0]
    dv = (cx[118] - cx[90]) * disp / line["observed_wavelength_angstrom"] * 299792.458
    assert 60 < dv < 240


# ----------------------------------------------------------------------------- shipped observer tables
def test_extinction_table_matches_model_and_has_a_published_shape():
    t = Table.read(REPO / "demo_data" / "tarn_ridge_extinction.ecsv")
    lam = np.asarray(t["wavelength_angstrom"], float)
    k = np.asarray(t["extinction_mag_per_airmass"], float)
    np.testing.assert_allclose(k, src.extinction_mag_per_airmass(lam), atol=5e-4)
    ref = _ref_rows("extinction_curve.csv")
    rl = np.array([float(r["wavelength_angstrom"]) for r in ref])
    rk = np.array([float(r["extinction_mag_per_airmass"]) for r in ref])
    # a different site (La Silla, TUG77), so only the shape is compared, loosely:
    sel = (rl >= 3300) & (rl <= 8200)
    ours = np.interp(rl[sel], lam, k)
    ratio = ours / rk[sel]
    assert np.all((ratio > 0.7) & (ratio < 2.6)), ratio
    assert np.corrcoef(np.log(ours), np.log(rk[sel]))[0, 1] > 0.98
    # the blue (Rayleigh-dominated) log-log slope between 3500 and 5000 A
    def slope(k_3500_5000):
        return np.log(k_3500_5000[0] / k_3500_5000[1]) / np.log(5000 / 3500)
    ref_slope = slope(np.interp([3500, 5000], rl, rk))
    our_slope = slope(np.interp([3500, 5000], lam, k))
    assert our_slope == pytest.approx(ref_slope, rel=0.25)
    assert np.all(np.diff(k[lam <= 5000]) < 0)


def test_standard_table_holds_bin_averages_of_the_star():
    t = Table.read(REPO / "demo_data" / "standards" / "TRS-17.ecsv")
    assert t.colnames == ["wavelength_angstrom", "flux_erg_s_cm2_angstrom", "bin_width_angstrom"]
    assert str(t["flux_erg_s_cm2_angstrom"].unit) == "erg / (Angstrom s cm2)"
    for i in (10, 333, 600, 1100):
        c, w = t["wavelength_angstrom"][i], t["bin_width_angstrom"][i]
        # the star is defined at vacuum wavelengths; the table is on air wavelengths
        mean = quad(lambda lam: src.standard_star_flux(air_to_vac(lam)), c - w / 2, c + w / 2)[0] / w
        assert t["flux_erg_s_cm2_angstrom"][i] == pytest.approx(mean, rel=1e-5)
    # H beta absorption visible in the table: the core is below the neighbouring continuum
    f = np.interp([4700, 4861, 5020], t["wavelength_angstrom"], t["flux_erg_s_cm2_angstrom"])
    assert f[1] < 0.7 * 0.5 * (f[0] + f[2])


# ----------------------------------------------------------------------------- files and headers
KEYWORDS = {"IMAGETYP": str, "OBJECT": str, "DATE-OBS": str, "GRATING": str, "GRTILT": float,
            "SLITWID": float, "CCDSUM": str, "FILTER": str, "LAMPS": str, "GAIN": float,
            "RDNOISE": float, "DATASEC": str, "BIASSEC": str, "TELESCOP": str, "INSTRUME": str,
            "OBSERVAT": str}


@pytest.mark.filterwarnings("ignore:File may have been truncated")
def test_frames_are_valid_fits_with_documented_headers(night_dir, index):
    files = sorted(night_dir.glob("*.fits"))
    assert 20 <= len(files) <= 30
    types = {}
    for path in files:
        entry = index["frames"][path.stem]
        if entry["defect"] in ("truncated", "not_fits"):
            with pytest.raises(Exception):
                with fits.open(path) as hdul:
                    hdul.verify("exception")
                    _ = hdul[0].data.sum()
            continue
        with fits.open(path) as hdul:
            hdul.verify("exception")
            h, data = hdul[0].header, hdul[0].data
            assert len(hdul) == 1 and data.dtype == np.uint16 and h["BZERO"] == 32768
            for key, typ in KEYWORDS.items():
                assert isinstance(h[key], typ), f"{path.name}: {key}"
            assert h["IMAGETYP"] in {"BIAS", "FLAT", "ARC", "STANDARD", "OBJECT", "FOCUS"}
            assert data.shape == (1024, 288) and h["CCDSUM"] == "2 2"
            assert h["DATASEC"] == "[1:256,1:1024]" and h["BIASSEC"] == "[257:288,1:1024]"
            if entry["defect"] == "no_exptime":
                assert "EXPTIME" not in h
            else:
                assert h["EXPTIME"] >= 0
            if h["IMAGETYP"] in ("STANDARD", "OBJECT"):
                assert 1.0 <= h["AIRMASS"] < 2.0
                assert isinstance(h["RA"], float) and isinstance(h["DEC"], float)
            if h["IMAGETYP"] == "ARC":
                assert h["LAMPS"] in ("HgAr,Ne", "Ne,He,Ar")
            np.datetime64(h["DATE-OBS"])   # ISO 8601
            types.setdefault(h["IMAGETYP"], set()).add((h["GRTILT"], h["FILTER"]))
    assert types["FLAT"] == {(8.93, "NONE"), (11.83, "GG495")}
    assert types["ARC"] == {(8.93, "NONE"), (11.83, "GG495")}
    assert "FOCUS" in types
    statuses = {e["expected_pipeline_status"] for e in index["frames"].values()}
    assert statuses == {"ok", "ignored", "rejected"}


def test_truth_files_are_complete(night_dir, index):
    truth = night_dir / "truth"
    for entry in index["frames"].values():
        for key in ("lines", "trace", "model"):
            if key in entry:
                assert (truth / entry[key]).exists()
    cr = Table.read(truth / "cosmic_rays.ecsv")
    assert len(cr) > 100 and set(cr.colnames) == {"frame_id", "y_px", "x_px", "electrons"}
    assert index["noise_model"]["gain_e_per_adu"] != index["instrument"]["detector"]["gain_nominal_header"]
    trace = Table.read(truth / index["frames"]["rls_0017"]["trace"])
    assert len(trace) == 1024 and np.all(trace["object_electrons"] > 0)
    for name in ("TRS-17", "TRG-511", "TRV-9"):
        spec = Table.read(truth / index["targets"][name]["spectrum"])
        assert np.all(spec["flux_erg_s_cm2_angstrom"] > 0)


def test_deterministic_by_seed(night_dir, inst):
    again = sim.make_night(None, frames=["rls_0013", "rls_0016"])
    for fid in ("rls_0013", "rls_0016"):
        on_disk = fits.getdata(night_dir / f"{fid}.fits")
        np.testing.assert_array_equal(again.frames[fid].raw, on_disk)
    other = sim.make_night(None, frames=["rls_0013"], seed=sim.DEFAULT_SEED + 1)
    assert np.any(other.frames["rls_0013"].raw != again.frames["rls_0013"].raw)


def test_bad_arguments_are_named(inst):
    with pytest.raises(ValueError, match="lamps"):
        sim.make_arc(inst, 8.93, lamps="HgAr,Kr")
    with pytest.raises(ValueError, match="size"):
        sim.make_instrument("huge")
    with pytest.raises(ValueError, match="frames"):
        sim.make_night(None, frames=["rls_9999"])
    with pytest.raises(TypeError, match="tilt_eror"):
        sim.make_instrument(tilt_eror=0.1)


def test_simulator_never_imports_the_pipeline():
    for path in (REPO / "demo_data").glob("*.py"):
        tree = ast.parse(path.read_text())
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                names = [node.module or ""]
            else:
                continue
            assert not any(n == "pipeline" or n.startswith("pipeline.") for n in names), path


# ----------------------------------------------------------------------------- pictures
def _save_png(data, path, title, vmin, vmax):
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    fig, ax = plt.subplots(figsize=(4.5, 9))
    ax.imshow(data, origin="lower", cmap="gray", vmin=vmin, vmax=vmax, aspect="auto",
              interpolation="nearest")
    ax.set_title(title, fontsize=9)
    ax.set_xlabel("raw column (slit, then overscan)")
    ax.set_ylabel("raw row (dispersion; wavelength decreases upwards)")
    fig.tight_layout()
    fig.savefig(path, dpi=80)
    plt.close(fig)


def test_frames_look_like_long_slit_frames(night_dir, index):
    """Write PNGs of an arc, a flat and a science frame and check what they must show."""
    PNG_DIR.mkdir(exist_ok=True)
    arc = fits.getdata(night_dir / "rls_0013.fits").astype(float)
    flat = fits.getdata(night_dir / "rls_0006.fits").astype(float)
    sci = fits.getdata(night_dir / "rls_0025.fits").astype(float)
    _save_png(arc, PNG_DIR / "arc_rls_0013.png", "ARC HgAr,Ne (rls_0013)", 1000, 4000)
    _save_png(flat, PNG_DIR / "flat_rls_0006.png", "FLAT (rls_0006)", 1000, 22000)
    _save_png(sci, PNG_DIR / "science_rls_0025.png", "OBJECT TRG-511 (rls_0025)", 1000, 1120)
    for name in ("arc_rls_0013", "flat_rls_0006", "science_rls_0025"):
        assert (PNG_DIR / f"{name}.png").stat().st_size > 10000
    # overscan at the bias level in every frame; unilluminated slit ends are dark
    for img in (arc, flat, sci):
        assert 990 < np.median(img[:, 256:]) < 1015
    assert np.median(flat[:, 0:4]) < 1020 and np.median(flat[:, 100:150]) > 5000
    # flat: the dead column (unbinned slit row 141 -> binned 70) is deficient
    assert np.median(flat[:, 70]) - 1000 < 0.7 * (np.median(flat[:, 72]) - 1000)
    # science: sky lines fill the slit; [O I] 5577 in every illuminated row
    wmap = fits.getdata(night_dir / "truth" / index["setups"]["G600_t11.83_GG495"]["wavelength_map"])
    r = 1023 - int(np.argmin(np.abs(wmap[128] - 6300.304)))   # raw row of [O I] 6300 (ASDq)
    line_rows = sci[r - 1:r + 2, 8:248].max(axis=0) - np.median(sci[r + 8:r + 12, 8:248], axis=0)
    assert np.all(line_rows > 20)
    # the galaxy trace at its truth position along the slit
    prof = trim_mean(sci[100:900, :256], 0.2, axis=0) - np.median(sci[:, 256:])
    trace = Table.read(night_dir / "truth" / index["frames"]["rls_0025"]["trace"])
    prof[[70, 114, 188]] = np.nan      # dead, low and hot columns (truth: index.json detector)
    assert abs(np.nanargmax(prof[20:240]) + 20 - np.median(trace["trace_y_px"])) <= 2
    # cosmic rays: isolated high pixels exist
    assert np.count_nonzero(sci[:, :256] > 1300) > 50


# ----------------------------------------------------------------------------- seeing and slit losses
def _moffat_2d(fwhm, beta):
    """Normalised circular Moffat (1969) of this FWHM, written here from its definition."""
    alpha = fwhm / (2 * np.sqrt(2 ** (1 / beta) - 1))
    return lambda y, x: (beta - 1) / (np.pi * alpha ** 2) * (1 + (x * x + y * y) / alpha ** 2) ** -beta


def test_slit_row_weights_against_two_dimensional_quadrature():
    from scipy.integrate import dblquad
    from demo_data.observing import slit_row_weights

    edges = np.arange(-20.0, 20.0 + 1e-9, 0.2)       # slit rows of 0.2", a 40" slit
    straight = lambda s: np.full_like(s, 0.6)          # 1.2" slit
    for fwhm, beta, offset, centre in ((1.2, 2.5, 0.10, 0.03), (1.0, 4.0, -0.15, -0.41)):
        w = slit_row_weights(edges, centre, fwhm, beta=beta, offset_arcsec=offset,
                             half_width_arcsec=straight)[:, 0]
        f = _moffat_2d(fwhm, beta)
        # total through the slit over the slit length: adaptive 2-D quadrature (scipy)
        total = dblquad(f, -0.6 - offset, 0.6 - offset, edges[0] - centre, edges[-1] - centre,
                        epsabs=1e-11)[0]
        assert w.sum() == pytest.approx(total, rel=2e-6)
        # one row near the core and one in the wings
        for i in (100, 130):
            row = dblquad(f, -0.6 - offset, 0.6 - offset, edges[i] - centre, edges[i + 1] - centre,
                          epsabs=1e-13)[0]
            assert w[i] == pytest.approx(row, rel=1e-6)
    # Moffat total flux: a slit far wider and longer than the wings passes all the light
    # (beta = 2.5: (1 + R^2/alpha^2)^(1 - beta) outside radius R, ~1e-7 beyond 150")
    big = slit_row_weights(np.arange(-300.0, 300.01, 0.5), 0.0, 1.2, beta=2.5,
                           half_width_arcsec=lambda s: np.full_like(s, 300.0))
    assert big.sum() == pytest.approx(1.0, abs=2e-6)
    # Gaussian limit (beta -> infinity, and the Gaussian option): the erf slit fraction
    sigma = 1.2 / (2 * np.sqrt(2 * np.log(2)))
    erf_fraction = 0.5 * (erf((0.6 - 0.1) / (np.sqrt(2) * sigma)) + erf((0.6 + 0.1) / (np.sqrt(2) * sigma)))
    gauss = slit_row_weights(edges, 0.0, 1.2, beta=None, offset_arcsec=0.1, half_width_arcsec=straight)
    assert gauss.sum() == pytest.approx(erf_fraction, rel=1e-9)
    steep = slit_row_weights(edges, 0.0, 1.2, beta=3000.0, offset_arcsec=0.1, half_width_arcsec=straight)
    assert steep.sum() == pytest.approx(erf_fraction, rel=1e-3)
    # the Moffat's wings lose more light than the Gaussian of the same FWHM
    moffat = slit_row_weights(edges, 0.0, 1.2, beta=2.5, offset_arcsec=0.1, half_width_arcsec=straight)
    assert moffat.sum() < erf_fraction - 0.02


def test_star_frame_slit_fraction_with_width_ripple(inst):
    """The rendered star sees the local slit width: compare with a quadrature whose x limits
    follow the documented ripple (demo_data/README.md), at three columns."""
    from scipy.integrate import dblquad

    fwhm5000, beta, offset = 1.3, 2.7, 0.12
    frame = sim.make_science(inst, 8.93, target="TRV-9", exptime_s=900.0, airmass=1.1,
                             seeing_fwhm_arcsec=fwhm5000, moffat_beta=beta,
                             slit_offset_arcsec=offset, trace_y_px=140.0, sky=False,
                             poisson=False, read_noise=False, cosmic_rays=False)
    tr = frame.truth.info["trace"]
    ripple = sim.Instrument.__dataclass_fields__["slit_ripple"].default
    scale = inst.spatial_scale_arcsec

    def half_width(s_arcsec):      # local half width at slit position s (arcsec), README formula
        y = s_arcsec / scale
        return 0.6 * (1 + sum(a * np.sin(2 * np.pi * y / p + ph) for a, p, ph in ripple))

    lo_edge, hi_edge = -0.5 * scale, (inst.detector.ny_phys - 0.5) * scale
    for x in (16, 512, 1008):        # columns where the weights are evaluated exactly
        lam = tr["wavelength_angstrom"][x]
        f = _moffat_2d(fwhm5000 * (lam / 5000.0) ** -0.2, beta)
        yc = (2 * tr["trace_y_px"][x] + 0.5) * scale    # star centre along the slit, arcsec
        total = dblquad(lambda xx, s: f(s - yc, xx), lo_edge, hi_edge,
                        lambda s: -half_width(s) - offset, lambda s: half_width(s) - offset,
                        epsabs=1e-10)[0]
        assert tr["slit_fraction"][x] == pytest.approx(total, rel=2e-5)
    # the ripple matters at the 0.1 % level, the Moffat wings at the % level
    straight = sim.make_science(sim.make_instrument(slit_ripple=()), 8.93, target="TRV-9",
                                exptime_s=900.0, airmass=1.1, seeing_fwhm_arcsec=fwhm5000, moffat_beta=beta,
                                slit_offset_arcsec=offset, trace_y_px=140.0, sky=False,
                                poisson=False, read_noise=False, cosmic_rays=False)
    change = tr["slit_fraction"] / straight.truth.info["trace"]["slit_fraction"] - 1
    assert 2e-4 < np.max(np.abs(change)) < 2e-2
    # truth columns: f_lambda above the atmosphere x fraction = f_lambda entering the slit
    assert_allclose = np.testing.assert_allclose
    assert_allclose(tr["flux_in_slit_erg_s_cm2_angstrom"],
                    tr["flux_total_erg_s_cm2_angstrom"] * tr["slit_fraction"], rtol=1e-12)
    # and the image holds what entered: column sums / fraction follow the total spectrum
    ratio = tr["object_electrons"] / tr["slit_fraction"]
    ratio2 = straight.truth.info["trace"]["object_electrons"] / straight.truth.info["trace"]["slit_fraction"]
    assert_allclose(ratio[20:-20], ratio2[20:-20], rtol=2e-4)


def test_night_seeing_and_centring_differ_per_frame(night_dir, index):
    stars = {f: e for f, e in index["frames"].items()
             if e["kind"] in ("science", "standard") and e.get("defect") == ""}
    fwhm = np.array([e["seeing_fwhm_arcsec_5000"] for e in stars.values()])
    beta = np.array([e["moffat_beta"] for e in stars.values()])
    assert fwhm.min() >= 1.0 and fwhm.max() <= 1.4 and np.ptp(fwhm) > 0.25
    assert beta.min() >= 2.5 and beta.max() <= 4.0 and len(set(beta)) > 5
    points = [f for f, e in stars.items() if index["targets"][e["target"]]["kind"] == "point"]
    offsets = np.array([stars[f]["slit_offset_arcsec"] for f in points])
    assert 0.05 < np.sqrt(np.mean(offsets ** 2)) < 0.15
    fractions = []
    for fid in points:
        t = Table.read(night_dir / "truth" / stars[fid]["slit"])
        assert t.meta["seeing_profile"] == "moffat" and t.meta["moffat_beta"] == stars[fid]["moffat_beta"]
        assert np.all((t["slit_fraction"] > 0.3) & (t["slit_fraction"] < 1.0))
        np.testing.assert_allclose(t["flux_in_slit_erg_s_cm2_angstrom"],
                                   t["flux_total_erg_s_cm2_angstrom"] * t["slit_fraction"], rtol=1e-9)
        fractions.append(float(np.median(t["slit_fraction"])))
    assert np.ptp(fractions) > 0.05        # slit losses differ from frame to frame


# ----------------------------------------------------------------------------- air / vacuum
def test_air_vacuum_conversion_against_reference_table():
    """Ciddor (1996) standard air against ../shared/reference/air_refraction_checks.csv
    (copy in tests/reference): the computed refractivities of the same formula (RII/computed
    rows N025-N036) exactly, and the published Ne I pairs (SBS04, Peck & Reeder air) and the
    86Kr standard (KR86, Edlen 1966) within the formulas' 0.2-mA agreement (README there)."""
    from demo_data.observing import refractivity_ciddor1996, vac_to_air

    rows = _ref_rows("air_refraction_checks.csv")
    ciddor = [r for r in rows if r["kind"] == "n_minus_1" and r["formula"] == "Ciddor1996"]
    assert len(ciddor) == 12
    for r in ciddor:
        vac = float(r["vacuum_wavelength_angstrom"])
        assert refractivity_ciddor1996(vac) == pytest.approx(float(r["n_minus_1"]), rel=1e-7)
        assert vac_to_air(vac) == pytest.approx(float(r["air_wavelength_angstrom"]), abs=1e-4)
    pairs = [r for r in rows if r["kind"] == "pair" and r["source"] in ("SBS04", "KR86;computed")]
    assert len(pairs) == 19
    for r in pairs:
        vac, air = float(r["vacuum_wavelength_angstrom"]), float(r["air_wavelength_angstrom"])
        assert vac_to_air(vac) == pytest.approx(air, abs=3e-4), r["check_id"]
        assert air_to_vac(air) == pytest.approx(vac, abs=3e-4), r["check_id"]
    lam = np.linspace(3200.0, 10500.0, 50)
    np.testing.assert_allclose(vac_to_air(air_to_vac(lam)), lam, atol=1e-8)


# ----------------------------------------------------------------------------- barycentric motion
def _astropy_corrections(entry, target, site):
    import astropy.units as u
    from astropy.coordinates import EarthLocation, SkyCoord
    from astropy.time import Time
    from astropy.utils import iers

    loc = EarthLocation.from_geodetic(site["longitude_deg"] * u.deg, site["latitude_deg"] * u.deg,
                                      site["height_m"] * u.m)
    start = Time(entry["date_obs"], scale="utc")
    mid = start + 0.5 * entry["exptime_s"] * u.s
    c = SkyCoord(target["ra_deg"] * u.deg, target["dec_deg"] * u.deg)
    with iers.conf.set_temp("auto_download", False), iers.conf.set_temp("auto_max_age", None):
        vb = c.radial_velocity_correction("barycentric", obstime=mid, location=loc).to_value(u.km / u.s)
        vh = c.radial_velocity_correction("heliocentric", obstime=mid, location=loc).to_value(u.km / u.s)
    return mid, vb, vh


def test_barycentric_truth_matches_a_fresh_astropy_call(index):
    from astropy.time import Time

    site = index["site"]
    v_by_target = {}
    for fid, e in index["frames"].items():
        if e["kind"] not in ("science", "standard") or e["defect"]:
            continue
        mid, vb, vh = _astropy_corrections(e, index["targets"][e["target"]], site)
        assert abs((mid - Time(e["mid_exposure_utc"], scale="utc")).sec) < 1e-3
        assert e["v_bary_km_s"] == pytest.approx(vb, abs=1e-5)        # 1 cm/s
        assert e["v_helio_km_s"] == pytest.approx(vh, abs=1e-5)
        assert e["v_corr_applied_km_s"] == e["v_bary_km_s"]
        assert abs(e["v_bary_km_s"]) >= 20.0
        v_by_target.setdefault(e["target"], []).append(vb)
    means = sorted(np.mean(v) for v in v_by_target.values())
    assert len(means) == 4 and np.min(np.diff(means)) > 0.1   # differs between targets
    assert means[-1] - means[0] > 3.0


def test_exposure_mean_airmass_and_mid_exposure(night_dir, index):
    """Airmass from astropy's AltAz (sec z, no refraction) at 9 instants, Simpson's rule,
    against the truth's start, mid-exposure and exposure-mean values (41 instants there)."""
    import astropy.units as u
    from astropy.coordinates import AltAz, EarthLocation, SkyCoord
    from astropy.time import Time
    from astropy.utils import iers

    site = index["site"]
    loc = EarthLocation.from_geodetic(site["longitude_deg"] * u.deg, site["latitude_deg"] * u.deg,
                                      site["height_m"] * u.m)
    for fid in ("rls_0015", "rls_0026"):
        e = index["frames"][fid]
        tgt = index["targets"][e["target"]]
        times = Time(e["date_obs"], scale="utc") + np.linspace(0, e["exptime_s"], 9) * u.s
        with iers.conf.set_temp("auto_download", False), iers.conf.set_temp("auto_max_age", None):
            alt = SkyCoord(tgt["ra_deg"] * u.deg, tgt["dec_deg"] * u.deg).transform_to(
                AltAz(obstime=times, location=loc)).alt
        secz = 1 / np.sin(alt.to_value(u.rad))
        x = secz * (1 - 0.0012 * (secz ** 2 - 1))            # Young & Irvine 1967 (from memory)
        from scipy.integrate import simpson
        assert e["airmass_start"] == pytest.approx(x[0], abs=1e-6)
        assert e["airmass_mid_exposure"] == pytest.approx(x[4], abs=1e-6)
        assert e["airmass_exposure_mean"] == pytest.approx(simpson(x, dx=1) / 8, abs=1e-5)
        assert e["airmass"] == e["airmass_exposure_mean"]       # what the extinction used
        # the header gives the mid-exposure value
        hdr = fits.getheader(night_dir / e["file"])
        assert hdr["AIRMASS"] == pytest.approx(e["airmass_mid_exposure"], abs=1e-4)


def test_galaxy_lines_are_vacuum_redshifted_doppler_shifted_then_in_air(inst):
    """Truth line wavelengths from the documented chain, and the rendered pixels move with
    the observer's velocity: lambda_air = vac_to_air(lambda_rest_vac (1+z) / (1 + v/c))."""
    from demo_data.observing import vac_to_air

    z = src.TARGETS["TRG-511"].redshift
    kw = dict(target="TRG-511", exptime_s=1200, sky=False, poisson=False, read_noise=False,
              cosmic_rays=False, flexure_x_px=0.0)
    rest = sim.make_science(inst, 8.93, v_corr_km_s=0.0, **kw)
    moving = sim.make_science(inst, 8.93, v_corr_km_s=-27.6, **kw)
    c = 299792.458
    line = next(ln for ln in moving.truth.info["galaxy_lines"] if ln["name"] == "[O III] 5007")
    expect = vac_to_air(line["rest_wavelength_vacuum_angstrom"] * (1 + z) / (1 - 27.6 / c))
    assert line["observed_wavelength_angstrom"] == pytest.approx(expect, abs=1e-9)
    # rest vacuum wavelength: the air value from memory (5006.84) converted (the reference
    # table's Ciddor rows fix the formula)
    assert air_to_vac(5006.84) == pytest.approx(line["rest_wavelength_vacuum_angstrom"], abs=1e-9)
    assert moving.truth.info["redshift_topocentric"] == pytest.approx((1 + z) / (1 - 27.6 / c) - 1)
    # pixels: centroid of the line along the dispersion in the central rows, both frames
    img0 = rest.truth.components["object"].astype(float)
    img1 = moving.truth.components["object"].astype(float)
    x0 = int(round(rest.truth.line_x_px(expect)[104]))
    cols = np.arange(x0 - 8, x0 + 9)

    def centroid(img):
        cont = 0.5 * (img[95:114, x0 - 14:x0 - 9].mean(axis=1) + img[95:114, x0 + 10:x0 + 15].mean(axis=1))
        net = img[95:114, x0 - 8:x0 + 9] - cont[:, None]
        return (net * cols).sum() / net.sum()

    disp = np.gradient(rest.truth.wavelength_map()[104])[x0]
    shift_angstrom = (centroid(img1) - centroid(img0)) * disp
    assert shift_angstrom == pytest.approx(expect * 27.6 / c, rel=0.03)   # +0.50 A


# ----------------------------------------------------------------------------- the night's plan
def test_repeated_exposures_and_overlapping_setups(night_dir, index):
    ok = {f: e for f, e in index["frames"].items() if e["expected_pipeline_status"] == "ok"}
    trv = [e for e in ok.values() if e.get("target") == "TRV-9"]
    assert len(trv) >= 3 and len({e["setup"] for e in trv}) == 1
    assert len({e["exptime_s"] for e in trv}) == 1
    nods = sorted(abs(e["trace_y_px_centre"] - trv[0]["trace_y_px_centre"]) for e in trv)
    scale = index["instrument"]["spatial_scale_arcsec_per_phys_px"] * index["instrument"]["detector"]["bin_y"]
    assert 10.0 <= nods[-1] * scale <= 20.0 and nods[1] == 0.0
    for setup in index["setups"]:
        gal = [e for e in ok.values() if e.get("target") == "TRG-511" and e["setup"] == setup]
        assert len(gal) >= 2, setup
    (lo_a, hi_a), (lo_b, hi_b) = (index["setups"][s]["wavelength_range_angstrom"]
                                  for s in sorted(index["setups"]))
    overlap = min(hi_a, hi_b) - max(lo_a, lo_b)
    assert 200.0 < overlap < 800.0


# ----------------------------------------------------------------------------- second instrument (WREN)
@pytest.fixture(scope="module")
def wren_dir(tmp_path_factory):
    """The WREN night made through the documented command line."""
    out = tmp_path_factory.mktemp("wren") / "raw"
    subprocess.run([sys.executable, "-m", "demo_data.simulate", "--out", str(out), "--instrument",
                    "wren", "--quiet"], check=True, cwd=REPO, timeout=900)
    return out


@pytest.fixture(scope="module")
def wren_index(wren_dir):
    return json.loads((wren_dir / "truth" / "index.json").read_text())


def test_wren_pixels_in_an_image_extension_dispersion_along_axis_1(wren_dir, wren_index):
    """Arc lines where the grating equation (solved here, bx = 2, by = 1) puts them, counted
    in RAW columns of the RAWPIX extension: x_raw = 8 (prescan) + x, wavelength increasing."""
    with fits.open(wren_dir / "wren_0012.fits") as hdul:
        assert len(hdul) == 2 and hdul[0].data is None
        assert hdul[1].name == "RAWPIX" and isinstance(hdul[1], fits.ImageHDU)
        raw = hdul[1].data.astype(float)
        ext, prim = hdul[1].header, hdul[0].header
    assert raw.shape == (220, 8 + 800 + 24)
    assert ext["DETBIN"] == "2 1" and ext["DATAREG"] == "[9:808,1:220]"
    assert ext["OSCANREG"] == "[809:832,1:220]" and "EGAIN" not in prim
    assert prim["EXPKIND"] == "COMPARC" and prim["CALSRC"] == "NEON+KRYPTON+XENON"
    entry = wren_index["frames"]["wren_0012"]
    optics = wren_index["setups"][entry["setup"]]["optics"]
    lines = Table.read(wren_dir / "truth" / entry["lines"])
    strongest = lines[np.argsort(lines["electrons_total"])[::-1]]
    row = 110
    checked = 0
    for ln in strongest[:12]:
        x = grating_x_binned(ln["wavelength_air_angstrom"], row, optics, bx=2, by=1,
                             flexure_b=entry["flexure_x_px"])
        if not 10 < x < 790:
            continue
        c = 8 + int(round(x))
        seg = raw[row, c - 4:c + 5] - np.median(raw[row, 809:832])
        centroid = (seg * np.arange(c - 4, c + 5)).sum() / seg.sum()
        if np.all(np.abs(strongest["x_px_centre_row"] - x)[np.abs(strongest["x_px_centre_row"] - x) > 0.01] > 6):
            assert abs(centroid - (8 + x)) < 0.15, ln["wavelength_air_angstrom"]
            checked += 1
    assert checked >= 3
    # wavelength increases with the raw column (the RLS: decreases along its raw rows)
    wmap = fits.getdata(wren_dir / "truth" / wren_index["setups"][entry["setup"]]["wavelength_map"])
    assert wmap.shape == (220, 800) and np.all(np.diff(wmap, axis=1) > 0)
    # 2 x 1 binning: 1600 x 220 unbinned pixels -> 800 data columns x 220 rows (shape above)
    det = wren_index["instrument"]["detector"]
    assert (det["nx_phys"] // det["bin_x"], det["ny_phys"] // det["bin_y"]) == (800, 220)
    assert wren_index["raw_to_canonical"] == {"pixel_hdu": "RAWPIX", "transpose": False,
                                              "flip_x": False, "flip_y": False,
                                              "data_rows": [0, 220], "data_columns": [8, 808]}


def test_wren_grating_readings_jitter_across_the_rounding_boundary(wren_dir, wren_index):
    by_setup = {}
    for fid, entry in wren_index["frames"].items():
        if entry["defect"] == "truncated":
            continue
        hdr = fits.getheader(wren_dir / entry["file"], 0)
        assert hdr["BLOCKFLT"] in ("CLEAR", "LP570"), fid      # README: the two filter values
        if entry.get("setup"):
            by_setup.setdefault(entry["setup"], []).append(hdr["GRATPOS"])
            assert hdr["GRATPOS"] == entry["tilt_reading_deg"]
    assert len(by_setup) == 2
    for setup, readings in by_setup.items():
        readings = np.array(readings)
        assert 1e-4 < np.ptp(readings) < 6e-4, setup
        assert len({f"{r:.2f}" for r in readings}) == 2, setup      # straddles x.xx5
        # one true grating angle per setup, whatever the reading: nominal + the encoder zero point
        nominal = wren_index["conventions"]["setups"][setup]["grating_angle_nominal_deg"]
        assert wren_index["setups"][setup]["optics"]["tilt_deg"] == pytest.approx(
            nominal + wren_index["instrument"]["tilt_error_deg"], abs=1e-12)


def test_wren_headers_sexagesimal_and_airmass_at_start(wren_dir, wren_index):
    from astropy.coordinates import SkyCoord
    import astropy.units as u

    galaxy = []
    for fid, entry in wren_index["frames"].items():
        if entry["kind"] not in ("science", "standard") or entry["defect"] == "truncated":
            continue
        hdr = fits.getheader(wren_dir / entry["file"], 0)
        tgt = wren_index["targets"][entry["target"]]
        c = SkyCoord(hdr["POINTRA"], hdr["POINTDEC"], unit=(u.hourangle, u.deg))
        assert c.separation(SkyCoord(tgt["ra_deg"] * u.deg, tgt["dec_deg"] * u.deg)).arcsec < 0.1
        assert hdr["AMSTART"] == pytest.approx(entry["airmass_start"], abs=1e-4)
        assert hdr["EXPKIND"] == {"science": "SCIENCE", "standard": "FLUXSTD"}[entry["kind"]]
        assert hdr["SHUTOPEN"] == entry["date_obs"] and hdr["SHUTTIME"] == entry["exptime_s"]
        if entry["target"] == "FHV-G27" and entry["defect"] == "":
            galaxy.append(entry)
    assert len(galaxy) == 2
    for entry in galaxy:
        assert 1.7 < entry["airmass_start"] < 1.9
        assert 0.08 < abs(entry["airmass_exposure_mean"] - entry["airmass_start"]) < 0.2


@pytest.mark.filterwarnings("ignore:File may have been truncated")
def test_wren_hostile_files(wren_dir, wren_index):
    defects = {e["defect"]: (fid, e) for fid, e in wren_index["frames"].items() if e["defect"]}
    assert set(defects) == {"saturated_everywhere", "all_zero", "mostly_nan", "truncated"}
    assert all(e["expected_pipeline_status"] == "rejected" for _, e in defects.values())
    sat = fits.getdata(wren_dir / defects["saturated_everywhere"][1]["file"], "RAWPIX")
    assert sat.dtype == np.uint16 and np.all(sat == 65535)
    assert defects["saturated_everywhere"][1]["kind"] == "science"
    zero = fits.getdata(wren_dir / defects["all_zero"][1]["file"], "RAWPIX")
    assert zero.shape == (220, 832) and np.all(zero == 0)
    nan = fits.getdata(wren_dir / defects["mostly_nan"][1]["file"], "RAWPIX")
    assert nan.dtype.kind == "f" and 0.9 < np.mean(np.isnan(nan)) < 1.0
    good = nan[np.isfinite(nan)]
    assert 1400 < np.median(good) < 1700        # the rest are real ADU (bias 1500)
    with pytest.raises(Exception):
        with fits.open(wren_dir / defects["truncated"][1]["file"]) as hdul:
            hdul.verify("exception")
            _ = hdul["RAWPIX"].data.sum()


def test_wren_standard_table_in_nm_vacuum_ab_magnitudes():
    """AB magnitude of the bin-averaged f_nu, recomputed here: f_nu = f_lambda lambda^2 / c
    (lambda vacuum), integrated with scipy.integrate.quad."""
    t = Table.read(REPO / "demo_data" / "standards" / "FHV-S4.ecsv")
    assert str(t["wavelength"].unit) == "nm" and t.meta["wavelength_medium"] == "vacuum"
    assert str(t["ab_mag"].unit) == "mag(AB)"
    c = 2.99792458e18      # A/s
    star = src.WREN_TARGETS["FHV-S4"].continuum
    for i in (5, 120, 280):
        lo, hi = 10 * (t["wavelength"][i] - t["bin_width"][i] / 2), 10 * (t["wavelength"][i] + t["bin_width"][i] / 2)
        mean = quad(lambda lam: star(lam) * lam ** 2 / c, lo, hi)[0] / (hi - lo)
        assert t["ab_mag"][i] == pytest.approx(-2.5 * np.log10(mean) - 48.60, abs=1e-6)
    ext = Table.read(REPO / "demo_data" / "fellhaven_extinction.ecsv")
    tarn = Table.read(REPO / "demo_data" / "tarn_ridge_extinction.ecsv")
    k = np.interp(5500.0, ext["wavelength_angstrom"], ext["extinction_mag_per_airmass"])
    assert k > np.interp(5500.0, tarn["wavelength_angstrom"], tarn["extinction_mag_per_airmass"]) + 0.03


def test_wren_faint_galaxy_beside_a_brighter_field_star():
    inst = sim.make_instrument(instrument="wren")
    frame = sim.make_science(inst, 12.345, target="FHV-G27", filter_name="CLEAR", exptime_s=1800.0,
                             airmass=1.9, moffat_beta=3.0, seeing_fwhm_arcsec=1.5,
                             companions=(("FHV-F2", 62.0),), sky=False, poisson=False,
                             read_noise=False, cosmic_rays=False)
    gal = frame.truth.components["object"].astype(float)
    star = frame.truth.components["star1"].astype(float)
    # continuum ~1 e- per binned pixel per row near the nucleus (line-free columns)
    core = np.median(gal[105:116, 50:300])
    assert 0.5 < core < 2.0
    comp = frame.truth.info["companions"][0]
    assert comp["target"] == "FHV-F2"
    centroid = (star * np.arange(220)[:, None]).sum(axis=0) / star.sum(axis=0)
    np.testing.assert_allclose(centroid[20:-20], comp["trace"]["trace_y_px"][20:-20], atol=0.02)
    assert np.median(star.sum(axis=0)) > 20 * np.median(gal.sum(axis=0)[50:300]) / 10
    # the arcs use only verified (non-memory) reference rows, of the WREN lamps' species
    arc = sim.make_arc(inst, 17.885, lamps="KRYPTON+XENON", filter_name="LP570", poisson=False,
                       read_noise=False, cosmic_rays=False)
    verified = {float(r["wavelength_air_angstrom"]) for r in _ref_rows("arc_lines_air.csv")
                if r["source"] != "memory" and r["species"] in ("Kr I", "Xe I")}
    waves = set(arc.truth.info["lines"]["wavelength_air_angstrom"].tolist())
    assert waves <= verified and len(waves) >= 20
    assert set(arc.truth.info["lines"]["species"]) == {"Kr I", "Xe I"}
