"""The 1-D product (pipeline/core/spectra.py) and the extraction adapter writing it.

Truth used here:
* specutils (``Spectrum.read`` with no format argument) and astropy.wcs, which
  read the files independently of the writer;
* demo-simulator truth for the flux in the products written by the adapter
  from FITS files on disk.
"""

import warnings

import numpy as np
import pytest
from astropy import units as u
from astropy.io import fits
from astropy.nddata import VarianceUncertainty
from astropy.table import Table

from pipeline.core.errors import InputFileError
from pipeline.core.frames import Frame, write_frame
from pipeline.core.maskbits import MaskBit
from pipeline.core.grid import WavelengthGrid
from pipeline.core.spectra import (REQUIRED_KEYWORDS, read_spectrum, sanitise_name,
                              spectrum_file_name, write_spectrum)

import specutils


def _write(path, grid, rng):
    n = grid.n_pix
    flux = rng.normal(1000.0, 30.0, n)
    var = rng.uniform(500.0, 1500.0, n)
    mask = np.zeros(n, np.uint8)
    mask[[3, 17]] = [MaskBit.COSMIC_RAY, MaskBit.NO_COVERAGE]
    header = fits.Header()
    header["OBJECT"] = "TRV-9"
    header["EXPTIME"] = 900.0
    write_spectrum(path, grid, header, flux=flux, variance=var, mask=mask,
                   boxcar_flux=flux * 1.01, boxcar_variance=var * 1.1, boxcar_mask=mask,
                   sky=np.full(n, 50.0), trace_px=np.full(n, 140.0))
    return flux, var, mask


@pytest.mark.parametrize("log", [False, True])
def test_specutils_round_trip(tmp_path, rng, log):
    grid = (WavelengthGrid(4089.72, 1.97, 1025) if not log
            else WavelengthGrid(4089.72, 1.97 / 5000.0, 1025, log=True))
    path = tmp_path / "TRV-9_target.fits"
    flux, var, mask = _write(path, grid, rng)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the reader must not need to guess anything
        spec = specutils.Spectrum.read(path)
    assert spec.flux.unit == u.electron
    np.testing.assert_allclose(spec.flux.value, flux.astype(np.float32))
    assert isinstance(spec.uncertainty, VarianceUncertainty)
    np.testing.assert_allclose(spec.uncertainty.array, var.astype(np.float32))
    assert spec.uncertainty.unit == u.electron ** 2
    np.testing.assert_array_equal(np.asarray(spec.mask), mask)
    np.testing.assert_allclose(spec.spectral_axis.to_value(u.AA), grid.centres_angstrom(),
                               rtol=1e-10)
    header = spec.meta["header"]
    assert header["CTYPE1"] == ("AWAV-LOG" if log else "AWAV")  # air wavelengths, Greisen 2006
    assert header["CUNIT1"] == "Angstrom"
    assert header["OBJECT"] == "TRV-9" and header["EXPTIME"] == 900.0
    box = read_spectrum(path, method="boxcar")
    np.testing.assert_allclose(box.values, (flux * 1.01).astype(np.float32))
    np.testing.assert_allclose(box.wave_angstrom, grid.centres_angstrom())
    np.testing.assert_allclose(box.variance, (var * 1.1).astype(np.float32))
    assert box.header["OBJECT"] == "TRV-9" and box.unit == "electron"
    # the one reader: the optimal extraction as specutils reads it (values, variance, mask)
    opt = read_spectrum(path)
    np.testing.assert_allclose(opt.values, spec.flux.value)
    np.testing.assert_allclose(opt.variance, spec.uncertainty.array)
    np.testing.assert_array_equal(opt.mask, np.asarray(spec.mask))
    np.testing.assert_allclose(opt.wave_angstrom, spec.spectral_axis.to_value(u.AA))
    # the boxcar sum through specutils too: its variance HDU carries the uncertainty class
    with fits.open(path) as hdul:
        assert [h.name for h in hdul][:6] == ["FLUX", "VAR", "MASK", "SUMFLUX", "SUMVAR",
                                                 "SUMMASK"]
        assert hdul["VAR"].header["UTYPE"] == hdul["SUMVAR"].header["UTYPE"] \
            == "VarianceUncertainty"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        spec_box = specutils.Spectrum.read(path, format="wcs1d-fits", hdu="SUMFLUX",
                                           uncertainty_hdu="SUMVAR", uncertainty_type="var",
                                           mask_hdu="SUMMASK")
    np.testing.assert_allclose(spec_box.uncertainty.array, (var * 1.1).astype(np.float32))


