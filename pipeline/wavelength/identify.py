"""Line identification seeded by the grating model: isolated listed lines, a vote over tilt and focal length, one-to-one matching.

No manual identification: the grating model (:mod:`pipeline.wavelength.grating`)
predicts where each line of the lit lamps lands. For every trial focal length and
every pair (detected line, listed line) the grating equation gives, in closed form,
the tilt that puts the listed wavelength on the detected pixel; the tilt where most
pairs agree wins (a Hough-style vote, robust to missing and extra lines). Detected and
predicted lines are then matched one-to-one (mutual nearest neighbours within a
tolerance), using only listed lines with no other lit line within a few FWHM.
"""

import math

import numpy as np

__all__ = ["isolated_lines", "merge_unresolved", "search_grating_parameters", "match_lines"]


def isolated_lines(wave_angstrom, species, intensity, *, min_separation_angstrom,
                   faint_ratio=0.03):
    """Listed lines with no lit neighbour that could pull a measured centroid.

    A line is *not* isolated when another listed line lies within
    ``min_separation_angstrom``, unless that neighbour is of the same species and
    fainter than ``faint_ratio`` times the line (relative intensities are
    comparable only within a species; lines of other species always count).

    Parameters
    ----------
    wave_angstrom : ndarray, shape (n,), Angstrom (sorted or not)
    species : ndarray of str, shape (n,)
    intensity : ndarray, shape (n,)
        ``nan`` = unknown (such a neighbour always counts).
    min_separation_angstrom : float
    faint_ratio : float

    Returns
    -------
    ndarray of bool, shape (n,)
    """
    w = np.asarray(wave_angstrom, dtype=float)
    sp = np.asarray(species)
    inten = np.asarray(intensity, dtype=float)
    close = np.abs(w[:, None] - w[None, :]) < min_separation_angstrom
    np.fill_diagonal(close, False)
    same = sp[:, None] == sp[None, :]
    with np.errstate(invalid="ignore"):
        faint = same & np.isfinite(inten[:, None]) & np.isfinite(inten[None, :]) & (
            inten[None, :] < faint_ratio * inten[:, None])
    return ~np.any(close & ~faint, axis=1)


def merge_unresolved(line_list, *, max_separation_angstrom):
    """Merge same-species lines closer than ``max_separation_angstrom`` into one.

    Components much closer than the resolution make one profile whose centroid
    is the intensity-weighted mean wavelength; the merged line gets that
    wavelength, the summed intensity, the sources joined and a note. Groups with
    an unknown intensity are left as they are (and so count as blends).

    Parameters
    ----------
    line_list : LineList
    max_separation_angstrom : float

    Returns
    -------
    LineList
    """
    from pipeline.wavelength.linelists import LineList

    w = line_list.wave_air_angstrom
    if len(line_list) < 2:
        return line_list
    order = np.argsort(w, kind="stable")
    groups, current = [], [order[0]]
    for i in order[1:]:
        j = current[-1]
        if (w[i] - w[j] < max_separation_angstrom
                and line_list.species[i] == line_list.species[j]):
            current.append(i)
        else:
            groups.append(current)
            current = [i]
    groups.append(current)
    cols = {k: [] for k in ("species", "wave", "inten", "source", "note")}
    for g in groups:
        inten = line_list.relative_intensity[g]
        if len(g) == 1 or not np.all(np.isfinite(inten)):
            for i in g:
                cols["species"].append(line_list.species[i])
                cols["wave"].append(w[i])
                cols["inten"].append(line_list.relative_intensity[i])
                cols["source"].append(line_list.source[i])
                cols["note"].append(line_list.note[i])
            continue
        cols["species"].append(line_list.species[g[0]])
        cols["wave"].append(float(np.sum(w[g] * inten) / np.sum(inten)))
        cols["inten"].append(float(np.sum(inten)))
        cols["source"].append(";".join(dict.fromkeys(";".join(line_list.source[g]).split(";"))))
        cols["note"].append("unresolved blend of " + ", ".join(f"{v:.4f}" for v in w[g])
                            + " (intensity-weighted)")
    return LineList(np.array(cols["species"], dtype=str), np.array(cols["wave"], dtype=float),
                    np.array(cols["inten"], dtype=float), np.array(cols["source"], dtype=str),
                    np.array(cols["note"], dtype=str), dict(line_list.info))


def _tilt_for(wave_angstrom, x_px, model, focal_length_mm):
    """Tilt (deg) that puts ``wave`` on pixel ``x`` for a given focal length (closed form).

    ``sin(t + D/2) + sin(t - D/2 + g) = 2 sin(t + g/2) cos((D - g)/2)`` with
    ``g = atan((x - x_c) p / f)``.
    """
    g = np.arctan((x_px - model.center_px) * model.pixel_mm / focal_length_mm)
    big_d = math.radians(model.camera_collimator_angle_deg)
    s = model.order * wave_angstrom / (2 * model.groove_spacing_angstrom * np.cos((big_d - g) / 2))
    with np.errstate(invalid="ignore"):
        return np.degrees(np.arcsin(np.where(np.abs(s) <= 1, s, np.nan)) - g / 2)


