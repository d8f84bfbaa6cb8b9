"""Spectral pixels and wavelength regions: pixel edges, [min, max] regions, masks.

Small pure helpers shared by every flux-calibration module: the edges (and so the
widths ``Delta lambda``) of pixels whose centres are known, the wavelength regions
left out of a fit, and the bit mask of a 1-D spectrum.
"""

import math

import numpy as np

from pipeline.core import maskbits
from pipeline.core.checks import as_1d_float, same_shape
from pipeline.core.maskbits import MaskBit

__all__ = ["pixel_edges", "as_regions", "exclusion_mask", "as_mask", "MAG_PER_REL"]

#: 2.5 / ln(10): magnitudes per unit relative error.
MAG_PER_REL = 2.5 / math.log(10.0)


def pixel_edges(wave_angstrom):
    """Edges of the pixels whose centres are ``wave_angstrom``.

    Parameters
    ----------
    wave_angstrom : array_like, shape (n,), Angstrom
        Strictly increasing pixel centres, n >= 2.

    Returns
    -------
    ndarray, shape (n + 1,), Angstrom
        Midpoints between neighbouring centres; the outer edges lie half a
        neighbouring interval beyond the end centres. For a linear or smoothly
        varying dispersion the widths ``np.diff(edges)`` are the pixels'
        widths ``Delta lambda``.

    Examples
    --------
    >>> pixel_edges([10.0, 12.0, 14.0])
    array([ 9., 11., 13., 15.])
    """
    wave = as_1d_float(wave_angstrom, "wave_angstrom")
    if wave.size < 2:
        raise ValueError(f"`wave_angstrom` needs at least 2 pixels, got {wave.size}")
    if not np.all(np.isfinite(wave)) or np.any(np.diff(wave) <= 0):
        raise ValueError("`wave_angstrom` must be finite and strictly increasing")
    mid = 0.5 * (wave[1:] + wave[:-1])
    first = wave[0] - 0.5 * (wave[1] - wave[0])
    last = wave[-1] + 0.5 * (wave[-1] - wave[-2])
    return np.concatenate([[first], mid, [last]])


def as_regions(regions, name="exclude_regions"):
    """``[min, max]`` wavelength regions (Angstrom) as a list of float pairs.

    Items may be pairs or mappings with ``min_angstrom`` and ``max_angstrom``.

    >>> as_regions([[4840, 4880.5]])
    [(4840.0, 4880.5)]
    """
    out = []
    for item in regions or ():
        if isinstance(item, dict):
            lo, hi = item.get("min_angstrom"), item.get("max_angstrom")
        else:
            lo, hi = item[0], item[1]
        lo, hi = float(lo), float(hi)
        if not (math.isfinite(lo) and math.isfinite(hi) and hi > lo):
            raise ValueError(f"`{name}` items must be [min, max] with max > min (Angstrom), "
                             f"got {item!r}")
        out.append((lo, hi))
    return out


def exclusion_mask(wave_angstrom, regions):
    """True where a wavelength lies inside any of the ``[min, max]`` regions (Angstrom).

    >>> exclusion_mask([4850.0, 4900.0], [[4840.0, 4880.0]])
    array([ True, False])
    """
    wave = np.asarray(wave_angstrom, dtype=float)
    out = np.zeros(wave.shape, dtype=bool)
    for lo, hi in as_regions(regions):
        out |= (wave >= lo) & (wave <= hi)
    return out


def as_mask(mask, reference, name="mask"):
    """A uint8 bit mask of the shape of ``reference``; None is all good, True is BAD_PIXEL.

    >>> as_mask([True, False], np.zeros(2))
    array([1, 0], dtype=uint8)
    """
    if mask is None:
        return maskbits.empty_mask(np.shape(reference))
    arr = np.asarray(mask)
    if arr.dtype == bool:
        arr = np.where(arr, MaskBit.BAD_PIXEL, 0)
    arr = arr.astype(maskbits.MASK_DTYPE)
    same_shape([reference, arr], ["wave_angstrom", name])
    return arr