def test_missing_hdu_is_named(tmp_path, rng):
    grid = WavelengthGrid(5000.0, 2.0, 50)
    path = tmp_path / "x.fits"
    _write(path, grid, rng)
    with fits.open(path) as hdul:
        fits.HDUList([h for h in hdul if h.name != "SUMVAR"]).writeto(tmp_path / "y.fits")
    with pytest.raises(InputFileError, match="HDU SUMVAR missing"):
        read_spectrum(tmp_path / "y.fits", method="boxcar")


@pytest.mark.parametrize("raw, expected", [
    ("TRV-9", "TRV-9"),
    ("TRG 511/knot", "TRG_511_knot"),
    ("../../etc/passwd", "etc_passwd"),
    ("..", "unnamed"),
    ("", "unnamed"),
    ("a\x00b\nc\td", "a_b_c_d"),
    ("NGC\\1/2:3*?", "NGC_1_2_3"),
    (".hidden", "hidden"),
])
def test_sanitised_names(raw, expected):
    name = sanitise_name(raw)
    assert name == expected
    assert "/" not in name and "\\" not in name and not name.startswith(".")
    assert all(ch.isprintable() for ch in name)
    assert spectrum_file_name(raw, "other2") == f"{expected}_other2.fits"
    assert spectrum_file_name(raw, "target") == f"{expected}_target.fits"
    with pytest.raises(ValueError, match="label"):
        spectrum_file_name(raw, "ap1")


# ----------------------------------------------------------------- the rule's adapter on files
def _files(tmp_path, f, *, object_name):
    header = fits.Header()
    header["OBJECT"] = object_name
    for key in ("EXPTIME", "AIRMASS", "DATE-OBS", "RA", "DEC", "GRTILT", "CCDSUM", "FILTER"):
        header[key] = f["frame"].header[key]
    header["BINSPEC"], header["BINSPAT"] = 2, 2
    cal = write_frame(Frame(f["data"].astype(np.float32), f["variance"].astype(np.float32),
                            f["mask"], header), tmp_path / "calibrated" / "frame.fits")
    whdr = fits.Header()
    whdr["BUNIT"] = "Angstrom"
    wave = tmp_path / "wavelength" / "arc_solution.fits"
    wave.parent.mkdir(parents=True)
    fits.PrimaryHDU(f["wave0"], header=whdr).writeto(wave)
    return str(cal), str(wave)


def _outputs(tmp_path, frame_id):
    out = tmp_path / "out"
    return dict(rectified=str(out / "rectified" / f"{frame_id}.fits"),
                flexure_table=str(out / "qa" / f"{frame_id}_flexure.ecsv"),
                traces=str(out / "qa" / f"{frame_id}_traces.ecsv"),
                spectra=str(out / "spectra" / frame_id),
                qa_rectified=str(out / "qa" / f"{frame_id}_rectified.png"),
                qa_spectra=str(out / "qa" / f"{frame_id}_spectra.png"))


