"""Frame container and its FITS layout, checked with astropy's own readers."""

import numpy as np
import pytest
from astropy.io import fits
from astropy.nddata import CCDData, VarianceUncertainty
from numpy.testing import assert_array_equal

from pipeline.core import maskbits
from pipeline.core import provenance
from pipeline.core.errors import InputFileError
from pipeline.core.frames import Frame, read_frame, write_frame


def _frame(rng, shape=(6, 9)):
    data = rng.normal(100.0, 5.0, shape).astype(np.float32)
    variance = np.full(shape, 25.0, dtype=np.float32)
    mask = np.zeros(shape, dtype=np.uint8)
    mask[2, 3] = maskbits.MaskBit.COSMIC_RAY | maskbits.MaskBit.SATURATED
    header = fits.Header({"OBJECT": "TFG-42", "EXPTIME": 600.0})
    return Frame(data, variance, mask, header)


def test_round_trip_keeps_values_bits_and_header(tmp_path, rng):
    frame = _frame(rng)
    path = write_frame(frame, tmp_path / "f.fits")
    back = read_frame(path)
    assert_array_equal(back.data, frame.data)
    assert_array_equal(back.variance, frame.variance)
    assert_array_equal(back.mask, frame.mask)
    assert back.header["OBJECT"] == "TFG-42"
    assert back.unit == "electron"


def test_astropy_ccddata_reads_the_layout(tmp_path, rng):
    # astropy's CCDData reader is the independent check of the layout's conventions.
    frame = _frame(rng)
    path = write_frame(frame, tmp_path / "f.fits")
    ccd = CCDData.read(path, hdu_uncertainty="VAR")   # the name of our variance extensions
    assert ccd.unit.to_string() == "electron"
    assert isinstance(ccd.uncertainty, VarianceUncertainty)
    assert_array_equal(ccd.uncertainty.array, frame.variance)
    assert_array_equal(ccd.mask, frame.mask != 0)


def test_checksums_are_written_and_verify(tmp_path, rng):
    path = write_frame(_frame(rng), tmp_path / "f.fits")
    with fits.open(path, checksum=True) as hdul:
        for hdu in hdul:
            assert "CHECKSUM" in hdu.header and "DATASUM" in hdu.header
            assert hdu.verify_checksum() == 1
            assert hdu.verify_datasum() == 1


def test_write_does_not_change_the_frame(tmp_path, rng):
    frame = _frame(rng)
    before = frame.header.copy()
    write_frame(frame, tmp_path / "f.fits")
    assert list(frame.header.items()) == list(before.items())


def test_shape_mismatch_raises_naming_the_array():
    with pytest.raises(ValueError, match="`variance` must have the shape"):
        Frame(np.zeros((3, 4)), np.zeros((4, 3)), np.zeros((3, 4), np.uint8))
    with pytest.raises(ValueError, match="must be 2-D"):
        Frame(np.zeros(4), np.zeros(4), np.zeros(4, np.uint8))


def test_read_non_frame_names_file_and_extension(tmp_path):
    path = tmp_path / "plain.fits"
    fits.PrimaryHDU(np.zeros((3, 3))).writeto(path)
    with pytest.raises(InputFileError, match=r"plain\.fits: extension VAR missing"):
        read_frame(path)
    junk = tmp_path / "junk.fits"
    junk.write_bytes(b"not a fits file at all")
    with pytest.raises(InputFileError, match="junk.fits"):
        read_frame(junk)


def test_mask_bits_are_distinct_powers_of_two_and_fit_uint8():
    values = [int(b) for b in maskbits.MaskBit]
    assert len(set(values)) == len(values)
    assert all(v & (v - 1) == 0 for v in values)
    assert max(values) <= np.iinfo(maskbits.MASK_DTYPE).max
    assert maskbits.describe(6) == ["SATURATED", "COSMIC_RAY"]


def test_provenance_stamp_records_inputs_and_digest():
    provenance.set_step_context("unit_test", {"sigma": 3.0})
    header = provenance.stamp(fits.Header(), inputs=["/raw/a.fits", "/raw/b.fits"],
                              calibrations=["master_bias_2x2.fits"])
    assert header["INPUT01"] == "a.fits" and header["INPUT02"] == "b.fits"
    assert header["CALIB01"] == "master_bias_2x2.fits"
    assert header["PIPESTEP"] == "unit_test"
    assert header["CFGHASH"] == provenance.params_digest({"sigma": 3.0})
    assert provenance.params_digest({"sigma": 3.0}) != provenance.params_digest({"sigma": 3.5})
    # stamping again with fewer inputs leaves no stale INPUTnn behind
    provenance.stamp(header, inputs=["c.fits"])
    assert header["INPUT01"] == "c.fits" and "INPUT02" not in header
