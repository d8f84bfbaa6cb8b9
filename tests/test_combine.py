"""Science-ready spectra: resampling, coadds, splices, velocity frame and medium.

Truths used: analytic integrals of known spectra, Monte-Carlo noise realisations
(the variance and covariance predicted by the code against the scatter of resampled
noise), the barycentric correction computed here directly with astropy, and
specutils' air/vacuum conversion.
"""

import warnings

import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import EarthLocation, SkyCoord, solar_system_ephemeris
from astropy.io import fits
from astropy.time import Time
from astropy.utils import iers
from numpy.testing import assert_allclose
from specutils import Spectrum
from specutils.utils import wcs_utils

from pipeline.combine.coadd import combine_exposures, overlap_scale
from pipeline.combine.frame import frame_edges, velocity_for_header
from pipeline.combine.products import read_combined
from pipeline.combine.resample import resample, resampling_matrix
from pipeline.combine.steps import combine_spectra_file, plan_groups
from pipeline.core.constants import SPEED_OF_LIGHT_KM_S
from pipeline.core.grid import WavelengthGrid
from pipeline.core.spectra import write_spectrum

# an invented site and target (not a real observatory)
SITE = {"latitude_deg": -27.81, "longitude_deg": -69.44, "height_m": 2650.0}
OPTIONS = {"velocity_frame": "barycentric", "vacuum_wavelengths": True,
           "air_vacuum_formula": "Ciddor1996", "clip_sigma": 5.0, "max_iterations": 3,
           "min_overlap_angstrom": 100.0}


def test_resampling_conserves_flux_of_a_known_spectrum():
    # f(x) = 2 + sin(x / 7): its integral over [a, b] is known in closed form
    def integral(a, b):
        return 2 * (b - a) - 7 * (np.cos(b / 7) - np.cos(a / 7))

    old = np.linspace(4000.0, 4100.0, 201)
    new = np.linspace(4010.3, 4090.1, 57)                 # arbitrary phase and width
    density = integral(old[:-1], old[1:]) / np.diff(old)  # exact pixel means
    res = resample(density, np.ones(200), np.zeros(200, np.uint8), old, new)
    # a piecewise-constant input misplaces at most max|f'| * dx**2 / 8 at each of the two
    # partial input pixels of an output pixel (dx = input width 0.5, max|f'| = 1/7)
    bound = 2 * (1 / 7) * 0.5 ** 2 / 8
    assert np.max(np.abs(res.flux * np.diff(new) - integral(new[:-1], new[1:]))) < bound
    # the total over the new grid is exactly that of the input pixels over the same range
    overlap = np.clip(np.minimum(old[1:], new[-1]) - np.maximum(old[:-1], new[0]), 0, None)
    assert np.sum(res.flux * np.diff(new)) == pytest.approx(np.sum(density * overlap), rel=1e-12)
    assert np.all(res.mask == 0)


def test_resampled_variance_and_covariance_factor_match_monte_carlo(rng):
    old = np.linspace(5000.0, 5200.0, 401)
    new = np.linspace(5003.3, 5195.0, 300)
    sigma = 0.5 + rng.uniform(0, 1, 400)
    res = resample(np.zeros(400), sigma ** 2, np.zeros(400, np.uint8), old, new)
    w = resampling_matrix(old, new)
    draws = rng.normal(size=(4000, 400)) * sigma
    out = draws @ w.T.toarray()
    assert_allclose(out.var(axis=0), res.variance, rtol=0.12)
    # the variance of a long sum over the sum of variances, from the simulated noise
    ratio = out.sum(axis=1).var() / res.variance.sum()
    assert res.covariance_factor == pytest.approx(ratio, rel=0.06)
    assert res.covariance_factor > 1.2


def test_uncovered_and_masked_pixels_are_flagged():
    old = np.linspace(0.0, 10.0, 11)
    mask = np.zeros(10, np.uint8)
    mask[3] = 4                                        # a cosmic ray
    res = resample(np.ones(10), np.ones(10), mask, old, np.linspace(-2.0, 12.0, 15))
    assert res.mask[0] & 16 and res.mask[-1] & 16       # NO_COVERAGE outside
    assert res.mask[5] & 4 and not res.mask[7]          # the hit spreads to its new pixel only


