"""Cosmic rays: the Laplacian edge detection of van Dokkum (2001, PASP 113, 1420), through astroscrappy."""

import numpy as np

from pipeline.core.checks import as_2d, positive

__all__ = ["find_cosmic_rays"]

#: mirror padding (px) around a frame for the cosmic-ray search
_CR_PAD = 6


def find_cosmic_rays(data_e, *, read_noise_e, mask=None, detection_limit_sigma=4.5,
                     neighbour_fraction=0.3, contrast_limit=5.0, passes=1):
    """Flag cosmic-ray hits by the Laplacian method (van Dokkum 2001, PASP 113, 1420).

    Uses astroscrappy's implementation of the method; our option names map to its
    arguments here only (``detection_limit_sigma`` -> ``sigclip``, ``neighbour_fraction``
    -> ``sigfrac``, ``contrast_limit`` -> ``objlim``, ``passes`` -> ``niter``).

    Parameters
    ----------
    data_e : ndarray, shape (ny, nx), electron
        Bias-subtracted frame (sky not subtracted).
    read_noise_e : float, electron
    mask : ndarray of bool, shape (ny, nx), optional
        Pixels to ignore (bad, saturated).
    detection_limit_sigma : float
        Detection limit of the Laplacian, in sigma of the noise.
    neighbour_fraction : float
        Limit for pixels beside a detection, as a fraction of ``detection_limit_sigma``.
    contrast_limit : float
        Minimum contrast between the Laplacian and the fine-structure image (van Dokkum
        2001, section 3): protects sharp but resolved features (stars, lines).
    passes : int
        Detection passes; each finds hits beside those already found.

    Returns
    -------
    ndarray of bool, shape (ny, nx)
        True at cosmic-ray pixels.
    """
    import astroscrappy

    data = as_2d(data_e, "data_e", dtype=np.float32)
    rn = positive(read_noise_e, "read_noise_e")
    # Hits within a few pixels of the frame edge are missed by the filters' edge handling:
    # detect on a mirror-padded copy (measured on simulated frames: recall 94-97% -> 98-100%).
    pad = min(_CR_PAD, *(n - 1 for n in data.shape))
    padded = np.ascontiguousarray(np.pad(data, pad, mode="reflect"))
    inmask = None
    if mask is not None:
        inmask = np.ascontiguousarray(np.pad(np.asarray(mask, bool), pad, mode="reflect"))
    flags, _ = astroscrappy.detect_cosmics(
        padded, inmask=inmask, gain=1.0, readnoise=rn, satlevel=np.inf,
        sigclip=float(detection_limit_sigma), sigfrac=float(neighbour_fraction),
        objlim=float(contrast_limit), niter=int(passes), sepmed=True, cleantype="meanmask",
        fsmode="median", verbose=False)
    flags = np.asarray(flags, dtype=bool)
    return flags[pad:flags.shape[0] - pad, pad:flags.shape[1] - pad] if pad else flags

