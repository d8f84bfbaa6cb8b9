"""The CCD of the invented RLS: pixel response, bad columns, cosmic rays, bias and readout.

Raw layout (what the instrument writes)
---------------------------------------
numpy ``raw[r, c]`` with ``r`` along the dispersion (FITS axis 2) and ``c`` along
the slit (FITS axis 1). Wavelength DECREASES with ``r``. Columns
``c < nyb`` are the data, ``c >= nyb`` the serial overscan. The mapping to the
canonical orientation (``canonical[y, x]``, wavelength increasing with ``x``) is

    canonical[y, x] = raw[nxb - 1 - x, y]      i.e.  canonical = raw[::-1, :nyb].T

and back ``raw[:, :nyb] = canonical.T[::-1]``.

A detector with ``layout='wren'`` (the second invented instrument, WREN) reads out
the other way: numpy ``raw[r, c]`` with ``r`` along the slit (FITS axis 2) and
``c`` along the dispersion (FITS axis 1), wavelength INCREASING with ``c``;
``n_prescan`` prescan columns, then the data, then ``n_overscan`` overscan columns:

    canonical[y, x] = raw[y, n_prescan + x]
"""

import functools
from dataclasses import dataclass

import numpy as np

__all__ = ["Detector", "canonical_to_raw", "raw_to_canonical", "bin_sum", "bin_mean"]


@functools.lru_cache(maxsize=2)
def _binned_response(detector):
    resp = bin_mean(detector.pixel_response_phys(), detector.bin_y, detector.bin_x)
    resp.setflags(write=False)
    return resp


