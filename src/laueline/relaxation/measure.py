"""Measuring line profiles in an image, and telling split or broadened lines.

See :mod:`laueline.relaxation` for the model and its sources.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError

__all__ = ["LineProfiles", "measure_line_profiles", "LineAssessment", "assess_line_profiles",
           "line_shape_warning"]

_FWHM = 2.0 * math.sqrt(2.0 * math.log(2.0))


@dataclass
class LineProfiles:
    """Intensity profiles across lines, averaged along stretches of them.

    One profile per (line, segment): each line's chord is cut into
    ``segments`` stretches so that the fit sees where along the line it
    lies (the centre and rotation of the pattern), not only its offset.

    Attributes
    ----------
    hkl : ndarray (p, 3)
    segment : ndarray (p,) of int
    offset_px : ndarray (k,)
        Across-line coordinate of the samples, px, along ``normals``.
    intensity, sigma : ndarray (p, k)
        Mean intensity relative to the flanks of the profile, and its
        standard uncertainty (scatter along the line over the square root of
        the number of independent stretches).
    columns_px, normals : list of ndarray (c, 2)
        Points on the reference locus where columns were taken, and the unit
        normals along which they were sampled.
    n_columns : ndarray (p,) of int
        Fewest columns averaged at any offset.
    masks : list of ndarray (c, k) of bool
        The samples of each column that entered the average.
    """

    hkl: np.ndarray
    segment: np.ndarray
    offset_px: np.ndarray
    intensity: np.ndarray
    sigma: np.ndarray
    columns_px: list
    normals: list
    n_columns: np.ndarray
    masks: list = field(default_factory=list)

    def __len__(self):
        return len(self.hkl)


def _resample(polyline, spacing):
    """Points every ``spacing`` px along a polyline (m, 2), and unit tangents."""
    steps = np.linalg.norm(np.diff(polyline, axis=0), axis=1)
    arc = np.concatenate([[0.0], np.cumsum(steps)])
    n = max(int(arc[-1] / spacing), 1) + 1
    a = np.linspace(0.0, arc[-1], n)
    pts = np.stack([np.interp(a, arc, polyline[:, 0]), np.interp(a, arc, polyline[:, 1])], 1)
    tangent = np.gradient(pts, axis=0) if n > 1 else np.array([[1.0, 0.0]])
    tangent /= np.linalg.norm(tangent, axis=1, keepdims=True)
    return pts, tangent


def measure_line_profiles(image, loci_px, hkl, disk_center_px, disk_radius_px, *,
                          half_width_px, step_px=0.5, along_step_px=2.0, segments=2,
                          obstacles_px=(), clearance_px=None, min_columns=6):
    """Intensity profiles across lines along the normal of a reference locus.

    Along each locus (a polyline in pixels, for example a predicted exact
    locus), columns are taken every ``along_step_px``; each column samples
    the image (bilinear) at offsets -W..W along the local normal.  Samples
    outside the disk or within ``clearance_px`` of another line
    (``obstacles_px``) are left out, so a crossing removes only the samples
    near it.  Each column is divided by the mean of its outer quarter on both
    sides (removing the slow background), and the columns of each stretch are
    averaged offset by offset.  Because the reference is the exact (curved)
    locus, the averaging needs no straightness test.

    Parameters
    ----------
    image : ndarray (rows, cols)
    loci_px : sequence of ndarray (m, 2)
    hkl : ndarray (n, 3)
    disk_center_px, disk_radius_px : the central disk
    half_width_px, step_px : float
        Half-width W of each profile and sample spacing, px.
    along_step_px : float
        Column spacing along the line; about twice the blur so that columns
        are nearly independent.
    segments : int
        Stretches per line, each giving its own profile.
    obstacles_px : sequence of ndarray (m, 2)
        Lines to keep clear of (the profiled lines may be among them).
    clearance_px : float, optional
        Distance kept from other lines; W / 2 by default.
    min_columns : int
        Stretches with fewer usable samples at any offset are left out.

    Returns
    -------
    LineProfiles
    """
    from scipy import ndimage
    from scipy.spatial import cKDTree

    image = np.asarray(image, dtype=float)
    w = float(half_width_px)
    if not (w > 2 * step_px):
        raise InputError(f"half_width_px must exceed two samples, got {w:g}")
    clearance = 0.5 * w if clearance_px is None else float(clearance_px)
    offsets = np.arange(-w, w + 0.5 * step_px, step_px)
    flank = np.abs(offsets) >= 0.75 * w
    centre = np.asarray(disk_center_px, dtype=float)
    rows, cols = image.shape
    out = {k: [] for k in ("hkl", "segment", "intensity", "sigma", "columns", "normals",
                           "n", "masks")}
    dense = [_resample(np.asarray(o, dtype=float), 1.0)[0] for o in obstacles_px]
    for i, locus in enumerate(loci_px):
        locus = np.asarray(locus, dtype=float)
        pts, tangent = _resample(locus, along_step_px)
        normal = np.stack([-tangent[:, 1], tangent[:, 0]], 1)
        sample = pts[:, None, :] + offsets[None, :, None] * normal[:, None, :]
        ok = np.linalg.norm(sample - centre, axis=-1) <= disk_radius_px - 2.0
        ok &= (sample[..., 0] >= 0) & (sample[..., 0] <= cols - 1) & \
            (sample[..., 1] >= 0) & (sample[..., 1] <= rows - 1)
        others = [d for d, o in zip(dense, obstacles_px) if not _same_polyline(o, locus)]
        if others:
            dist, _ = cKDTree(np.concatenate(others)).query(sample.reshape(-1, 2))
            ok &= dist.reshape(ok.shape) > clearance
        values = ndimage.map_coordinates(image, [sample[..., 1], sample[..., 0]], order=1,
                                         mode="nearest")
        values = np.where(ok, values, np.nan)
        flank_ok = ok & flank
        level = np.sum(np.where(flank_ok, values, 0.0), axis=1) / np.maximum(
            np.sum(flank_ok, axis=1), 1)
        good_col = (level > 0) & (np.sum(flank_ok, axis=1) >= 4)
        values = values / np.where(good_col, level, 1.0)[:, None]
        values[~good_col] = np.nan
        pieces = np.array_split(np.arange(len(pts)), segments)
        for k, idx in enumerate(pieces):
            v = values[idx]
            count = np.sum(np.isfinite(v), axis=0)
            if count.min() < min_columns:
                continue
            used = np.any(np.isfinite(v), axis=1)
            out["masks"].append(np.isfinite(v[used]))
            out["hkl"].append(hkl[i])
            out["segment"].append(k)
            out["intensity"].append(np.nanmean(v, axis=0))
            # a noise-free image leaves only rounding in the scatter: floor at 1e-4 of
            # the flank level (16-bit quantisation of a bright disk)
            out["sigma"].append(np.maximum(np.nanstd(v, axis=0, ddof=1) / np.sqrt(count),
                                           1e-4))
            out["columns"].append(pts[idx][used])
            out["normals"].append(normal[idx][used])
            out["n"].append(int(count.min()))
    if not out["hkl"]:
        return LineProfiles(np.zeros((0, 3), int), np.zeros(0, int), offsets,
                            np.zeros((0, len(offsets))), np.zeros((0, len(offsets))), [], [],
                            np.zeros(0, int), [])
    return LineProfiles(np.array(out["hkl"]), np.array(out["segment"]), offsets,
                        np.array(out["intensity"]), np.array(out["sigma"]), out["columns"],
                        out["normals"], np.array(out["n"]), out["masks"])


def _same_polyline(a, b):
    return a.shape == np.shape(b) and np.array_equal(a, b)


def _subset(profiles, mask):
    idx = np.flatnonzero(mask)
    return LineProfiles(profiles.hkl[idx], profiles.segment[idx], profiles.offset_px,
                        profiles.intensity[idx], profiles.sigma[idx],
                        [profiles.columns_px[i] for i in idx],
                        [profiles.normals[i] for i in idx], profiles.n_columns[idx],
                        [profiles.masks[i] for i in idx])


# ---------------------------------------------------------------------------
# split and broadened lines, for the single-strain fit
# ---------------------------------------------------------------------------


@dataclass
class LineAssessment:
    """Shape of one detected line's profile.

    ``width_px`` is the FWHM of a single Gaussian dip fitted to the
    profile; ``split`` is True when two dips fit significantly better
    (chi-square lower by ``delta_chi2``), are both substantial and lie
    further apart than the instrument's line width; ``broadened`` when the
    single dip is wider than 1.5 times the instrument's line width.
    """

    index: int
    width_px: float
    split: bool
    broadened: bool
    separation_px: float
    delta_chi2: float


def _dips(d, y, sigma, n_dips, start_width, start_centres):
    from scipy.optimize import least_squares

    def model(p):
        out = p[0] + p[1] * d
        for j in range(n_dips):
            out = out - p[3 + 2 * j] * np.exp(-0.5 * ((d - p[4 + 2 * j]) / p[2]) ** 2)
        return out

    depth0 = max(float(np.max(y) - np.min(y)), 1e-3)
    x0 = [float(np.median(y)), 0.0, start_width]
    for c in start_centres:
        x0 += [depth0 / n_dips, c]
    lo = [-np.inf, -np.inf, 0.3] + [0.0, d[0]] * n_dips
    hi = [np.inf, np.inf, d[-1] - d[0]] + [np.inf, d[-1]] * n_dips
    res = least_squares(lambda p: (model(p) - y) / sigma, np.clip(x0, lo, hi),
                        bounds=(lo, hi), max_nfev=200)
    return res.x, float(np.sum(res.fun ** 2))


def assess_line_profiles(image, detection, *, instrument_fwhm_px=None, half_width_px=None,
                         min_delta_chi2=25.0):
    """Which detected lines are split or broadened beyond the instrument's line width.

    Each good line of ``detection`` (:func:`laueline.images.detect.detect_lines`)
    is profiled across its fitted position, averaged along its length
    (:func:`measure_line_profiles`, keeping clear of the other lines); one
    and two Gaussian dips (one common width) are fitted to the profile.

    Parameters
    ----------
    image : ndarray (rows, cols)
    detection : Detection
    instrument_fwhm_px : float, optional
        The width of an unbroadened line (a thick, unstrained reference
        region, or the instrument's resolution); by default the lower quartile
        of the widths the detection found: relaxation through the foil only
        widens lines, and in a thin lamella most of them may be widened, so
        the narrow ones stand for the instrument.
    half_width_px : float, optional
        Profile half-width; four instrument widths by default (at least 8 px).
    min_delta_chi2 : float
        Chi-square improvement a second dip must bring (25: about five
        sigma for the extra parameters; common practice).

    Returns
    -------
    list of LineAssessment
        One per good line, in detection order.
    """
    good = detection.good_lines
    if not good:
        return []
    fwhm = instrument_fwhm_px or float(np.percentile([detection.lines[i].width_px for i in good],
                                                      25))
    w = half_width_px or max(4.0 * fwhm, 8.0)
    polylines = [np.asarray(detection.lines[i].points_px, dtype=float) for i in good]
    profiles = measure_line_profiles(
        image, polylines, np.array(good)[:, None].repeat(3, 1), detection.disk.center_px,
        detection.disk.radius_px, half_width_px=w, segments=1, obstacles_px=polylines,
        clearance_px=max(1.5 * fwhm, 3.0))
    out = []
    d = profiles.offset_px
    sigma0 = fwhm / _FWHM
    for k in range(len(profiles)):     # a few dozen small fits, reporting only
        y, s = profiles.intensity[k], np.maximum(profiles.sigma[k], 1e-9)
        one, chi1 = _dips(d, y, s, 1, sigma0, [d[np.argmin(y)]])
        width = one[2] * _FWHM
        best = (np.inf, None)
        for sep in (0.75, 1.25, 2.0):
            c = one[4]
            two, chi2 = _dips(d, y, s, 2, sigma0, [c - sep * width / 2, c + sep * width / 2])
            if chi2 < best[0]:
                best = (chi2, two)
        chi2, two = best
        depths = two[[3, 5]]
        separation = abs(two[6] - two[4])
        split = bool(chi1 - chi2 > min_delta_chi2 and depths.min() > 0.2 * depths.max()
                     and separation > fwhm)
        out.append(LineAssessment(int(profiles.hkl[k, 0]), float(width), split,
                                  bool(width > 1.5 * fwhm),
                                  float(separation) if split else float("nan"),
                                  float(chi1 - chi2)))
    return out


def line_shape_warning(assessments):
    """One warning sentence for a single-strain fit when lines are split or broadened, or None."""
    n_split = sum(a.split for a in assessments)
    n_broad = sum(a.broadened and not a.split for a in assessments)
    if not n_split and not n_broad:
        return None
    return (f"{n_split} of {len(assessments)} lines are split and {n_broad} broadened beyond "
            "the instrument's line width: the strain varies through the foil (surface "
            "relaxation of a thin lamella?), and one strain per pattern is an average that "
            "may match no depth; fit the profiles with 'laueline relaxation'")