def test_adapter_writes_readable_products(tmp_path):
    from test_extract import _truth_on_grid
    from test_sky import simulated_frame

    from pipeline.extraction.steps import extract_frame_file

    f = simulated_frame("TRV-9", exptime_s=900.0, seed=61, flexure_x_px=0.2)
    cal, wave = _files(tmp_path, f, object_name="TRV 9/faint")
    outs = _outputs(tmp_path, "rls_9016")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        red = extract_frame_file(frame=cal, wavelength=wave, reference=[], frame_id="rls_9016",
                                 frame_type="science", setup="G600_t08.93_s1.2_2x2_NONE",
                                 spatial_scale_arcsec_per_px=0.2, **outs)
    listing = Table.read(outs["spectra"] + "/extraction.ecsv", format="ascii.ecsv")
    assert list(listing["file"]) == ["TRV_9_faint_target.fits"]
    assert list(listing["role"]) == ["target"] and list(listing["label"]) == ["target"]
    path = outs["spectra"] + "/TRV_9_faint_target.fits"
    spec = specutils.Spectrum.read(path)
    header = spec.meta["header"]
    for key in REQUIRED_KEYWORDS:
        assert key in header, key
    assert header["SETUP"] == "G600_t08.93_s1.2_2x2_NONE" and header["FRAMEID"] == "rls_9016"
    assert header["OBJECT"] == "TRV 9/faint"
    assert header["NOBJECTS"] == 1                           # simulator truth: one star
    assert header["INPUT01"] == "frame.fits" and header["CALIB01"] == "arc_solution.fits"
    assert header["PIPEVERS"] and header["CFGHASH"]
    assert header["FLEXPIX"] == pytest.approx(0.2, abs=0.03)  # simulator truth 0.2 px
    assert header["OBJPOSAS"] == pytest.approx((header["OBJPOSPX"] - 127.5) * 0.4, abs=1e-3)
    assert header["OBJROLE"] == "target" and header["OBJLABEL"] == "target"
    assert not [k for k in header if k.startswith("AP")]  # none of the old card family
    # the product's flux against simulator truth (electrons per spectral pixel)
    truth = _truth_on_grid(f["truth"], red.reduction.rectified.grid)
    good = (np.asarray(spec.mask) == 0) & np.isfinite(truth)
    good[:5] = good[-5:] = False
    ratio = np.sum(spec.flux.value[good]) / np.sum(truth[good])
    assert ratio == pytest.approx(1.0, abs=0.01)
    # rectified frame: WCS with AWAV x arcsec, sky and variance-model extensions
    with fits.open(outs["rectified"]) as hdul:
        names = [h.name for h in hdul]
        assert names[:3] == ["PRIMARY", "VAR", "MASK"]
        assert {"SKY", "SKYVAR", "BKGVAR", "SIGVARF", "SIGVARQ", "SKYREG"} <= set(names)
        assert hdul[0].header["CTYPE1"] == "AWAV" and hdul[0].header["CUNIT2"] == "arcsec"
    flex = Table.read(outs["flexure_table"], format="ascii.ecsv")
    assert flex.meta["shift_px"] == pytest.approx(header["FLEXPIX"], abs=1e-4)
    assert "shift_kms" in flex.colnames
    for png in (outs["qa_rectified"], outs["qa_spectra"]):
        with open(png, "rb") as fh:
            assert fh.read(8) == b"\x89PNG\r\n\x1a\n"


def test_adapter_rejects_a_wavelength_map_of_another_shape(tmp_path):
    from test_sky import simulated_frame

    from pipeline.extraction.steps import extract_frame_file

    f = simulated_frame("TRV-9", exptime_s=60.0, seed=62)
    cal, wave = _files(tmp_path, f, object_name="TRV-9")
    whdr = fits.Header()
    whdr["BUNIT"] = "Angstrom"
    fits.PrimaryHDU(f["wave0"][:, :500], header=whdr).writeto(wave, overwrite=True)
    with pytest.raises(InputFileError, match="wavelength map shape"):
        extract_frame_file(frame=cal, wavelength=wave, frame_id="x", frame_type="science",
                           setup="s", spatial_scale_arcsec_per_px=0.2, **_outputs(tmp_path, "x"))