def bin_sum(image, by, bx):
    """Sum ``by x bx`` blocks of a physical canonical image (charge binning)."""
    ny, nx = image.shape
    return image.reshape(ny // by, by, nx // bx, bx).sum(axis=(1, 3))


def bin_mean(image, by, bx):
    """Mean of ``by x bx`` blocks."""
    return bin_sum(image, by, bx) / (by * bx)


def canonical_to_raw(canonical):
    """Canonical ``(ny, nx)`` array -> raw data section ``(nx, ny)`` (no overscan)."""
    return np.ascontiguousarray(np.asarray(canonical).T[::-1])


def raw_to_canonical(raw, ny):
    """Raw frame (with or without overscan columns) -> canonical data ``(ny, nx)``."""
    return np.ascontiguousarray(np.asarray(raw)[::-1, :ny].T)


@dataclass(frozen=True)
class Detector:
    """True properties of the detector and its electronics.

    Parameters
    ----------
    nx_phys, ny_phys : int
        Unbinned pixels along the dispersion and the slit.
    bin_x, bin_y : int
        Binning along the dispersion (FITS axis 2) and the slit (FITS axis 1).
    n_overscan : int
        Serial overscan columns (binned) at the end of each raw row.
    gain_e_per_adu, read_noise_e : float
        True gain and read noise (the header carries nominal values).
    bias_level_adu : float
        Mean bias level.
    dead_columns, hot_columns : tuple of int
        Physical slit coordinates ``Y`` of fully dead / hot columns.
    hot_column_e_per_s : float
        Dark signal of a hot column (electrons per unbinned pixel per second).
    low_column : tuple (Y, X_start, response)
        A column whose response drops for physical ``X >= X_start`` (a trap).
    pixel_response_rms : float
        Rms of the pixel-to-pixel response (unbinned).
    cosmic_ray_rate_per_cm2_s : float
        Cosmic-ray events per cm^2 per second of exposure (plus readout time).
    adc_max_adu : int
        Largest value the ADC delivers (digital saturation).
    seed : int
        Seed of the fixed detector properties (response map, bias pattern).
    layout : {'rls', 'wren'}
        Raw readout layout (module docstring).
    n_prescan : int
        Prescan columns before the data of each raw row ('wren' layout only).
    """

    nx_phys: int = 2048
    ny_phys: int = 512
    bin_x: int = 2
    bin_y: int = 2
    n_overscan: int = 32
    pixel_size_mm: float = 0.015
    gain_e_per_adu: float = 1.86
    read_noise_e: float = 4.12
    gain_nominal: float = 1.80
    read_noise_nominal: float = 4.0
    bias_level_adu: float = 1000.0
    dead_columns: tuple = (141,)
    hot_columns: tuple = (377,)
    hot_column_e_per_s: float = 0.6
    low_column: tuple = (229, 1300, 0.55)
    pixel_response_rms: float = 0.012
    cosmic_ray_rate_per_cm2_s: float = 0.04
    readout_time_s: float = 20.0
    adc_max_adu: int = 65535
    seed: int = 20260314
    layout: str = "rls"
    n_prescan: int = 0

    @property
    def nxb(self):
        return self.nx_phys // self.bin_x

    @property
    def nyb(self):
        return self.ny_phys // self.bin_y

    @property
    def raw_shape(self):
        if self.layout == "wren":
            return (self.nyb, self.n_prescan + self.nxb + self.n_overscan)
        return (self.nxb, self.nyb + self.n_overscan)

    @property
    def data_slice(self):
        """numpy (rows, columns) slices of the data section in the raw array."""
        if self.layout == "wren":
            return (slice(None), slice(self.n_prescan, self.n_prescan + self.nxb))
        return (slice(None), slice(0, self.nyb))

    @property
    def overscan_slice(self):
        if self.layout == "wren":
            start = self.n_prescan + self.nxb
            return (slice(None), slice(start, start + self.n_overscan))
        return (slice(None), slice(self.nyb, self.nyb + self.n_overscan))

    def to_raw(self, canonical):
        """Canonical ``(nyb, nxb)`` -> raw data section (layout of this detector)."""
        if self.layout == "wren":
            return np.ascontiguousarray(np.asarray(canonical))
        return canonical_to_raw(canonical)

    def to_canonical(self, raw):
        """Raw frame (full, with prescan/overscan) -> canonical data ``(nyb, nxb)``."""
        if self.layout == "wren":
            return np.ascontiguousarray(np.asarray(raw)[self.data_slice])
        return raw_to_canonical(raw, self.nyb)

    @property
    def ccdsum(self):
        """CCDSUM value: binning along FITS axis 1, then FITS axis 2."""
        if self.layout == "wren":
            return f"{self.bin_x} {self.bin_y}"
        return f"{self.bin_y} {self.bin_x}"

    @property
    def datasec(self):
        if self.layout == "wren":
            return f"[{self.n_prescan + 1}:{self.n_prescan + self.nxb},1:{self.nyb}]"
        return f"[1:{self.nyb},1:{self.nxb}]"

    @property
    def biassec(self):
        if self.layout == "wren":
            start = self.n_prescan + self.nxb
            return f"[{start + 1}:{start + self.n_overscan},1:{self.nyb}]"
        return f"[{self.nyb + 1}:{self.nyb + self.n_overscan},1:{self.nxb}]"

    def bad_columns_binned(self):
        """Binned canonical rows ``y`` touched by the dead/hot/low columns, with their kind."""
        out = [(int(c // self.bin_y), "dead") for c in self.dead_columns]
        out += [(int(c // self.bin_y), "hot") for c in self.hot_columns]
        if self.low_column:
            out.append((int(self.low_column[0] // self.bin_y), "low"))
        return out

    # -- fixed detector properties ---------------------------------------------
    def pixel_response_phys(self):
        """Unbinned relative response (QE x gain variations), mean ~1, canonical layout."""
        rng = np.random.default_rng([self.seed, 1])
        resp = 1.0 + self.pixel_response_rms * rng.standard_normal((self.ny_phys, self.nx_phys))
        # mild large-scale structure (coating non-uniformity)
        y = np.linspace(-1, 1, self.ny_phys)[:, None]
        x = np.linspace(-1, 1, self.nx_phys)[None, :]
        resp *= 1.0 + 0.015 * x * y - 0.01 * x ** 2
        for c in self.dead_columns:
            resp[c, :] = 0.02
        if self.low_column:
            c, x0, r = self.low_column
            resp[c, x0:] *= r
        return resp

    def pixel_response(self):
        """Binned relative response (mean of the unbinned pixels); a read-only cached array."""
        return _binned_response(self)

    def dark_e_per_s(self):
        """Binned dark signal (e-/s): zero except the hot columns."""
        dark = np.zeros((self.ny_phys, self.nx_phys))
        for c in self.hot_columns:
            dark[c, :] = self.hot_column_e_per_s
        return bin_sum(dark, self.bin_y, self.bin_x)

    def bias_pattern_adu(self):
        """Fixed 2-D bias structure of the data columns (raw layout data section, ADU, mean 0)."""
        rng = np.random.default_rng([self.seed, 2])
        nrow, ncol = self.to_raw(np.zeros((self.nyb, self.nxb))).shape
        c = np.arange(ncol)
        cols = 0.35 * np.sin(2 * np.pi * c / 97.0) + 0.25 * rng.standard_normal(ncol)
        return np.broadcast_to(cols[None, :], (nrow, ncol)).copy()

    # -- per-frame effects ------------------------------------------------------
    def cosmic_rays(self, exptime_s, rng):
        """Electrons deposited by cosmic rays, binned canonical ``(nyb, nxb)``.

        Events arrive at ``cosmic_ray_rate_per_cm2_s`` over the exposure plus the
        readout time; each is a straight track of random direction and length
        (most are 1-3 unbinned pixels, a few long grazing ones), depositing about
        1000 e- per unbinned pixel crossed (log-normal scatter).
        """
        area_cm2 = (self.nx_phys * self.pixel_size_mm / 10) * (self.ny_phys * self.pixel_size_mm / 10)
        n = rng.poisson(self.cosmic_ray_rate_per_cm2_s * area_cm2 * (exptime_s + self.readout_time_s))
        phys = np.zeros((self.ny_phys, self.nx_phys), dtype=np.float64)
        for _ in range(n):
            x0 = rng.uniform(0, self.nx_phys)
            y0 = rng.uniform(0, self.ny_phys)
            length = rng.exponential(2.0) + 0.3
            if rng.random() < 0.05:
                length += rng.uniform(5, 25)
            ang = rng.uniform(0, np.pi)
            dep_per_px = 1000.0 * rng.lognormal(0.0, 0.45)
            nstep = max(2, int(length * 4))
            s = np.linspace(0, length, nstep)
            xs = np.floor(x0 + s * np.cos(ang) + 0.5).astype(int)
            ys = np.floor(y0 + s * np.sin(ang) + 0.5).astype(int)
            ok = (xs >= 0) & (xs < self.nx_phys) & (ys >= 0) & (ys < self.ny_phys)
            np.add.at(phys, (ys[ok], xs[ok]), dep_per_px * length / nstep)
        return bin_sum(phys, self.bin_y, self.bin_x), n

    def bias_frame_adu(self, rng):
        """Noise-free bias of one readout, raw layout including overscan (ADU).

        Level + a slow gradient along the readout (rows) + a start-of-readout
        transient + a per-frame offset + row-to-row jitter (shared by data and
        overscan, so the overscan tracks it) + the fixed column pattern (data only).
        """
        nr = self.raw_shape[0]
        r = np.arange(nr)
        level = (self.bias_level_adu + rng.normal(0.0, 1.5) + 4.0 * r / nr
                 + 2.5 * np.exp(-r / 30.0) + rng.normal(0.0, 0.7, nr))
        bias = np.empty(self.raw_shape)
        bias[:, :] = level[:, None]
        bias[self.data_slice] += self.bias_pattern_adu()
        return bias, level

    def read_out(self, expected_e, exptime_s, rng, *, poisson=True, read_noise=True,
                 cosmic_rays=True, dark=True):
        """Turn the expected signal into a raw uint16 frame.

        Parameters
        ----------
        expected_e : ndarray, shape (nyb, nxb), electron
            Expected photo-electrons per binned pixel (after the pixel response).
        exptime_s : float
        rng : numpy.random.Generator

        Returns
        -------
        raw : ndarray of uint16, shape ``raw_shape``
        info : dict
            ``cosmic_e`` (binned canonical CR electrons), ``n_cosmic``,
            ``bias_row_level_adu`` (per raw row, shared by data and overscan),
            ``bias_adu`` (noise-free bias, raw layout), ``n_saturated`` (pixels
            at the ADC maximum).
        """
        signal = np.asarray(expected_e, float)
        if dark:
            signal = signal + self.dark_e_per_s() * exptime_s
        electrons = rng.poisson(np.clip(signal, 0, None)).astype(float) if poisson else signal.copy()
        if cosmic_rays:
            cosmic, n_cosmic = self.cosmic_rays(exptime_s, rng)
            electrons += cosmic
        else:
            cosmic, n_cosmic = np.zeros_like(electrons), 0
        bias, level = self.bias_frame_adu(rng)
        adu = bias.copy()
        adu[self.data_slice] += self.to_raw(electrons) / self.gain_e_per_adu
        if read_noise:
            adu += rng.normal(0.0, self.read_noise_e / self.gain_e_per_adu, adu.shape)
        adu = np.floor(adu + 0.5)
        n_sat = int(np.count_nonzero(adu >= self.adc_max_adu))
        raw = np.clip(adu, 0, self.adc_max_adu).astype(np.uint16)
        return raw, {"cosmic_e": cosmic, "n_cosmic": int(n_cosmic),
                     "bias_row_level_adu": level, "bias_adu": bias, "n_saturated": n_sat}

    def to_dict(self):
        return {
            "nx_phys": self.nx_phys, "ny_phys": self.ny_phys, "bin_x": self.bin_x,
            "bin_y": self.bin_y, "n_overscan": self.n_overscan,
            "pixel_size_mm": self.pixel_size_mm,
            "gain_e_per_adu": self.gain_e_per_adu, "read_noise_e": self.read_noise_e,
            "gain_nominal_header": self.gain_nominal,
            "read_noise_nominal_header": self.read_noise_nominal,
            "bias_level_adu": self.bias_level_adu,
            "dead_columns_phys_y": list(self.dead_columns),
            "hot_columns_phys_y": list(self.hot_columns),
            "hot_column_e_per_s_per_phys_px": self.hot_column_e_per_s,
            "low_column_phys_y_xstart_response": list(self.low_column),
            "bad_rows_canonical_binned": [{"y_px": y, "kind": k} for y, k in self.bad_columns_binned()],
            "pixel_response_rms": self.pixel_response_rms,
            "cosmic_ray_rate_per_cm2_s": self.cosmic_ray_rate_per_cm2_s,
            "readout_time_s": self.readout_time_s,
            "adc_max_adu": self.adc_max_adu,
            "datasec": self.datasec, "biassec": self.biassec, "ccdsum": self.ccdsum,
            "layout": self.layout, "n_prescan": self.n_prescan,
        }