def test_coadd_recovers_truth_with_honest_errors_and_rejects_a_cosmic_ray(rng):
    truth = 100.0 + 20 * np.sin(np.arange(500) / 15.0)
    sigma = np.array([3.0, 4.0, 5.0, 3.5])[:, None] * np.ones(500)
    flux = truth + rng.normal(size=(4, 500)) * sigma
    flux[2, 250] += 400.0                              # a cosmic-ray residual
    mask = np.zeros((4, 500), np.uint8)
    mask[1, 10:20] = 1                                 # a masked column
    c = combine_exposures(flux, sigma ** 2, mask, clip_sigma=5.0)
    chi2 = np.mean((c.flux - truth) ** 2 / c.variance)
    assert 0.85 < chi2 < 1.15
    assert c.n_rejected[250] == 1 and c.n_used[250] == 3
    assert abs(c.flux[250] - truth[250]) < 5 * np.sqrt(c.variance[250])
    assert np.all(c.n_used[10:20] == 3)
    expected_var = 1.0 / np.sum(1.0 / sigma[:, 0] ** 2)   # inverse-variance prediction
    assert_allclose(np.median(c.variance), expected_var, rtol=1e-9)
    assert c.info["n_rejected_total"] <= 3            # 5-sigma clipping leaves the noise alone


def test_two_exposures_are_never_clipped():
    flux = np.array([[1.0, 1.0], [1.0, 100.0]])
    c = combine_exposures(flux, np.ones((2, 2)), np.zeros((2, 2), np.uint8))
    assert c.n_rejected.sum() == 0 and np.all(c.n_used == 2)


def test_overlap_scale_of_a_known_ratio(rng):
    wave = np.linspace(6000, 6200, 300)
    a = 50 + rng.normal(size=300)
    b = a / 1.07 + rng.normal(size=300) * 0.1
    s = overlap_scale(wave, a, np.ones(300), np.ones(300, bool), b, np.full(300, 0.01),
                      np.ones(300, bool))
    assert s.scale == pytest.approx(1.07, abs=3 * s.scale_err + 1e-3)


def _astropy_barycentric(ra, dec, date_obs, exptime):
    """The barycentric correction computed here, independently of pipeline.core.observing."""
    location = EarthLocation.from_geodetic(lon=SITE["longitude_deg"] * u.deg,
                                           lat=SITE["latitude_deg"] * u.deg,
                                           height=SITE["height_m"] * u.m)
    time = Time(date_obs, scale="utc") + exptime / 2 * u.s
    with iers.conf.set_temp("auto_download", False), iers.conf.set_temp("auto_max_age", None), \
            solar_system_ephemeris.set("builtin"), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        v = SkyCoord(ra * u.deg, dec * u.deg).radial_velocity_correction(
            "barycentric", obstime=time, location=location)
    return v.to_value(u.km / u.s)


def test_barycentric_correction_and_vacuum_axis_against_astropy_and_specutils():
    header = fits.Header({"RA": 116.915, "DEC": -21.447, "DATE-OBS": "2026-03-14T23:52:00",
                          "EXPTIME": 1200.0})
    choice = velocity_for_header(header, site=SITE, frame="barycentric", vacuum=True)
    v = _astropy_barycentric(116.915, -21.447, "2026-03-14T23:52:00", 1200.0)
    assert choice.velocity_km_s == pytest.approx(v, abs=1e-3)          # 1 m/s
    air = np.array([5000.0, 6562.8])
    theirs = wcs_utils.air_to_vac(air * u.AA, method="Ciddor1996",
                                  scheme="iteration").to_value(u.AA)
    moved = frame_edges(air, velocity_km_s=choice.velocity_km_s, vacuum=True)
    assert_allclose(moved, theirs * (1 + v / SPEED_OF_LIGHT_KM_S), atol=2e-5)


def _write_exposure(folder, frame, obj, setup, grid, flux, variance, *, date_obs, exptime=600.0):
    header = fits.Header({"OBJECT": obj, "SETUP": setup, "FRAMEID": frame, "EXPTIME": exptime,
                          "DATE-OBS": date_obs, "RA": 150.0, "DEC": -30.0, "AIRMASS": 1.1,
                          "OBJROLE": "target", "OBJLABEL": "target", "VARCORR": 1.5})
    n = grid.n_pix
    zeros = np.zeros(n)
    write_spectrum(folder / frame / f"{obj}_target.fits", grid, header, flux=flux, variance=variance,
                   mask=np.zeros(n, np.uint8), boxcar_flux=flux, boxcar_variance=variance,
                   boxcar_mask=np.zeros(n, np.uint8), sky=zeros, trace_px=zeros + 10)


