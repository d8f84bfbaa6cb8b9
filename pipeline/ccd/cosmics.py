"""Cosmic rays: the Laplacian edge detection of van Dokkum (2001, PASP 113, 1420), through astroscrappy."""

import numpy as np

from pipeline.core.checks import as_2d, positive

__all__ = ["find_cosmic_rays"]

#: mirror padding (px) around a frame for the cosmic-ray search
_CR_PAD = 6


def find_cosmic_rays(data_e, *, read_noise_e, mask=None, sigclip=4.5, sigfrac=0.3,
                     objlim=5.0, niter=2):
    """Flag cosmic-ray hits by the Laplacian method (van Dokkum 2001, PASP 113, 1420).

    Uses astroscrappy's implementation of L.A.Cosmic.

    Parameters
    ----------
    data_e : ndarray, shape (ny, nx), electron
        Bias-subtracted frame (sky not subtracted).
    read_noise_e : float, electron
    mask : ndarray of bool, shape (ny, nx), optional
        Pixels to ignore (bad, saturated).
    sigclip, sigfrac, objlim : float
        Detection limit (in sigma), neighbour limit (fraction of sigclip) and
        the contrast limit between the Laplacian and the fine structure
        (van Dokkum 2001, section 3).
    niter : int
        Detection iterations.

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
        padded, inmask=inmask, gain=1.0, readnoise=rn, satlevel=np.inf, sigclip=sigclip,
        sigfrac=sigfrac, objlim=objlim, niter=int(niter), sepmed=True, cleantype="meanmask",
        fsmode="median", verbose=False)
    flags = np.asarray(flags, dtype=bool)
    return flags[pad:flags.shape[0] - pad, pad:flags.shape[1] - pad] if pad else flags

