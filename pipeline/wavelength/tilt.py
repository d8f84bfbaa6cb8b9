"""2-D solution: identified lines traced along the slit and the line tilt ``Q(x, y)``.

Each identified line is traced along the slit (vectorised Gaussian fits in bands of
rows, started from a cross-correlation shift per band), and the line tilt and
curvature are fitted as a polynomial ``Q(x, y)`` so that
``lambda(x, y) = lambda_1D(x + Q(x, y))`` over the whole detector
(:class:`WavelengthSolution2D`, whose :meth:`~WavelengthSolution2D.wavelength_map` is
the dense product).
"""

import math
from dataclasses import dataclass, field
from functools import partial

import numpy as np
from astropy.stats import sigma_clip

from pipeline.core import maskbits
from pipeline.core.errors import WavelengthSolutionError
from pipeline.wavelength.arclines import measure_lines, sum_rows
from pipeline.wavelength.fit1d import WavelengthSolution1D

__all__ = ["LineTraces", "WavelengthSolution2D", "trace_lines", "fit_line_tilt",
           "predicted_positions"]


@dataclass(frozen=True)
class LineTraces:
    """Positions of identified lines measured in bands of rows.

    Attributes
    ----------
    wave_angstrom : ndarray, shape (n_lines,)
    x_ref_px : ndarray, shape (n_lines,)
        Position on the reference row (from the 1-D measurement).
    y_px : ndarray, shape (n_bands,)
        Mean row of each band.
    x_px, x_err_px : ndarray, shape (n_bands, n_lines)
        Measured centroids and uncertainties (nan where not measured).
    ok : ndarray of bool, shape (n_bands, n_lines)
    info : dict
    """

    wave_angstrom: np.ndarray
    x_ref_px: np.ndarray
    y_px: np.ndarray
    x_px: np.ndarray
    x_err_px: np.ndarray
    ok: np.ndarray
    info: dict = field(default_factory=dict)


@dataclass(frozen=True)
class WavelengthSolution2D:
    """``lambda(x, y) = lambda_1D(x + Q(x, y))`` over the detector.

    ``Q(x, y) = sum_{i<=deg_x, 1<=j<=deg_y} q_ij xn^i yn^j`` with
    ``xn = (x - x_ref) / x_scale`` and ``yn = (y - y_ref) / y_scale``; ``Q = 0``
    on the reference row.

    Attributes
    ----------
    solution_1d : WavelengthSolution1D
    q_coeffs : ndarray, shape (deg_x + 1, deg_y), px
        ``q_coeffs[i, j - 1]`` multiplies ``xn^i yn^j``.
    x_ref, x_scale, y_ref, y_scale : float, px
    shape : (int, int)
        ``(ny, nx)`` of the frame.
    traces : LineTraces
    used : ndarray of bool, shape (n_bands, n_lines)
        Traced points kept by the 2-D fit.
    residual_px : ndarray, shape (n_bands, n_lines)
        Measured minus model position (px), nan where not measured.
    rms_px, rms_angstrom : float
    info : dict
    """

    solution_1d: WavelengthSolution1D
    q_coeffs: np.ndarray
    x_ref: float
    x_scale: float
    y_ref: float
    y_scale: float
    shape: tuple
    traces: LineTraces
    used: np.ndarray
    residual_px: np.ndarray
    rms_px: float
    rms_angstrom: float
    info: dict = field(default_factory=dict)

    def shift(self, x_px, y_px):
        """``Q(x, y)`` in pixels."""
        xn = (np.asarray(x_px, dtype=float) - self.x_ref) / self.x_scale
        yn = (np.asarray(y_px, dtype=float) - self.y_ref) / self.y_scale
        return _q_eval(self.q_coeffs, xn, yn)

    def wavelength(self, x_px, y_px):
        """Air wavelength (Angstrom) at detector position(s) ``(x_px, y_px)``."""
        x = np.asarray(x_px, dtype=float)
        return self.solution_1d.wavelength(x + self.shift(x, y_px))

    def wavelength_map(self):
        """Dense map ``lambda(y, x)`` at every pixel centre, shape ``(ny, nx)``, float64.

        The 1-D solution is tabulated every 1/8 pixel and interpolated linearly
        (interpolation error below 1e-6 A for smooth dispersion).
        """
        ny, nx = self.shape
        x = np.arange(nx, dtype=float)
        xn = (x - self.x_ref) / self.x_scale
        yn = (np.arange(ny, dtype=float) - self.y_ref) / self.y_scale
        powers_x = np.vander(xn, self.q_coeffs.shape[0], increasing=True)    # (nx, dx+1)
        per_j = powers_x @ self.q_coeffs                                       # (nx, dy)
        powers_y = np.vander(yn, self.q_coeffs.shape[1] + 1, increasing=True)[:, 1:]  # (ny, dy)
        shift = powers_y @ per_j.T                                             # (ny, nx)
        lo = min(-1.0, float(np.min(shift)) - 1.0)
        hi = nx - 1 + max(1.0, float(np.max(shift)) + 1.0)
        grid = np.arange(math.floor(lo), math.ceil(hi) + 0.125, 0.125)
        table = self.solution_1d.wavelength(grid)
        return np.interp(shift + x[None, :], grid, table)



