"""Defaults of the CCD config sections (the same values as config/schema.yaml; a test checks)."""

from pipeline.core.checks import merge_options

__all__ = ["OVERSCAN_DEFAULTS", "BIAS_DEFAULTS", "FLAT_DEFAULTS", "CALIBRATION_DEFAULTS",
           "overscan_kwargs"]

#: Defaults of the config sections (the same values as config/schema.yaml).
OVERSCAN_DEFAULTS = {"method": "per_row", "polynomial_order": 3, "smooth_window_rows": 101,
                     "row_statistic": "clipped_mean", "clip_sigma": 3.0}
BIAS_DEFAULTS = {"clip_sigma": 3.0, "clip_iterations": 5, "block_rows": 128,
                 "read_noise_tolerance": 0.2, "max_read_noise_pairs": 3}
FLAT_DEFAULTS = {"clip_sigma": 3.0, "clip_iterations": 5, "block_rows": 128,
                 "lamp_knot_spacing_px": 40.0, "keep_slit_illumination": False,
                 "illumination_bin_px": 64, "illumination_knot_spacing_px": 5.0,
                 "min_slit_illumination": 0.3, "min_flat_snr": 20.0,
                 "min_response": 0.5, "max_response": 1.5, "deviant_sigma": 6.0,
                 "gain_tile_px": 32, "gain_tolerance": 0.2, "bad_pixel_sections": []}
CALIBRATION_DEFAULTS = {"use_measured_gain": True, "use_measured_read_noise": True,
                        "include_flat_error": True,
                        "cosmic_rays": {"enabled": True, "detection_limit_sigma": 4.5,
                                        "neighbour_fraction": 0.3, "contrast_limit": 5.0,
                                        "passes": 1}}


def overscan_kwargs(overscan):
    """Keyword options of :func:`pipeline.ccd.overscan.fit_overscan` from the ``overscan`` section."""
    o = merge_options(overscan, OVERSCAN_DEFAULTS, "overscan")
    return {"method": o["method"], "polynomial_order": o["polynomial_order"],
            "smooth_window_rows": o["smooth_window_rows"], "row_statistic": o["row_statistic"],
            "clip_sigma": o["clip_sigma"]}