def search_grating_parameters(x_detected_px, wave_listed_angstrom, nominal, nx_px, *,
                              tilt_range_deg=0.6, focal_range_fraction=0.035,
                              tolerance_px=1.5, n_candidates=5):
    """Vote for the grating tilt and focal length that best explain the detected lines.

    For each trial focal length (steps that move the detector ends by at most
    ``tolerance_px / 2``) every pair (detected line, listed line) gives the tilt
    that makes them coincide; the number of pairs agreeing within the tilt
    equivalent of ``tolerance_px`` is the score.

    Parameters
    ----------
    x_detected_px : ndarray, shape (n_det,), px
    wave_listed_angstrom : ndarray, shape (n_list,), Angstrom
    nominal : GratingModel
    nx_px : int
    tilt_range_deg : float
        Search ``nominal.tilt_deg +- tilt_range_deg``.
    focal_range_fraction : float
        Search ``f (1 +- focal_range_fraction)``.
    tolerance_px : float
    n_candidates : int
        Number of distinct best (tilt, focal length) pairs returned.

    Returns
    -------
    list of dict
        ``score`` (number of coincidences), ``tilt_deg``, ``focal_length_mm``, sorted
        by decreasing score.
    """
    xd = np.asarray(x_detected_px, dtype=float)
    wl = np.asarray(wave_listed_angstrom, dtype=float)
    if xd.size == 0 or wl.size == 0:
        return []
    f0 = nominal.focal_length_mm
    step = max(tolerance_px / (0.5 * nx_px) / 2, 1e-5)
    n_steps = int(math.ceil(focal_range_fraction / step))
    focals = f0 * (1 + step * np.arange(-n_steps, n_steps + 1))
    # tilt equivalent of the tolerance: d lambda/d t over d lambda/dx at the centre
    a, b = math.radians(nominal.alpha_deg), math.radians(nominal.beta_center_deg)
    dlam_dt = nominal.groove_spacing_angstrom * (math.cos(a) + math.cos(b)) / nominal.order
    px_per_rad = dlam_dt / float(nominal.dispersion(nominal.center_px))
    half = 0.5 * tolerance_px / px_per_rad * 180 / math.pi
    results = []
    t0 = nominal.tilt_deg
    for f in focals:
        tilts = _tilt_for(wl[None, :], xd[:, None], nominal, f).ravel()
        tilts = tilts[np.isfinite(tilts) & (np.abs(tilts - t0) <= tilt_range_deg + half)]
        if tilts.size == 0:
            continue
        tilts.sort()
        lo = np.searchsorted(tilts, tilts - half, side="left")
        hi = np.searchsorted(tilts, tilts + half, side="right")
        counts = hi - lo
        # a few distinct local maxima per focal length
        order = np.argsort(-counts, kind="stable")
        taken = []
        for k in order:
            if len(taken) >= n_candidates or counts[k] < 3:
                break
            t = float(np.median(tilts[lo[k]:hi[k]]))
            if abs(t - t0) > tilt_range_deg or any(abs(t - u) < 4 * half for u in taken):
                continue
            taken.append(t)
            results.append({"score": int(counts[k]), "tilt_deg": t, "focal_length_mm": float(f)})
    results.sort(key=lambda r: -r["score"])
    distinct = []
    for r in results:
        if any(abs(r["tilt_deg"] - d["tilt_deg"]) < 4 * half
               and abs(r["focal_length_mm"] - d["focal_length_mm"]) < 4 * step * f0
               for d in distinct):
            continue
        distinct.append(r)
        if len(distinct) >= n_candidates:
            break
    for r in distinct:
        r["tilt_half_window_deg"] = half
    return distinct


def match_lines(x_detected_px, x_predicted_px, *, tolerance_px):
    """One-to-one matches: mutual nearest neighbours closer than ``tolerance_px``.

    Returns
    -------
    det_index, pred_index : ndarray of int
    """
    xd = np.asarray(x_detected_px, dtype=float)
    xp = np.asarray(x_predicted_px, dtype=float)
    ok_p = np.isfinite(xp)
    if xd.size == 0 or not ok_p.any():
        return np.zeros(0, int), np.zeros(0, int)
    dist = np.abs(xd[:, None] - np.where(ok_p, xp, np.inf)[None, :])
    nearest_p = np.argmin(dist, axis=1)
    nearest_d = np.argmin(dist, axis=0)
    d_idx = np.arange(xd.size)
    mutual = nearest_d[nearest_p] == d_idx
    close = dist[d_idx, nearest_p] < tolerance_px
    keep = mutual & close
    return d_idx[keep], nearest_p[keep]
