"""Frames that hold no data: constant (all zero, or one value everywhere), saturated or non-finite almost everywhere.

A readout that failed, a shutter that never opened onto a lamp that was too bright, or a
file whose pixels were lost in transfer gives a frame whose headers look right but whose
pixels are not data. Calibrating it would give a traceback deep in a fit, or worse, a
product. :func:`pixel_statistics` sums up a frame (or a block of it; statistics add up)
and :func:`pixel_problem` says in words what is wrong, or ``''``.
"""

from dataclasses import dataclass

import numpy as np

__all__ = ["PixelStatistics", "pixel_statistics", "pixel_problem",
           "MAX_NONFINITE_FRACTION", "MAX_SATURATED_FRACTION"]

#: frames with more than this fraction of NaN/inf pixels are not data (common practice:
#: a real frame has a few bad columns at most)
MAX_NONFINITE_FRACTION = 0.5
#: frames with more than this fraction of saturated pixels are not data (the default of
#: inventory.max_saturated_fraction, which screens a sample of rows at inventory)
MAX_SATURATED_FRACTION = 0.5


@dataclass(frozen=True)
class PixelStatistics:
    """Counts and extremes of a frame's pixels (add two with ``+``).

    Attributes
    ----------
    n : int
        Pixels looked at.
    n_nonfinite, n_saturated : int
    min_value, max_value : float
        Over the finite pixels (``inf``/``-inf`` when there is none).
    """

    n: int
    n_nonfinite: int
    n_saturated: int
    min_value: float
    max_value: float

    def __add__(self, other):
        return PixelStatistics(self.n + other.n, self.n_nonfinite + other.n_nonfinite,
                               self.n_saturated + other.n_saturated,
                               min(self.min_value, other.min_value),
                               max(self.max_value, other.max_value))


def pixel_statistics(values, *, saturation=None):
    """:class:`PixelStatistics` of an array (any shape).

    ``saturation``: values at or above it count as saturated (None: none do). NaN counts
    as non-finite. Costs two reductions (minimum, maximum) for a frame without NaN or
    inf, one more with ``saturation``: cheap enough to run on every block of a stack.

    >>> s = pixel_statistics(np.array([[0.0, 5.0], [np.nan, 70000.0]]), saturation=65000)
    >>> s.n, s.n_nonfinite, s.n_saturated, s.min_value, s.max_value
    (4, 1, 1, 0.0, 70000.0)
    """
    a = np.asarray(values)
    if a.size == 0:
        return PixelStatistics(0, 0, 0, np.inf, -np.inf)
    vmin, vmax = float(a.min()), float(a.max())          # NaN or inf show up here
    n_nonfinite = 0
    if not (np.isfinite(vmin) and np.isfinite(vmax)):
        finite = np.isfinite(a)
        n_finite = int(np.count_nonzero(finite))
        n_nonfinite = int(a.size - n_finite)
        if n_finite:
            good = a[finite]
            vmin, vmax = float(good.min()), float(good.max())
        else:
            vmin, vmax = np.inf, -np.inf
    n_sat = 0 if saturation is None else int(np.count_nonzero(a >= saturation))
    return PixelStatistics(int(a.size), n_nonfinite, n_sat, vmin, vmax)


def pixel_problem(stats, *, what="frame"):
    """Why a frame with these statistics holds no data, in words; ``''`` when it does.

    >>> pixel_problem(PixelStatistics(100, 0, 0, 0.0, 0.0))
    'every pixel of the frame is 0 (a failed readout)'
    >>> pixel_problem(PixelStatistics(100, 0, 0, 3.0, 900.0))
    ''
    """
    if stats.n == 0:
        return f"the {what} has no pixel"
    if stats.n_nonfinite > MAX_NONFINITE_FRACTION * stats.n:
        return (f"{100 * stats.n_nonfinite / stats.n:.0f}% of the pixels of the {what} are NaN "
                "or infinite (pixels lost in transfer or a failed readout)")
    if stats.n_nonfinite == 0 and stats.min_value == stats.max_value == 0:
        return f"every pixel of the {what} is 0 (a failed readout)"
    if stats.n_saturated > MAX_SATURATED_FRACTION * stats.n:
        return (f"{100 * stats.n_saturated / stats.n:.1f}% of the pixels of the {what} are "
                "saturated (overexposed)")
    if stats.max_value == stats.min_value:
        return f"every finite pixel of the {what} equals {stats.min_value:g} (no signal, no noise)"
    return ""