def _q_eval(coeffs, xn, yn):
    xn, yn = np.broadcast_arrays(np.asarray(xn, dtype=float), np.asarray(yn, dtype=float))
    total = np.zeros(xn.shape)
    for i in range(coeffs.shape[0]):
        for j in range(1, coeffs.shape[1] + 1):
            total = total + coeffs[i, j - 1] * xn ** i * yn ** j
    return total



def _xcorr_shift(a, b, max_shift_px):
    """Shift (px) of each row of ``a`` relative to the same row of ``b`` (cross-correlation
    peak with a parabolic refinement), searched within ``+-max_shift_px``."""
    nb, nx = a.shape
    n = 1 << int(math.ceil(math.log2(2 * nx)))
    fa = np.fft.rfft(a, n, axis=1)
    fb = np.fft.rfft(b, n, axis=1)
    cc = np.fft.irfft(fa * np.conj(fb), n, axis=1)
    lags = np.r_[np.arange(0, n // 2), np.arange(-n // 2, 0)]
    sel = np.flatnonzero(np.abs(lags) <= int(math.ceil(max_shift_px)) + 1)
    sel = sel[np.argsort(lags[sel])]
    sub = cc[:, sel]
    k = np.clip(np.argmax(sub, axis=1), 1, sel.size - 2)
    rows = np.arange(nb)
    y0, y1, y2 = sub[rows, k - 1], sub[rows, k], sub[rows, k + 1]
    den = y0 - 2 * y1 + y2
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.where(den < 0, 0.5 * (y0 - y2) / den, 0.0)
    return lags[sel][k] + np.clip(frac, -0.5, 0.5)


def _band_shifts(spectra, ref_index, max_step_px=2.0, min_signal_fraction=0.05):
    """Shift (px) of each band relative to band ``ref_index``.

    Each band is cross-correlated with its neighbour towards the reference band
    and the steps are summed outwards, so lines tilted or curved by many pixels
    over the slit are followed step by step. Bands with less than
    ``min_signal_fraction`` of the reference band's line signal (slit ends) keep
    the shift of their neighbour.
    """
    nb, nx = spectra.shape
    s = spectra - np.median(spectra, axis=1, keepdims=True)
    s = np.where(np.isfinite(s), np.clip(s, 0, None), 0.0)
    signal = s.sum(axis=1)
    weak = signal < min_signal_fraction * max(signal[ref_index], 1e-30)
    toward = np.where(np.arange(nb) > ref_index, np.arange(nb) - 1, np.arange(nb) + 1)
    toward[ref_index] = ref_index
    steps = _xcorr_shift(s, s[toward], max_step_px)
    steps = np.where(weak | (np.abs(steps) > max_step_px), 0.0, steps)
    steps[ref_index] = 0.0
    shifts = np.zeros(nb)
    for b in range(ref_index + 1, nb):
        shifts[b] = shifts[b - 1] + steps[b]
    for b in range(ref_index - 1, -1, -1):
        shifts[b] = shifts[b + 1] + steps[b]
    return shifts


def trace_lines(data, variance, mask, x_ref_px, wave_angstrom, *, reference_row,
                sigma_px, band_rows=8, min_snr=10.0, max_offset_px=1.0, half_width_px=None,
                guess_px=None):
    """Measure identified lines in bands of rows across the slit.

    Without ``guess_px`` the shift of every band relative to the band holding
    ``reference_row`` is found by cross-correlating neighbouring bands step by
    step; each line is then fitted (pixel-integrated Gaussian,
    :func:`pipeline.wavelength.arclines.measure_lines`) near its predicted position, all
    bands and lines in one vectorised call.

    Parameters
    ----------
    data, variance, mask : ndarray, shape (ny, nx)
    x_ref_px, wave_angstrom : ndarray, shape (n_lines,)
        Lines on the reference row.
    reference_row : float
    sigma_px : float
        Gaussian sigma guess.
    band_rows : int
        Rows per band.
    min_snr : float
        Fewest flux/error for a point to count.
    max_offset_px : float
        Largest distance between a fitted centre and its predicted position.
    half_width_px : int, optional
        Fit window half width (default from ``sigma_px``).
    guess_px : ndarray, shape (n_bands, n_lines), optional
        Predicted positions (e.g. from a first 2-D fit); replaces the band shifts.

    Returns
    -------
    LineTraces
    """
    data = np.asarray(data, dtype=float)
    ny, nx = data.shape
    br = max(1, int(band_rows))
    nb = ny // br
    if nb < 2:
        raise ValueError(f"`band_rows` = {band_rows} leaves fewer than 2 bands in {ny} rows")
    rows = slice(0, nb * br)
    d = data[rows].reshape(nb, br, nx)
    v = np.asarray(variance, dtype=float)[rows].reshape(nb, br, nx)
    mk = np.asarray(mask)[rows].reshape(nb, br, nx)
    flux, var, bmask = sum_rows(d, v, mk)
    y_band = np.arange(nb) * br + 0.5 * (br - 1)
    ref_band = int(np.clip(round((reference_row - 0.5 * (br - 1)) / br), 0, nb - 1))
    x_ref = np.asarray(x_ref_px, dtype=float)
    if guess_px is None:
        shifts = _band_shifts(flux, ref_band)
        guess = x_ref[None, :] + shifts[:, None]
    else:
        guess = np.asarray(guess_px, dtype=float)
        if guess.shape != (nb, x_ref.size):
            raise ValueError(f"`guess_px` must have shape {(nb, x_ref.size)}, got {guess.shape}")
        shifts = np.nanmedian(guess - x_ref[None, :], axis=1)
    n_lines = x_ref.size
    # one long spectrum: bands end to end, separated by zero-weight gaps
    hw = int(half_width_px) if half_width_px is not None else int(math.ceil(2.5 * sigma_px) + 1)
    gap = hw + 2
    stride = nx + gap
    long_flux = np.zeros(nb * stride)
    long_var = np.full(nb * stride, np.inf)
    long_mask = np.zeros(nb * stride, dtype=maskbits.MASK_DTYPE)
    for b in range(nb):
        long_flux[b * stride:b * stride + nx] = flux[b]
        long_var[b * stride:b * stride + nx] = var[b]
        long_mask[b * stride:b * stride + nx] = bmask[b]
    offsets = (np.arange(nb) * stride)[:, None]
    fit = measure_lines(long_flux, long_var, (guess + offsets).ravel(), sigma_guess_px=sigma_px,
                        mask=long_mask, half_width_px=hw, max_shift_px=max_offset_px)
    x = fit["x_px"].reshape(nb, n_lines) - offsets
    x_err = fit["x_err_px"].reshape(nb, n_lines)
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = (fit["flux_e"] / fit["flux_err_e"]).reshape(nb, n_lines)
    inside = np.isfinite(guess) & (guess > hw) & (guess < nx - 1 - hw)
    guess = np.where(np.isfinite(guess), guess, x_ref[None, :])
    ok = (fit["ok"].reshape(nb, n_lines) & (snr >= min_snr) & inside
          & ~fit["saturated"].reshape(nb, n_lines) & ~fit["masked"].reshape(nb, n_lines))
    x = np.where(ok, x, np.nan)
    x_err = np.where(ok, x_err, np.nan)
    return LineTraces(np.asarray(wave_angstrom, dtype=float), x_ref, y_band, x, x_err, ok,
                      {"band_rows": br, "n_bands": nb, "band_shift_px": shifts,
                       "reference_band": ref_band})


def fit_line_tilt(traces, solution_1d, shape, *, degree_x=2, degree_y=2, clip_sigma=4.0,
                  clip_iterations=5, centroid_floor_px=0.01, min_points=20):
    """Fit ``Q(x, y)`` so that ``x + Q(x, y)`` is the reference-row position of each line.

    Each line gets its own free offset (absorbing the difference between its
    reference-row measurement and the traced bands), so only the shape of the
    lines along the slit enters ``Q``. Weighted linear least squares with
    iterative sigma clipping (astropy ``sigma_clip``) of the normalised residuals.

    Parameters
    ----------
    traces : LineTraces
    solution_1d : WavelengthSolution1D
    shape : (int, int)
        ``(ny, nx)``.
    degree_x, degree_y : int
        Degrees of ``Q`` in x (>= 0) and y (>= 1).

    Returns
    -------
    WavelengthSolution2D

    Raises
    ------
    WavelengthSolutionError
        When fewer than ``min_points`` points or too few lines were traced.
    """
    ny, nx = shape
    if degree_y < 1 or degree_x < 0:
        raise ValueError(f"`degree_y` must be >= 1 and `degree_x` >= 0, got {degree_y}, {degree_x}")
    nb, nl = traces.x_px.shape
    yy = np.broadcast_to(traces.y_px[:, None], (nb, nl))
    ok = traces.ok & np.isfinite(traces.x_px)
    lines_ok = ok.sum(axis=0) >= 3
    ok &= lines_ok[None, :]
    n_terms = (degree_x + 1) * degree_y
    if ok.sum() < max(min_points, n_terms + lines_ok.sum() + 3) or lines_ok.sum() < degree_x + 2:
        raise WavelengthSolutionError(
            f"only {int(ok.sum())} points on {int(lines_ok.sum())} lines traced along the slit; "
            "too few to fit the line tilt (check trace_band_rows and trace_min_snr)")
    x_ref0 = 0.5 * (nx - 1)
    x_scale = 0.5 * nx
    y_ref = solution_1d.reference_row
    y_scale = 0.5 * ny
    line_idx = np.flatnonzero(lines_ok)
    col_of_line = -np.ones(nl, dtype=int)
    col_of_line[line_idx] = np.arange(line_idx.size)
    b_i, l_i = np.nonzero(ok)
    xm = traces.x_px[b_i, l_i]
    ym = yy[b_i, l_i]
    sig = np.sqrt(traces.x_err_px[b_i, l_i] ** 2 + centroid_floor_px ** 2)
    target = traces.x_ref_px[l_i] - xm                     # = Q(x, y) + offset of the line
    xn = (xm - x_ref0) / x_scale
    yn = (ym - y_ref) / y_scale
    design = np.column_stack([xn ** i * yn ** j for i in range(degree_x + 1)
                              for j in range(1, degree_y + 1)])
    group = col_of_line[l_i]
    n_groups = line_idx.size
    wgt = 1.0 / sig ** 2
    keep = np.ones(xm.size, dtype=bool)
    clip = partial(sigma_clip, sigma=clip_sigma, maxiters=1, cenfunc="median", stdfunc="mad_std")

    def group_mean(values, wk):
        # weighted mean of each line's kept points, broadcast back to the points
        num = np.zeros((n_groups,) + values.shape[1:])
        np.add.at(num, group, values * wk.reshape((-1,) + (1,) * (values.ndim - 1)))
        den = np.bincount(group, weights=wk, minlength=n_groups)
        den = np.where(den > 0, den, 1.0)
        return (num / den.reshape((-1,) + (1,) * (values.ndim - 1)))[group]

    for _ in range(max(1, int(clip_iterations))):
        wk = np.where(keep, wgt, 0.0)
        # the line offsets are eliminated by removing each line's weighted mean
        a = design - group_mean(design, wk)
        t = target - group_mean(target, wk)
        sw = np.sqrt(wk)
        params, *_ = np.linalg.lstsq(a * sw[:, None], t * sw, rcond=None)
        offsets = group_mean(target - design @ params, wk)
        norm = (target - design @ params - offsets) / sig
        new_keep = ~np.ma.getmaskarray(clip(np.ma.masked_array(norm, mask=~keep)))
        if np.array_equal(new_keep, keep):
            break
        keep = new_keep
    q = params.reshape(degree_x + 1, degree_y)
    resid_pts = target - design @ params - offsets          # px, along x
    residual = np.full((nb, nl), np.nan)
    residual[b_i, l_i] = resid_pts
    used = np.zeros((nb, nl), dtype=bool)
    used[b_i, l_i] = keep
    rms_px = float(np.sqrt(np.mean(resid_pts[keep] ** 2)))
    disp = np.abs(solution_1d.dispersion(xm[keep]))
    rms_a = float(np.sqrt(np.mean((resid_pts[keep] * disp) ** 2)))
    info = {"n_points": int(keep.sum()), "n_rejected": int((~keep).sum()),
            "n_lines": int(line_idx.size), "degree_x": int(degree_x), "degree_y": int(degree_y),
            "line_offsets_px": np.array([offsets[group == g][0] if np.any(group == g) else 0.0
                                         for g in range(n_groups)])}
    return WavelengthSolution2D(solution_1d, q, x_ref0, x_scale, float(y_ref), y_scale,
                                (int(ny), int(nx)), traces, used, residual, rms_px, rms_a, info)



def predicted_positions(solution):
    """Where each traced line lies in each band according to a 2-D solution.

    Solves ``x + Q(x, y) = x_ref + offset`` by fixed-point iteration.

    Returns
    -------
    ndarray, shape (n_bands, n_lines), px
        ``nan`` for lines the solution did not fit.
    """
    tr = solution.traces
    offsets = np.full(tr.x_ref_px.size, np.nan)
    fitted = tr.ok.sum(axis=0) >= 3
    offsets[np.flatnonzero(fitted)] = solution.info["line_offsets_px"][:int(fitted.sum())]
    target = (tr.x_ref_px - offsets)[None, :]
    y = tr.y_px[:, None]
    x = np.broadcast_to(target, tr.x_px.shape).copy()
    for _ in range(6):
        x = target - solution.shift(x, y)
    return x
