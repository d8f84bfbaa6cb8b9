"""Tests of pipeline.core.headers: sections, binning, typed look-ups, header-only reading.

Truths: the FITS section convention (1-based inclusive, FITS axis 1 first; FITS
standard 4.0, section 3.3.2 on array order, from memory) checked against numpy
indexing of arrays written here; astropy.time for MJD; files written here with
astropy.io.fits.
"""

import gzip
import math

import numpy as np
import pytest
from astropy.io import fits
from astropy.time import Time

from pipeline.core import headers as hdr
from pipeline.core.errors import InputFileError


def test_parse_section_and_slices():
    s = hdr.parse_section("[3:10, 2:5]")
    assert (s.x1, s.x2, s.y1, s.y2) == (3, 10, 2, 5)
    assert s.shape == (4, 8) and str(s) == "[3:10,2:5]"
    a = np.arange(60).reshape(6, 10)          # numpy (row = FITS y, column = FITS x)
    # 1-based inclusive: FITS pixel (x=3, y=2) is a[1, 2]
    assert a[s.slices][0, 0] == a[1, 2] and a[s.slices].shape == s.shape
    assert s.fits_in((6, 10)) and not s.fits_in((4, 10))
    for bad in ("3:10,2:5", "[10:3,1:2]", "[0:4,1:2]", "[a:b,1:2]", None):
        with pytest.raises(ValueError, match="DATASEC"):
            hdr.parse_section(bad, name="DATASEC")


def test_parse_binning():
    assert hdr.parse_binning("2 2") == (2, 2)
    assert hdr.parse_binning("1x2") == (1, 2)
    assert hdr.parse_binning(" 3,1 ") == (3, 1)
    assert hdr.parse_binning(4) == (4, 4)
    with pytest.raises(ValueError, match="CCDSUM"):
        hdr.parse_binning("two by two", name="CCDSUM")
    with pytest.raises(ValueError):
        hdr.parse_binning("0 2")


def test_typed_lookups():
    h = fits.Header({"EXPTIME": 12.5, "BAD": "soon", "EMPTY": "  ", "GAIN": 1.8,
                     "DATASEC": "[1:20,1:30]"})
    assert hdr.header_float(h, "EXPTIME", path="f.fits") == 12.5
    with pytest.raises(InputFileError, match=r"f.fits: keyword AIRMASS missing; expected a number"):
        hdr.header_float(h, "AIRMASS", path="f.fits")
    with pytest.raises(InputFileError, match="BAD = 'soon'; expected a number"):
        hdr.header_float(h, "BAD", path="f.fits")
    assert hdr.header_float(h, "AIRMASS", path="f.fits", default=1.0) == 1.0
    with pytest.raises(InputFileError, match="EMPTY missing"):
        hdr.header_str(h, "EMPTY", path="f.fits")
    # keyword wins over the configured value; value used when the keyword is absent
    assert hdr.keyword_or_value(h, {"keyword": "GAIN", "value": 2.0}) == 1.8
    assert hdr.keyword_or_value(h, {"keyword": "EGAIN", "value": 2.0}) == 2.0
    with pytest.raises(InputFileError, match="gain_e_per_adu: keyword EGAIN missing"):
        hdr.keyword_or_value(h, {"keyword": "EGAIN", "value": None}, name="gain_e_per_adu")
    sec = hdr.section_from_header(h, {"keyword": "DATASEC", "value": None}, name="data")
    assert sec.shape == (30, 20)
    sec = hdr.section_from_header(h, {"keyword": "TRIMSEC", "value": "[2:3,4:5]"}, name="data")
    assert str(sec) == "[2:3,4:5]"
    h["BIASSEC"] = "[21:24]"
    with pytest.raises(InputFileError, match="keyword BIASSEC"):
        hdr.section_from_header(h, {"keyword": "BIASSEC"}, name="overscan")


def test_date_obs_to_mjd():
    # truth: astropy.time
    assert hdr.date_obs_to_mjd("2026-03-14T23:45:00") == pytest.approx(
        Time("2026-03-14T23:45:00", scale="utc").mjd, abs=1e-9)
    assert hdr.date_obs_to_mjd("2026-03-14", time_text="06:00:00") == pytest.approx(
        Time("2026-03-14T06:00:00", scale="utc").mjd, abs=1e-9)
    with pytest.raises(InputFileError, match="DATE-OBS = 'yesterday'"):
        hdr.date_obs_to_mjd("yesterday", path="x.fits")


def test_read_raw_header_merges_primary_and_extension(tmp_path):
    primary = fits.PrimaryHDU()
    primary.header["IMAGETYP"] = "FLAT"
    primary.header["OBJECT"] = "from primary"
    ext = fits.ImageHDU(np.zeros((30, 20), np.uint16), name="SCI")
    ext.header["OBJECT"] = "from extension"
    path = tmp_path / "mef.fits"
    fits.HDUList([primary, ext]).writeto(path)
    h = hdr.read_raw_header(path, extension="SCI")
    assert h["IMAGETYP"] == "FLAT" and h["OBJECT"] == "from extension"
    assert hdr.raw_shape(h) == (30, 20)
    assert hdr.raw_shape(hdr.read_raw_header(path, extension=1)) == (30, 20)
    with pytest.raises(InputFileError, match="HDU 'RAW' missing"):
        hdr.read_raw_header(path, extension="RAW")
    with pytest.raises(InputFileError, match="NAXIS = 0; expected a 2-D image"):
        hdr.read_raw_header(path, extension=0)


def test_truncated_and_gzip(tmp_path):
    path = tmp_path / "frame.fits"
    fits.PrimaryHDU(np.ones((100, 50), np.float32)).writeto(path)
    raw = path.read_bytes()
    assert hdr.raw_shape(hdr.read_raw_header(path)) == (100, 50)
    gz = tmp_path / "frame.fits.gz"
    gz.write_bytes(gzip.compress(raw))
    assert hdr.raw_shape(hdr.read_raw_header(gz)) == (100, 50)
    short = tmp_path / "short.fits"
    short.write_bytes(raw[: 2880 + 1000])         # header complete, data cut
    with pytest.raises(InputFileError, match="truncated") as err:
        hdr.read_raw_header(short)
    assert err.value.header["NAXIS1"] == 50       # the header read is kept for the log
    # header-only reading does not notice the missing data unless asked to
    assert hdr.raw_shape(hdr.read_raw_header(short, check_size=False)) == (100, 50)
    junk = tmp_path / "junk.fits"
    junk.write_bytes(b"\x00\x01 not a fits file" * 300)
    with pytest.raises(InputFileError, match="not a readable FITS file"):
        hdr.read_raw_header(junk)
    assert not math.isnan(hdr.date_obs_to_mjd("2026-01-01T00:00:00"))
