"""The bit mask carried by every pixel from the raw frame to the final spectrum.

This is the one place where mask bits are defined. A pixel is good when its
mask value is 0; each set bit records one reason why it should not be trusted.
Masks are stored as uint8 in FITS (extension ``MASK``).

==== ================= =====================================================
bit  name              meaning
==== ================= =====================================================
1    BAD_PIXEL         detector defect: dead/hot column, deviant flat response
2    SATURATED         raw value at or above the saturation level
4    COSMIC_RAY        flagged by the Laplacian cosmic-ray detector
8    UNILLUMINATED     outside the slit or with too little flat-lamp light
16   NO_COVERAGE       no detector pixel contributes (rectification edges)
32   NONFINITE         value or variance not finite in an input
64   SKY_OUTLIER       rejected while fitting the sky model
128  EXTRACTION_OUTLIER rejected while fitting the spatial profile
==== ================= =====================================================
"""

from enum import IntFlag

import numpy as np

__all__ = ["MaskBit", "MASK_DTYPE", "empty_mask", "describe"]

MASK_DTYPE = np.uint8


class MaskBit(IntFlag):
    """Reasons a pixel is not to be trusted (combine with ``|``)."""

    BAD_PIXEL = 1
    SATURATED = 2
    COSMIC_RAY = 4
    UNILLUMINATED = 8
    NO_COVERAGE = 16
    NONFINITE = 32
    SKY_OUTLIER = 64
    EXTRACTION_OUTLIER = 128


def empty_mask(shape):
    """Return an all-good mask of the given shape."""
    return np.zeros(shape, dtype=MASK_DTYPE)


def describe(value):
    """List the names of the bits set in one mask value.

    >>> describe(MaskBit.SATURATED | MaskBit.COSMIC_RAY)
    ['SATURATED', 'COSMIC_RAY']
    """
    value = int(value)
    return [bit.name for bit in MaskBit if value & bit]


def header_cards():
    """FITS cards documenting the mask bits, for the MASK extension header."""
    return [(f"MASKB{int(bit).bit_length() - 1}", bit.name, f"mask value {int(bit)}")
            for bit in MaskBit]