def test_combine_step_writes_readable_coadds_and_a_splice(tmp_path, rng):
    spectra = tmp_path / "spectra"
    blue = WavelengthGrid(4000.0, 2.0, 800)          # 4000-5598 A
    red = WavelengthGrid(5300.0, 2.5, 700)           # overlaps blue by ~300 A
    dates = ["2026-03-15T01:00:00", "2026-03-15T01:15:00", "2026-03-15T01:30:00"]
    frames = []
    for i, date in enumerate(dates):                  # 3 exposures in the blue setup
        rate = 50.0 * np.ones(blue.n_pix) * 2.0 * 600  # 50 e/s/A over 2-A pixels, 600 s
        _write_exposure(spectra, f"f{i}", "TGT-1", "BLUE", blue,
                        rate + rng.normal(size=blue.n_pix) * 50, np.full(blue.n_pix, 2500.0),
                        date_obs=date)
        frames.append(f"f{i}")
    rate = 50.0 * np.ones(red.n_pix) * 2.5 * 600
    _write_exposure(spectra, "f9", "TGT-1", "RED", red, rate + rng.normal(size=red.n_pix) * 50,
                    np.full(red.n_pix, 2500.0), date_obs="2026-03-15T02:00:00")
    out = tmp_path / "combined"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        combine_spectra_file(spectra=[str(p) for p in sorted(spectra.iterdir())],
                             combined=str(out), site=SITE, options=OPTIONS)
    coadd = out / "TGT-1_BLUE.fits"
    spec = Spectrum.read(coadd)
    assert spec.flux.unit == u.Unit("electron / (s Angstrom)")
    header = fits.getheader(coadd)
    assert header["CTYPE1"] == "WAVE" and header["SPECSYS"] == "BARYCENT"
    assert header["NCOMBINE"] == 3 and header["INPKIND"] == "extracted"
    assert [header[f"INPUT{i:02d}"] for i in (1, 2, 3)] == [f"{f}.fits" for f in frames]
    product = read_combined(coadd)
    good = product.mask == 0
    assert np.median(product.flux[good]) == pytest.approx(50.0, rel=0.01)
    # S/N of the coadd of 3 equal exposures is sqrt(3) times one's
    single = read_combined(out / "TGT-1_BLUE" / "f0.fits")
    ratio = np.median(np.sqrt(single.variance[good] / product.variance[good]))
    assert ratio == pytest.approx(np.sqrt(3), rel=0.02)
    assert list(product.frames["frame"]) == frames
    spliced = read_combined(out / "TGT-1_spliced.fits")
    assert spliced.header["SPLSCALE"] == pytest.approx(1.0, abs=0.01)
    assert spliced.header["SPLSAPP"] is True
    assert spliced.grid.centres_angstrom()[0] < 4010 and spliced.grid.centres_angstrom()[-1] > 7000


def test_air_output_and_topocentric_frame_write_awav_and_no_shift(tmp_path):
    grid = WavelengthGrid(5000.0, 2.0, 200)
    _write_exposure(tmp_path / "spectra", "g1", "TGT-2", "S", grid, np.full(200, 1000.0),
                    np.full(200, 100.0), date_obs="2026-03-15T01:00:00")
    options = dict(OPTIONS, vacuum_wavelengths=False, velocity_frame="topocentric")
    combine_spectra_file(spectra=[str(tmp_path / "spectra" / "g1")], combined=str(tmp_path / "c"),
                         site=SITE, options=options)
    header = fits.getheader(tmp_path / "c" / "TGT-2_S.fits")
    assert header["CTYPE1"] == "AWAV" and header["SPECSYS"] == "TOPOCENT"
    assert header["VCORAPP"] is False and abs(header["VBARY"]) > 0.01   # recorded, not applied
    assert header["CRVAL1"] == pytest.approx(5000.0, abs=1e-6)


def test_plan_prefers_fluxed_spectra_only_when_every_frame_has_one():
    entries = [dict(frame=f, object="T", setup="S", extracted=f"{f}.fits", fluxed=f"F{f}.fits",
                    fluxed_status="calibrated") for f in ("a", "b")]
    (plan,) = plan_groups(entries)
    assert plan.input_kind == "fluxed" and plan.paths == ("Fa.fits", "Fb.fits")
    entries[1]["fluxed_status"] = "uncalibrated"
    (plan,) = plan_groups(entries)
    assert plan.input_kind == "extracted" and "(b)" in plan.reason
