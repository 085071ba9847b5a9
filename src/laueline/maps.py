"""Strain over scans: every pattern of a line scan or a 4D-STEM map.

A scan is a stack of central-disk patterns with navigation dimensions
``scan`` (line scan) or ``scan_y, scan_x`` (map) and signal dimensions
``ky, kx`` (rows, columns).  Every pattern is fitted with the calibration
held (effective voltage, scale, rotation, mirror, distortion): only the six
strain components and the pattern centre are free.

The work per zone axis is done once, in :func:`plan_scan`: the lines of the
calibrated prediction (the one forward model, :mod:`laueline.lines`), sample
points along each line away from crossings, the pixel positions of short
profiles across each line at those points, and the Jacobian of the line
positions along the profiles with respect to the free parameters.  The work
per pattern (:func:`fit_pattern`) is then small and independent of the
image size: interpolate the profiles, locate each deficit minimum (a
parabola through the lowest samples, first in a wide window around the
calibrated position, then in a narrow one around the position the first
fit predicts), and solve the linear least-squares problem for strain and
centre.  A strain of a few 1e-3 moves lines by a few tenths of a mrad; the
linear model is then exact to far below the measurement noise (its error
is of the order of the strain squared).

Uncertainties follow the per-line error model of :mod:`laueline.uncertainty`
when it applies: the error of a line (its detection, a dynamical shift)
moves all of its sample points together, so the points of one line are not
independent observations.  The statistical covariance is the generalised
least-squares covariance with the point noise measured from each profile and
a per-line term estimated from the scatter of the lines' mean residuals;
the total adds the systematic covariance of the kinematic model given to
:func:`plan_scan` (reported beside it, never folded away).

The scan runs on Dask (:func:`map_strain`): a local process pool on all
cores by default, or a ``dask.distributed`` cluster when an address is
given.  Results go into a zarr store holding an xarray Dataset, written one
chunk of patterns at a time; a killed run started again with the same
arguments continues from the finished chunks and ends with the same store.

References
----------
Zuo, J. M. (1992). Ultramicroscopy 41, 211-223 (HOLZ line fitting).
Armigliato, A. et al. (2003). Appl. Phys. Lett. 82, 2172 (strain profiles in
devices from CBED line scans).
"""

from __future__ import annotations

import hashlib
import json
import math
import os
from dataclasses import dataclass, field
from functools import partial
from pathlib import Path

import numpy as np

from .errors import InputError

__all__ = ["ScanPlan", "PatternFit", "Scan", "plan_scan", "fit_pattern", "open_scan",
           "map_strain", "MAP_SCHEMA", "STRAIN_NAMES"]

MAP_SCHEMA = "laueline.map/1"
STRAIN_NAMES = ("exx", "eyy", "ezz", "eyz", "exz", "exy")
_VOIGT_INDEX = ((0, 0), (1, 1), (2, 2), (1, 2), (0, 2), (0, 1))
_PARAMETERS = STRAIN_NAMES + ("center_x", "center_y")
_STEPS = np.array([1e-4] * 6 + [0.5, 0.5])  # central-difference steps: strain, px


# ---------------------------------------------------------------------------
# per-zone plan
# ---------------------------------------------------------------------------

@dataclass
class ScanPlan:
    """Everything per pattern fitting needs, computed once per zone axis.

    Only numpy arrays and numbers, so that the plan pickles cheaply to
    worker processes.

    Attributes
    ----------
    hkl : ndarray (n_lines, 3)
        The predicted lines that are sampled.
    point_line : ndarray (n_points,)
        Index into ``hkl`` of each sample point.
    band : dict of ndarray
        The pixels of a short band across the line at each point, and the
        profile bin each falls into by its exact distance from the locus
        (see :func:`_band_pixels`).
    steps_mrad : ndarray (n_steps,)
        Positions along the profile, mrad, 0 at the calibrated locus.
    window_mrad : ndarray (n_points,)
        Half-width of the window each point may be searched in: its
        distance from the nearest other line less two line widths, at most
        the search half-width.  A point is used once the position its line
        is predicted at is known to within a third of that.
    offset0_mrad : ndarray (n_points,)
        Position of the locus along each profile at the calibration state.
    jacobian : ndarray (n_points, 8)
        d(position along the profile, mrad) / d(parameter) for the six
        strain components e (basis (I + e) A) and the centre shift (px).
    px_per_mrad_along : ndarray (n_points,)
        Pixels per mrad along each profile (the detector scale, with any
        distortion).
    shape : (rows, cols)
        Pattern size the plan was made for.
    systematic_covariance : ndarray (6, 6)
        Systematic covariance of the strain (kinematic model), added to the
        statistical one in the totals.
    sample_rotation : ndarray (6, 6) or None
        Linear map of Voigt strain components into the sample frame.
    settings : dict
        What the plan was made with (for the result's attributes).
    """

    hkl: np.ndarray
    point_line: np.ndarray
    band: dict
    steps_mrad: np.ndarray
    offset0_mrad: np.ndarray
    jacobian: np.ndarray
    px_per_mrad_along: np.ndarray
    shape: tuple
    search_mrad: float
    refine_window_mrad: float
    window_mrad: np.ndarray
    smooth_samples: float
    fit_half_width_mrad: float
    systematic_covariance: np.ndarray
    sample_rotation: np.ndarray | None
    settings: dict = field(default_factory=dict)

    @property
    def n_points(self):
        return len(self.point_line)

    @property
    def n_lines(self):
        return len(self.hkl)

    @property
    def fingerprint(self):
        """A short hash of everything that decides the per-pattern result."""
        h = hashlib.sha256()
        for a in (self.hkl, self.point_line, self.band["pixel"], self.jacobian, self.offset0_mrad,
                  self.systematic_covariance):
            h.update(np.ascontiguousarray(a).tobytes())
        h.update(json.dumps(self.settings, sort_keys=True, default=str).encode())
        return h.hexdigest()[:16]


def _calibration_parts(calibration):
    """(kv, Detector, extra settings) from a Calibration or a (kv, Detector) pair."""
    if hasattr(calibration, "detector") and hasattr(calibration, "kv"):
        return float(calibration.kv), calibration.detector, calibration
    try:
        kv, det = calibration
    except (TypeError, ValueError):
        raise InputError("calibration must be a Calibration or a (kv, Detector) pair") from None
    return float(kv), det, None


def _voigt_rotation(axes):
    """6x6 matrix taking Voigt tensor components to those in the frame ``axes`` (rows)."""
    R = np.asarray(axes, float)
    out = np.empty((6, 6))
    for j, (k, l) in enumerate(_VOIGT_INDEX):
        unit = np.zeros((3, 3))
        unit[k, l] = unit[l, k] = 1.0
        rotated = R @ unit @ R.T
        out[:, j] = [rotated[a, b] for a, b in _VOIGT_INDEX]
    return out


def plan_scan(crystal, zone, calibration, shape, *, disk_mrad, x_axis=None,
              min_strength=0.05, points_per_line=12, search_mrad=0.3, line_width_mrad=0.06,
              inner_potential=False, systematic_covariance="floor", sample_axes=None,
              reference=None):
    """Prepare the per-pattern fit of a zone axis with a calibration held.

    Parameters
    ----------
    crystal : Crystal
        Reference crystal (the strain reference).
    zone : sequence of 3 int
    calibration : Calibration or (kv, Detector)
        Effective voltage and detector from a reference fit.
    shape : (rows, cols)
        Pattern size in pixels.
    disk_mrad : float
        Radius of the central disk, mrad.
    x_axis : sequence of 3 int, optional
        As for :func:`laueline.lines.predict`; must match the calibration's.
    min_strength : float
        Weaker predicted lines are not sampled.
    points_per_line : int
        Profiles across each line (at least 3).
    search_mrad : float
        Half-width of the first search window around the calibrated line
        position: the largest line shift expected (a strain of 1e-3 moves
        HOLZ lines by up to about 0.2 mrad).
    line_width_mrad : float
        Typical full width of a line, mrad; sets the smoothing and the
        second, narrow window.
    inner_potential : bool
    systematic_covariance : ndarray (6, 6) or "floor", optional
        Systematic covariance of the strain from the kinematic model.  By
        default ("floor") the conservative kinematic-bias floor for fits with
        a calibration held (:data:`laueline.dynamical.KINEMATIC_BIAS_FLOOR`,
        2e-4 per component): the change of the dynamical line shifts between
        the reference and the strained region, which neither the calibration
        nor a reference pattern removes.  None for none.
    sample_axes : ndarray (3, 3), optional
        Rows of a sample frame (:func:`laueline.strain.sample_axes`).
    reference : ndarray (rows, cols), optional
        A pattern of the unstrained reference region (for example the one
        the calibration was made on).  Its measured line positions replace
        the predicted ones as the zero of every profile, so strain is
        measured relative to it and whatever shifts a line in the same way
        in both (dynamical shifts at a similar thickness, a neighbour's
        tail, detection bias) cancels.  The reference's own measurement
        noise is common to every pattern: its covariance is added to the
        systematic part.

    Returns
    -------
    ScanPlan
    """
    from .lines import line_parameters_batch, locus_distances, predict

    kv, det, _ = _calibration_parts(calibration)
    rows, cols = (int(v) for v in shape)
    for name, value in (("disk_mrad", disk_mrad), ("search_mrad", search_mrad),
                        ("line_width_mrad", line_width_mrad)):
        if not (math.isfinite(float(value)) and float(value) > 0):
            raise InputError(f"{name} must be a positive number, got {value!r}")
    if int(points_per_line) < 3:
        raise InputError(f"points_per_line must be at least 3, got {points_per_line}")
    pattern = predict(crystal, zone, kv, disk_mrad, x_axis=x_axis, min_strength=min_strength,
                      inner_potential=inner_potential)
    K = pattern.beam.wave_number
    zone_r, x_ax = tuple(int(v) for v in pattern.zone), tuple(int(v) for v in pattern.x_axis)
    hkl_all = np.asarray(pattern.hkl)
    hkl_all = hkl_all[np.asarray(pattern.laue_zone) != 0]
    if len(hkl_all) < 4:
        raise InputError(f"only {len(hkl_all)} HOLZ lines are predicted above min_strength "
                         f"{min_strength}: too few to fit a strain")
    A = crystal.basis
    params = line_parameters_batch(A, zone_r, x_ax, K, hkl_all)
    n_lines = len(hkl_all)

    # candidate points along each exact locus: the chord between the disk-edge
    # intersections, moved onto the locus (the straight chord is within a
    # small fraction of a mrad of the conic; one Newton step along the normal)
    radius = 0.9 * disk_mrad * 1e-3
    normal = params.normal
    p_mid = -params.straight_offset[:, None] * normal  # foot of the straight line
    half = np.sqrt(np.maximum(radius ** 2 - np.sum(p_mid ** 2, axis=1), 0.0))
    n_cand = 6 * int(points_per_line)
    frac = (np.arange(n_cand) + 0.5) / n_cand * 2.0 - 1.0
    along = np.stack([-normal[:, 1], normal[:, 0]], axis=1)
    t = p_mid[:, None, :] + (half[:, None] * frac[None, :])[..., None] * along[:, None, :]
    for _ in range(2):
        d = locus_distances(t, params)
        t = t - d[..., None] * normal[:, None, :]
    # away from every other line: by the narrow window plus two line widths for
    # the second stage, by the wide search window for the first
    flat = t.reshape(-1, 2)
    dist_all = np.abs(locus_distances(np.broadcast_to(flat, (n_lines,) + flat.shape), params))
    dist_all = dist_all.reshape(n_lines, n_lines, n_cand)
    dist_all[np.arange(n_lines), np.arange(n_lines)] = np.inf
    clearance_mrad = dist_all.min(axis=0) * 1e3
    narrow = max(0.75 * line_width_mrad, 1.5 / float(det.scale_px_per_mrad))
    clear = ((clearance_mrad > narrow + line_width_mrad)
             & (np.hypot(t[..., 0], t[..., 1]) < radius))
    keep_line = clear.sum(axis=1) >= 3
    if keep_line.sum() < 4:
        raise InputError("fewer than 4 lines have stretches clear of other lines; lower "
                         "min_strength or use a larger disk")
    chosen = []
    for i in np.flatnonzero(keep_line):  # a handful of lines: selection, not a hot path
        idx = np.flatnonzero(clear[i])
        pick = idx[np.unique(np.round(np.linspace(0, len(idx) - 1,
                                                  min(points_per_line, len(idx)))).astype(int))]
        chosen += [(i, j) for j in pick]
    chosen = np.array(chosen)
    line_old = chosen[:, 0]
    t0 = t[chosen[:, 0], chosen[:, 1]]
    window = np.minimum(clearance_mrad[chosen[:, 0], chosen[:, 1]] - line_width_mrad,
                        search_mrad)
    kept_lines = np.unique(line_old)
    point_line = np.searchsorted(kept_lines, line_old)
    hkl = hkl_all[kept_lines]
    params = line_parameters_batch(A, zone_r, x_ax, K, hkl)

    # profile direction: the locus normal at each point (gradient of the
    # Bragg residual), in mrad
    axial = np.sqrt(1.0 - np.sum(t0 ** 2, axis=1))
    grad = params.g_perp[point_line] + (params.gz[point_line] / axial)[:, None] * t0
    nvec = grad / np.linalg.norm(grad, axis=1)[:, None]
    scale = float(det.scale_px_per_mrad)
    step = 0.5 / scale
    reach = search_mrad + 3.0 * line_width_mrad
    steps = np.arange(-math.ceil(reach / step), math.ceil(reach / step) + 1) * step
    t_mrad = t0 * 1e3
    prof = t_mrad[:, None, :] + steps[None, :, None] * nvec[:, None, :]
    px = det.to_pixels(prof)  # (n_points, n_steps, 2) as (x, y)
    inside = ((px[..., 0] >= 0) & (px[..., 0] <= cols - 1) & (px[..., 1] >= 0)
              & (px[..., 1] <= rows - 1)).all(axis=1)
    if inside.sum() < 12:
        raise InputError("the disk of the calibration lies mostly outside a pattern of "
                         f"{cols} x {rows} px")
    point_line, t_mrad, nvec, px = (point_line[inside], t_mrad[inside], nvec[inside],
                                    px[inside])
    window = window[inside]
    along_px = np.linalg.norm(px[:, 1] - px[:, 0], axis=1) / step
    point_params = type(params)(params.g_perp[point_line], params.g_perp_norm[point_line],
                                params.gz[point_line], params.c[point_line])
    # bands along the line cover about half the gap between neighbouring points
    spacing_px = 2 * 0.9 * disk_mrad * float(det.scale_px_per_mrad) / int(points_per_line)
    half_length = float(np.clip(0.25 * spacing_px, 4.0, 12.0))
    band = _band_pixels(t_mrad, nvec, point_params, det, steps, (rows, cols),
                        half_length_px=half_length)

    # line positions along the fixed profiles as functions of the parameters:
    # the pixel of the calibrated point and of one a little further along the
    # profile, mapped back into the disk frame by the shifted detector, and
    # the locus crossing found by linear interpolation between them
    p0, p1 = px[:, np.argmin(np.abs(steps))], px[:, np.argmin(np.abs(steps)) + 1]
    s0, s1 = steps[np.argmin(np.abs(steps))], steps[np.argmin(np.abs(steps)) + 1]
    theta = np.zeros((1 + 2 * len(_PARAMETERS), len(_PARAMETERS)))
    for k in range(len(_PARAMETERS)):
        theta[1 + 2 * k, k] = _STEPS[k]
        theta[2 + 2 * k, k] = -_STEPS[k]
    e = np.zeros((len(theta), 3, 3))
    for j, (a, b) in enumerate(_VOIGT_INDEX):
        e[:, a, b] = theta[:, j]
        e[:, b, a] = theta[:, j]
    bases = (np.eye(3) + e) @ A
    stack = line_parameters_batch(bases, zone_r, x_ax, K, hkl)
    inv_m = np.linalg.inv(det.matrix)
    centre = np.asarray(det.center_px, float) + theta[:, 6:8]
    ta = (p0[None] - centre[:, None, :]) @ inv_m.T * 1e-3
    tb = (p1[None] - centre[:, None, :]) @ inv_m.T * 1e-3
    sub = type(stack)(stack.g_perp[:, point_line], stack.g_perp_norm[:, point_line],
                      stack.gz[:, point_line], stack.c[:, point_line])
    da = locus_distances(ta[..., None, :], sub)[..., 0]
    db = locus_distances(tb[..., None, :], sub)[..., 0]
    position = s0 - da * (s1 - s0) / (db - da)  # mrad along the profile
    offset0 = position[0]
    jac = (position[1::2] - position[2::2]).T / (2 * _STEPS)[None, :]

    if isinstance(systematic_covariance, str) and systematic_covariance == "floor":
        from .dynamical import KINEMATIC_BIAS_FLOOR

        systematic = np.eye(6) * KINEMATIC_BIAS_FLOOR["calibrated"] ** 2
    elif systematic_covariance is None:
        systematic = np.zeros((6, 6))
    else:
        systematic = np.asarray(systematic_covariance, float).reshape(6, 6)
    rotation = None if sample_axes is None else _voigt_rotation(sample_axes)
    settings = {
        "zone": list(zone_r), "x_axis": list(x_ax), "kv": kv, "disk_mrad": float(disk_mrad),
        "detector": det.as_dict(), "min_strength": float(min_strength),
        "points_per_line": int(points_per_line), "search_mrad": float(search_mrad),
        "line_width_mrad": float(line_width_mrad), "inner_potential": bool(inner_potential),
        "structure": getattr(crystal, "name", ""), "cell": [float(v) for v in crystal.cell],
        "shape": [rows, cols],
        "sample_axes": None if sample_axes is None else np.asarray(sample_axes).tolist(),
    }
    plan = ScanPlan(
        hkl=hkl, point_line=point_line, band=band, steps_mrad=steps,
        offset0_mrad=offset0, jacobian=jac, px_per_mrad_along=along_px, shape=(rows, cols),
        search_mrad=float(search_mrad), refine_window_mrad=narrow, window_mrad=window,
        smooth_samples=max(0.5, 0.25 * line_width_mrad / step),
        fit_half_width_mrad=max(0.5 * line_width_mrad, 1.0 / scale),
        systematic_covariance=systematic, sample_rotation=rotation, settings=settings)
    if reference is not None:
        plan = _relative_to_reference(plan, reference)
    return plan


def _relative_to_reference(plan, reference):
    """The plan with the reference pattern's measured positions as profile zeros."""
    from dataclasses import replace

    reference = np.asarray(reference, dtype=np.float32)
    if reference.shape != tuple(plan.shape):
        raise InputError(f"the reference pattern is {reference.shape[1]} x {reference.shape[0]}"
                         f" px, the scan's patterns {plan.shape[1]} x {plan.shape[0]} px")
    measured = _measure(reference, plan, 4.0)
    if isinstance(measured, str):
        raise InputError(f"the reference pattern cannot be measured: {measured}")
    fit = fit_pattern(reference, plan)
    if not fit.ok:
        raise InputError(f"the reference pattern does not fit the calibration: {fit.message}")
    pos, _, use, _ = measured
    keep = np.flatnonzero(use)
    n_steps = len(plan.steps_mrad)
    new_index = np.full(plan.n_points, -1)
    new_index[keep] = np.arange(len(keep))
    band = plan.band
    pixel_kept = new_index[band["point"]] >= 0
    point = new_index[band["point"][pixel_kept]]
    flat_bin = point * n_steps + band["bin"][pixel_kept] % n_steps
    rows = np.arange(plan.n_points * n_steps).reshape(plan.n_points, n_steps)[keep].ravel()
    empty_old = np.zeros(plan.n_points * n_steps, bool)
    empty_old[band["empty"]] = True
    remap = np.full(plan.n_points * n_steps, -1)
    remap[rows] = np.arange(len(rows))
    empty_kept = empty_old[rows]
    old_empty_rows = rows[empty_kept]
    order = np.searchsorted(band["empty"], old_empty_rows)
    new_band = {"pixel": band["pixel"][pixel_kept], "bin": flat_bin, "s": band["s"][pixel_kept],
                "point": point, "inverse_count": band["inverse_count"][rows],
                "empty": remap[old_empty_rows], "left": remap[band["left"][order]],
                "right": remap[band["right"][order]],
                "weight_right": band["weight_right"][order]}
    used_lines = np.unique(plan.point_line[keep])
    settings = dict(plan.settings, reference="measured")
    return replace(plan, hkl=plan.hkl[used_lines],
                   point_line=np.searchsorted(used_lines, plan.point_line[keep]),
                   band=new_band, offset0_mrad=pos[keep], jacobian=plan.jacobian[keep],
                   px_per_mrad_along=plan.px_per_mrad_along[keep],
                   window_mrad=plan.window_mrad[keep],
                   systematic_covariance=plan.systematic_covariance
                   + fit.covariance_statistical, settings=settings)


# ---------------------------------------------------------------------------
# per pattern
# ---------------------------------------------------------------------------

@dataclass
class PatternFit:
    """Strain of one pattern with the calibration held.

    Attributes
    ----------
    strain : ndarray (6,)
        Green-Lagrange components exx eyy ezz eyz exz exy, crystal frame.
    covariance_statistical, covariance_systematic, covariance : ndarray (6, 6)
    center_shift_px : ndarray (2,)
        Move of the pattern centre from the calibration's.
    rms_px : float
        Root-mean-square residual of the line positions, px.
    n_lines, n_points : int
        Lines and profile points used.
    line_sigma_px : float
        The per-line error term estimated from the residuals, px.
    ok : bool
    message : str
    """

    strain: np.ndarray
    covariance_statistical: np.ndarray
    covariance_systematic: np.ndarray
    center_shift_px: np.ndarray
    rms_px: float
    n_lines: int
    n_points: int
    line_sigma_px: float
    ok: bool
    message: str = ""

    @property
    def covariance(self):
        return self.covariance_statistical + self.covariance_systematic

    @property
    def sigma(self):
        return np.sqrt(np.diag(self.covariance))


def _band_pixels(t_mrad, nvec, params, det, steps, shape, half_length_px=4):
    """Pixels of a band across the locus at each point, binned by distance.

    Every pixel centre within ``half_length_px`` of the normal through a
    point, along the line, and within the profile's reach across it is
    given the bin of its signed distance from the exact (curved) locus
    (:func:`laueline.lines.locus_distances`, through the detector mapping).  A line crossing the pixel grid at an angle samples
    every sub-pixel distance, so the binned profile is finer than the
    pixels and free of the pull towards pixel centres that interpolating a
    narrow line suffers (the slanted-edge principle).  Bins no pixel falls
    into are filled by linear interpolation from their neighbours.
    """
    rows, cols = shape
    n_points, n_steps = len(t_mrad), len(steps)
    step = steps[1] - steps[0]
    centre_px = det.to_pixels(t_mrad)
    normal_px = det.to_pixels(t_mrad + nvec) - centre_px
    normal_px /= np.linalg.norm(normal_px, axis=1)[:, None]
    along_px = np.stack([-normal_px[:, 1], normal_px[:, 0]], axis=1)
    reach_px = float(np.max(np.abs(steps))) * float(det.scale_px_per_mrad) * 1.05
    radius = int(math.ceil(math.hypot(reach_px, half_length_px))) + 1
    grid = np.arange(-radius, radius + 1)
    gx, gy = np.meshgrid(grid, grid)
    base = np.round(centre_px)
    pix = base[:, None, :] + np.stack([gx.ravel(), gy.ravel()], axis=1)[None]
    rel = pix - centre_px[:, None, :]
    u = np.sum(rel * along_px[:, None, :], axis=2)
    from .lines import locus_distances

    s = locus_distances(det.to_mrad(pix) * 1e-3, params) * 1e3
    s *= np.sign(np.sum(params.g_perp * nvec, axis=1))[:, None]
    b = np.round((s - steps[0]) / step).astype(np.int64)
    keep = ((np.abs(u) <= half_length_px) & (b >= 0) & (b < n_steps)
            & (pix[..., 0] >= 0) & (pix[..., 0] <= cols - 1)
            & (pix[..., 1] >= 0) & (pix[..., 1] <= rows - 1))
    point = np.broadcast_to(np.arange(n_points)[:, None], keep.shape)[keep]
    flat_bin = point * n_steps + b[keep]
    pixel = (pix[..., 1][keep] * cols + pix[..., 0][keep]).astype(np.int64)
    count = np.bincount(flat_bin, minlength=n_points * n_steps).astype(float)
    filled = count > 0
    index = np.arange(n_points * n_steps)
    # nearest filled bins to the left and right within the same profile
    left = np.maximum.accumulate(np.where(filled, index, -1))
    right = np.minimum.accumulate(np.where(filled, index, n_points * n_steps)[::-1])[::-1]
    same_row = lambda j: (j >= 0) & (j < n_points * n_steps) & (  # noqa: E731
        np.clip(j, 0, n_points * n_steps - 1) // n_steps == index // n_steps)
    ok_left, ok_right = same_row(left), same_row(right)
    left = np.where(ok_left, left, np.where(ok_right, right, index))
    right = np.where(ok_right, right, left)
    span = np.maximum(right - left, 1)
    weight_right = np.where(right > left, (index - left) / span, 0.0)
    return {"pixel": pixel, "bin": flat_bin, "s": s[keep], "point": point.astype(np.int64), "inverse_count": np.where(filled, 1 / np.maximum(count, 1), 0.0),
            "empty": np.flatnonzero(~filled), "left": left[~filled], "right": right[~filled],
            "weight_right": weight_right[~filled]}


def _band_profiles(image, band, n_points, n_steps):
    """Mean intensity in every distance bin of every band, (n_points, n_steps)."""
    values = image.ravel()[band["pixel"]]
    profile = np.bincount(band["bin"], weights=values, minlength=n_points * n_steps)
    profile *= band["inverse_count"]
    if len(band["empty"]):
        w = band["weight_right"]
        profile[band["empty"]] = (profile[band["left"]] * (1 - w) + profile[band["right"]] * w)
    return profile.reshape(n_points, n_steps)


def _pixel_minima(band, values, level, coarse, half_width, n_points, point_line):
    """Deficit minima refined on the pixels themselves.

    A parabola in the exact distance s is fitted by least squares to the
    relative intensities of the pixels of each band within ``half_width``
    of the current estimate, re-centred three times.  Working on pixels at
    their true distances (rather than on binned or interpolated profiles)
    avoids any pull of the minimum towards pixel centres or bin centres.

    Returns position (mrad) and its 1-sigma from the scatter of the pixels
    about the parabola; NaN where the fit fails.
    """
    point, s = band["point"], band["s"]
    y = values / level[point]
    centre = np.where(np.isfinite(coarse), coarse, 0.0)
    # a smooth background sloping across the line pulls its minimum sideways:
    # divide by the straight line through the wings (beyond three half-widths)
    d = s - centre[point]
    wing = np.abs(d) > 3 * half_width
    n_w = np.bincount(point[wing], minlength=n_points).astype(float)
    m_d = np.bincount(point[wing], d[wing], n_points) / np.maximum(n_w, 1)
    m_y = np.bincount(point[wing], y[wing], n_points) / np.maximum(n_w, 1)
    dd = d[wing] - m_d[point[wing]]
    var_d = np.bincount(point[wing], dd ** 2, n_points)
    cov_dy = np.bincount(point[wing], dd * (y[wing] - m_y[point[wing]]), n_points)
    slope = np.where((n_w >= 8) & (var_d > 0), cov_dy / np.where(var_d > 0, var_d, 1.0), 0.0)
    base = np.where(n_w >= 8, m_y - slope * m_d, 1.0)
    base = np.where(base > 0, base, 1.0)
    y = y / (base[point] + slope[point] * d) * base[point]
    ok = np.isfinite(coarse)
    sigma = np.full(n_points, np.nan)
    near = np.abs(d) <= 1.6 * half_width  # the pixels any re-centred window can reach
    point, s, y = point[near], s[near], y[near]
    for _ in range(3):
        x = (s - centre[point]) / half_width
        inside = np.abs(x) <= 1.0
        p_in, x_in, y_in = point[inside], x[inside], y[inside]
        x2 = x_in * x_in
        sums = np.stack([np.bincount(p_in, None, n_points), np.bincount(p_in, x_in, n_points),
                         np.bincount(p_in, x2, n_points), np.bincount(p_in, x2 * x_in, n_points),
                         np.bincount(p_in, x2 * x2, n_points)])
        rhs = np.stack([np.bincount(p_in, y_in, n_points), np.bincount(p_in, y_in * x_in, n_points),
                        np.bincount(p_in, y_in * x2, n_points)])
        normal = np.stack([sums[0:3], sums[1:4], sums[2:5]], axis=0).transpose(2, 0, 1)
        enough = sums[0] >= 6
        normal[~enough] = np.eye(3)
        coef = np.linalg.solve(normal, rhs.T[..., None])[..., 0]
        b, c = coef[:, 1], coef[:, 2]
        good = enough & (c > 0)
        shift = np.where(good, np.clip(-b / (2 * np.where(good, c, 1.0)), -0.5, 0.5), 0.0)
        centre = centre + shift * half_width
        ok &= good
        if np.all(np.abs(shift[ok]) < 0.01):
            break
    resid = y_in - (coef[p_in, 0] + coef[p_in, 1] * x_in + coef[p_in, 2] * x_in ** 2)
    dof = np.maximum(sums[0] - 3, 1)
    var = np.bincount(p_in, resid ** 2, n_points) / dof
    inv = np.linalg.inv(normal)
    # weights from pooled estimates: the pixel noise of the whole pattern and
    # the curvature of each line (estimates from a few pixels per point
    # scatter too much to weight with)
    ok &= (np.abs(shift) < 0.05) & np.isfinite(var) & (var > 0)
    if not np.any(ok):
        return np.full(n_points, np.nan), np.full(n_points, np.nan)
    pooled_var = float(np.median(var[ok]))
    n_line = np.bincount(point_line[ok], minlength=int(point_line.max()) + 1)
    c_line = np.bincount(point_line[ok], c[ok], len(n_line)) / np.maximum(n_line, 1)
    c_point = np.where(n_line[point_line] >= 2, c_line[point_line], c)
    with np.errstate(divide="ignore", invalid="ignore"):
        sigma = np.sqrt(pooled_var * inv[:, 1, 1]) / (2 * np.abs(c_point)) * half_width
    ok &= np.isfinite(sigma) & (c_point > 0)
    return np.where(ok, centre, np.nan), np.where(ok, sigma, np.nan)


def _sample_rows(values, index):
    """Linear interpolation of each row of ``values`` at fractional indices (n, m)."""
    n_steps = values.shape[1]
    index = np.clip(index, 0.0, n_steps - 1.000001)
    lo = np.floor(index).astype(int)
    frac = index - lo
    rows = np.arange(len(values))[:, None]
    return values[rows, lo] * (1.0 - frac) + values[rows, lo + 1] * frac


def _locate_minima(profiles, steps, centre_mrad, half_window_mrad, smooth):
    """Sub-sample positions of the deepest point of each profile in a window.

    The profiles are divided by their median level and smoothed (Gaussian,
    ``smooth`` samples), the lowest sample in the window is taken, and a
    parabola is fitted to the smoothed profile in a window re-centred on its
    own vertex (twice), so that the window's placement does not pull the
    result.  Smoothing a symmetric dip leaves its minimum in place; for an
    asymmetric dip the result is the minimum of the smoothed profile.

    Returns position (mrad), its 1-sigma (mrad) and the signal-to-noise ratio
    of the dip; NaN where no dip is found.
    """
    from scipy.ndimage import gaussian_filter1d

    step = steps[1] - steps[0]
    level = np.median(profiles, axis=1, keepdims=True)
    level = np.where(level > 0, level, 1.0)
    rel = profiles / level
    # point noise of the relative profile from differences of neighbours
    diff = rel[:, 2:] - rel[:, :-2]  # samples a pixel apart: nearly independent
    noise = 1.4826 * np.median(np.abs(diff - np.median(diff, axis=1, keepdims=True)),
                               axis=1) / math.sqrt(2)
    noise = np.maximum(noise, 1e-6)
    smoothed = gaussian_filter1d(rel, smooth, axis=1, mode="nearest")
    half = np.broadcast_to(np.asarray(half_window_mrad, float), centre_mrad.shape)
    inside = np.abs(steps[None, :] - centre_mrad[:, None]) <= half[:, None]
    k = np.argmin(np.where(inside, smoothed, np.inf), axis=1)
    h = max(2, int(round(1.5 * smooth)))
    offsets = np.arange(-h, h + 1, dtype=float)
    X = np.stack([np.ones_like(offsets), offsets, offsets ** 2], axis=1)
    pinv = np.linalg.pinv(X)
    centre = k.astype(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        for _ in range(3):
            coef = _sample_rows(smoothed, centre[:, None] + offsets[None, :]) @ pinv.T
            b, c = coef[:, 1], coef[:, 2]
            shift = np.clip(-b / (2 * c), -h, h)
            centre = centre + np.where(c > 0, shift, 0.0)
        # the vertex uncertainty: the point noise through the parabola's slope term
        cov_diag = np.diag(np.linalg.inv(X.T @ X))
        sigma_v = noise * np.sqrt(cov_diag[1]) / (2 * np.abs(c))
    smoothed_noise = noise / math.sqrt(2 * math.sqrt(math.pi) * smooth)
    depth = np.median(smoothed, axis=1) - _sample_rows(smoothed, centre[:, None])[:, 0]
    snr = depth / smoothed_noise
    good = ((c > 0) & np.isfinite(sigma_v) & (np.abs(shift) < 0.5)
            & (np.abs(centre - k) <= h) & (centre > h) & (centre < len(steps) - 1 - h))
    position = np.where(good, steps[0] + centre * step, np.nan)
    return position, np.where(good, sigma_v * step, np.nan), np.where(good, snr, 0.0)


def _line_model_covariance(jac, y, sigma, line_index, n_lines):
    """GLS solution, covariance and per-line term for points grouped by line.

    The error model of :mod:`laueline.uncertainty`: residual covariance
    V = s^2 diag(sigma^2) + tau^2 Z Z^T (Z: point-to-line incidence).  The
    point noise is scaled up by s >= 1 when the scatter within lines exceeds
    what the profiles promise; the line sigma tau is the restricted
    maximum-likelihood estimate given that point noise.

    Returns (theta, covariance, tau) with tau in the units of ``y``.
    """
    from .uncertainty import (estimate_line_sigma, gls_solve, line_point_loading,
                              residual_covariance)

    loading = line_point_loading(line_index, n_lines)
    n, p = jac.shape
    theta, _ = gls_solve(jac, y, residual_covariance(loading, sigma, 0.0))
    r = y - jac @ theta
    w = 1.0 / sigma ** 2
    W_l = np.bincount(line_index, w, n_lines)
    mean_l = np.bincount(line_index, w * r, n_lines) / np.where(W_l > 0, W_l, 1.0)
    within = float(np.sum(w * (r - mean_l[line_index]) ** 2))
    sigma = sigma * math.sqrt(max(1.0, within / max(n - n_lines, 1)))
    tau = estimate_line_sigma(r, loading, sigma, jac).line_sigma
    theta, cov = gls_solve(jac, y, residual_covariance(loading, sigma, tau))
    return theta, cov, tau


def _robust_linear_fit(J, y, sigma, use, floor):
    """Weighted linear fit with iterative rejection of points far from the consensus.

    Returns (theta, covariance scaled by max(1, chi2/dof), mask used), or
    (None, None, mask) when too few points remain.
    """
    n_par = J.shape[1]
    theta = cov = None
    for _ in range(5):
        if use.sum() < n_par + 3:
            return None, None, use
        sw = 1.0 / np.maximum(sigma[use], 1e-5)
        A = J[use] * sw[:, None]
        theta = np.linalg.lstsq(A, y[use] * sw, rcond=None)[0]
        r = y - J @ theta
        spread = 1.4826 * float(np.median(np.abs(r[use])))
        new = use & (np.abs(r) <= max(4.0 * spread, floor))
        if np.array_equal(new, use):
            break
        use = new
    chi2 = float(np.sum((r[use] / sigma[use]) ** 2)) / max(int(use.sum()) - n_par, 1)
    cov = np.linalg.pinv(A.T @ A) * max(chi2, 1.0)
    return theta, cov, use


def _measure(image, plan, min_snr):
    """Line positions along every profile of one pattern.

    Returns (positions, sigmas, used, theta) with positions and sigmas in
    mrad along the profiles, ``used`` the points that passed every check,
    and theta the linear-fit parameters; or a message (str) on failure.
    """
    n_par = len(_PARAMETERS)
    profiles = _band_profiles(image, plan.band, plan.n_points, len(plan.steps_mrad))
    pixels = image.ravel()[plan.band["pixel"]].astype(float)
    level = np.median(profiles, axis=1)
    level = np.where(level > 0, level, 1.0)
    steps = plan.steps_mrad
    J, s0 = plan.jacobian, plan.offset0_mrad

    floor = 2.0 * (steps[1] - steps[0])
    # first stage: one shift per line from the line's profiles averaged (a
    # strain of 1e-3 moves a line nearly rigidly; neighbours that cross some
    # of its profiles are smeared out by the average), searched widely
    counts = np.bincount(plan.point_line, minlength=plan.n_lines).astype(float)
    incidence = np.zeros((plan.n_lines, plan.n_points))
    incidence[plan.point_line, np.arange(plan.n_points)] = 1.0 / counts[plan.point_line]
    line_profiles = incidence @ (profiles / level[:, None])
    J_line, s0_line = incidence @ J, incidence @ s0
    pos, sig, snr = _locate_minima(line_profiles, steps, s0_line, plan.search_mrad,
                                   plan.smooth_samples)
    use = np.isfinite(pos) & (snr >= min_snr)
    theta, cov_theta, use = _robust_linear_fit(J_line, pos - s0_line, sig, use, floor)
    if theta is None:
        return f"only {int(use.sum())} lines found in the first search"
    line_found = use  # a point counts only on a line whose averaged profile shows it
    predicted = s0 + J @ theta
    predicted_sigma = np.sqrt(np.maximum(np.sum((J @ cov_theta) * J, axis=1), 0))
    use = np.zeros(plan.n_points, bool)
    for _ in range(4):
        eligible = 3.0 * predicted_sigma + 0.5 * floor <= plan.window_mrad
        pos, sig, snr = _locate_minima(profiles, steps, predicted, plan.window_mrad,
                                       plan.smooth_samples)
        pos, sig = _pixel_minima(plan.band, pixels, level, pos, plan.fit_half_width_mrad,
                                 plan.n_points, plan.point_line)
        previous = use
        use = (eligible & line_found[plan.point_line] & np.isfinite(pos)
               & (snr >= 0.5 * min_snr))
        theta, cov_theta, use = _robust_linear_fit(J, pos - s0, sig, use, floor)
        if theta is None:
            return f"only {int(use.sum())} line points found"
        predicted = s0 + J @ theta
        predicted_sigma = np.sqrt(np.maximum(np.sum((J @ cov_theta) * J, axis=1), 0))
        if np.array_equal(use, previous):
            break
    return pos, sig, use, theta


def fit_pattern(image, plan, *, min_snr=4.0):
    """Strain of one pattern with the calibration held.

    Parameters
    ----------
    image : ndarray (rows, cols)
    plan : ScanPlan
    min_snr : float
        Profiles whose dip is weaker than this many noise sigmas are left out.

    Returns
    -------
    PatternFit
    """
    image = np.asarray(image, dtype=np.float32)
    n_par = len(_PARAMETERS)
    failed = PatternFit(np.full(6, np.nan), np.full((6, 6), np.nan), plan.systematic_covariance,
                        np.full(2, np.nan), float("nan"), 0, 0, float("nan"), False)
    if image.shape != tuple(plan.shape):
        failed.message = f"pattern of shape {image.shape} differs from the plan's {plan.shape}"
        return failed
    if not np.all(np.isfinite(image)):
        image = np.nan_to_num(image, nan=0.0, posinf=0.0, neginf=0.0)
    measured = _measure(image, plan, min_snr)
    if isinstance(measured, str):
        failed.message = measured
        return failed
    pos, sig, use, theta = measured
    J, s0 = plan.jacobian, plan.offset0_mrad
    lines_used = np.unique(plan.point_line[use])
    if len(lines_used) < 4:
        failed.message = f"only {len(lines_used)} lines found"
        return failed
    px_along = plan.px_per_mrad_along
    resid_px = (pos - s0 - J @ theta)[use] * px_along[use]
    sigma_px = sig[use] * px_along[use]
    J_px = J[use] * px_along[use][:, None]
    line_index = np.searchsorted(lines_used, plan.point_line[use])
    theta_gls, cov, tau = _line_model_covariance(J_px, (pos - s0)[use] * px_along[use],
                                                 sigma_px, line_index, len(lines_used))
    e = np.zeros((3, 3))
    for j, (a, b) in enumerate(_VOIGT_INDEX):
        e[a, b] = e[b, a] = theta_gls[j]
    green = e + 0.5 * e @ e  # E = ((I + e)^T (I + e) - I) / 2 for symmetric e
    strain = np.array([green[a, b] for a, b in _VOIGT_INDEX])
    # to first order E and e share their covariance (second-order terms ~ e sigma)
    cov6 = cov[:6, :6]
    dof = len(resid_px) - n_par
    rms = float(np.sqrt(np.mean((J_px @ (theta - theta_gls) + resid_px) ** 2)))
    chi_norm = float(np.sqrt(np.mean(((J_px @ (theta - theta_gls) + resid_px) / sigma_px) ** 2)))
    ok = bool(np.all(np.isfinite(strain)) and dof > 0 and np.all(np.diag(cov6) > 0))
    message = "" if ok else "degenerate fit"
    if ok and chi_norm > 10 and rms > 1.0:
        ok, message = False, (f"residuals of {rms:.2f} px, {chi_norm:.1f} times the line "
                              "noise: the pattern does not match the calibrated prediction")
    return PatternFit(strain, cov6, plan.systematic_covariance, theta_gls[6:8], rms,
                      int(len(lines_used)), int(use.sum()), float(tau), ok, message)


# ---------------------------------------------------------------------------
# scans
# ---------------------------------------------------------------------------

@dataclass
class Scan:
    """A stack of patterns to map, read lazily.

    Attributes
    ----------
    data : dask.array.Array
        Shape (n,) + (rows, cols) for a line scan or (ny, nx, rows, cols) for a
        map; chunks hold whole patterns.
    nav_dims : tuple of str
        ``("scan",)`` or ``("scan_y", "scan_x")``.
    nav_coords : dict
        For each navigation dimension, (values, unit): positions in nm where
        the file gives a step, else in steps.
    source : str
    metadata : dict
        What was taken from the file (voltage, scale, ...), for the record.
    reader : callable or None
        ``reader(slices) -> ndarray`` reading one chunk afresh from the
        source (picklable, so that workers read for themselves and a chunk
        that cannot be read fails alone); None for arrays held in memory.
    in_memory : ndarray or None
        The array itself when the scan is held in memory: each task is then
        sent its own slice, not the whole array.
    """

    data: object
    nav_dims: tuple
    nav_coords: dict
    source: str
    metadata: dict = field(default_factory=dict)
    reader: object = None
    in_memory: object = None

    @property
    def nav_shape(self):
        return tuple(self.data.shape[:-2])

    @property
    def pattern_shape(self):
        return tuple(self.data.shape[-2:])

    @property
    def n_patterns(self):
        return int(np.prod(self.nav_shape))


def _nav_dims(ndim):
    if ndim == 3:
        return ("scan",)
    if ndim == 4:
        return ("scan_y", "scan_x")
    raise InputError(f"a scan must be a 3-D line scan or a 4-D map of patterns; got {ndim} "
                     "dimensions")


def scan_from_array(array, *, step_nm=None, source="array", chunk_patterns=64, metadata=None):
    """Wrap a numpy or dask array (n, rows, cols) or (ny, nx, rows, cols) as a Scan.

    Parameters
    ----------
    array : array_like or dask.array.Array
    step_nm : float or (float, float), optional
        Scan step; positions are in steps when not given.
    chunk_patterns : int
        Patterns per chunk (the unit of work and of resumption).
    """
    import dask.array as da

    if not isinstance(array, da.Array):
        array = np.asarray(array) if not hasattr(array, "shape") else array
    dims = _nav_dims(len(array.shape))
    if min(array.shape[-2:]) < 16:
        raise InputError(f"patterns of {array.shape[-1]} x {array.shape[-2]} px are too small")
    if any(n == 0 for n in array.shape[:-2]):
        raise InputError("the scan holds no pattern")
    nav_chunks = _nav_chunks(array.shape[:-2], chunk_patterns)
    in_memory = None
    if isinstance(array, da.Array):
        data = array.rechunk(nav_chunks + (-1, -1))
    else:
        data = da.from_array(array, chunks=nav_chunks + (-1, -1))
        if isinstance(array, np.ndarray) and not isinstance(array, np.memmap):
            in_memory = array
    steps = (np.broadcast_to(np.asarray(step_nm, float), (len(dims),))
             if step_nm is not None else None)
    coords = {}
    for k, name in enumerate(dims):
        n = array.shape[k]
        if steps is None:
            coords[name] = (np.arange(n, dtype=float), "step")
        else:
            coords[name] = (np.arange(n) * float(steps[k]), "nm")
    scan = Scan(data, dims, coords, str(source), dict(metadata or {}))
    scan.in_memory = in_memory
    return scan


def _nav_chunks(nav_shape, chunk_patterns):
    chunk_patterns = max(1, int(chunk_patterns))
    if len(nav_shape) == 1:
        return (min(nav_shape[0], chunk_patterns),)
    nx = nav_shape[1]
    if nx >= chunk_patterns:
        return (1, chunk_patterns)
    return (max(1, min(nav_shape[0], chunk_patterns // nx)), nx)


def open_scan(path, *, chunk_patterns=64, step_nm=None):
    """Open a scan lazily: .npy, .zarr, a folder of images, or a microscope file.

    Parameters
    ----------
    path : str or Path
    chunk_patterns : int
        Patterns per chunk.
    step_nm : float, optional
        Scan step, overriding the file's.

    Returns
    -------
    Scan
    """
    import dask.array as da

    path = Path(path)
    if not path.exists():
        raise InputError(f"cannot read {path}: no such file or folder")
    suffix = path.suffix.lower()
    if path.is_dir() and suffix != ".zarr":
        return _scan_from_folder(path, chunk_patterns, step_nm)
    arrays = {".npy": (lambda: np.load(path, mmap_mode="r", allow_pickle=False), _read_npy),
              ".zarr": (lambda: da.from_zarr(str(path)), _read_zarr)}
    if suffix in arrays:
        opener, reader = arrays[suffix]
        try:
            array = opener()
        except Exception as exc:
            raise InputError(f"{path}: not a readable {suffix} array ({_first_line(exc)})") \
                from None
        scan = scan_from_array(array, step_nm=step_nm, source=str(path),
                               chunk_patterns=chunk_patterns)
        scan.reader = partial(reader, str(path))
        return scan
    return _scan_from_microscope_file(path, chunk_patterns, step_nm)


def _read_npy(path, slices):
    return np.asarray(np.load(path, mmap_mode="r", allow_pickle=False)[slices], dtype=float)


def _read_zarr(path, slices):
    import zarr

    return np.asarray(zarr.open_array(path, mode="r")[slices], dtype=float)


def _read_files(paths, slices):
    from .images.io import read_image

    (index,) = slices
    return np.stack([read_image(p)[0] for p in paths[index]])


def _first_line(exc):
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def _scan_from_folder(folder, chunk_patterns, step_nm):
    import dask
    import dask.array as da

    from .images.io import IMAGE_SUFFIXES, read_image

    files = sorted(p for p in folder.iterdir() if p.suffix.lower() in IMAGE_SUFFIXES
                   and not p.name.startswith("."))
    if not files:
        raise InputError(f"{folder}: no pattern images ({', '.join(IMAGE_SUFFIXES)}) in the "
                         "folder")
    first, _ = read_image(files[0])
    lazy = [da.from_delayed(dask.delayed(_read_pattern)(str(p)), first.shape, np.float64)
            for p in files]
    data = da.stack(lazy).rechunk((min(len(files), chunk_patterns), -1, -1))
    scan = scan_from_array(data, step_nm=step_nm, source=str(folder),
                           chunk_patterns=chunk_patterns)
    scan.metadata["files"] = [p.name for p in files]
    scan.reader = partial(_read_files, tuple(str(p) for p in files))
    return scan


def _read_pattern(path):
    from .images.io import read_image

    return read_image(path)[0]


def _scan_from_microscope_file(path, chunk_patterns, step_nm):
    from .io.microscope import MICROSCOPE_SUFFIXES, open_microscope_file

    if path.suffix.lower() not in MICROSCOPE_SUFFIXES:
        raise InputError(f"{path}: unsupported scan type '{path.suffix}'; use .npy, .zarr, a "
                         "folder of images or a microscope file "
                         f"({', '.join(sorted(MICROSCOPE_SUFFIXES))})")
    opened = open_microscope_file(path)
    data = opened.data
    if data.ndim not in (3, 4):
        raise InputError(f"{path}: holds a single pattern, not a scan; use refine --image")
    axes = list(opened.metadata.navigation)
    if step_nm is None and axes:
        steps = [_step_in_nm(a) for a in axes]
        step_nm = None if any(s is None for s in steps) else (steps if len(steps) == 2
                                                              else steps[0])
    scan = scan_from_array(data, step_nm=step_nm, source=str(path),
                           chunk_patterns=chunk_patterns, metadata=opened.metadata.as_dict())
    scan.reader = partial(_read_microscope, str(path))
    return scan


def _step_in_nm(axis):
    """A navigation axis' step in nm, or None when its unit is not a length."""
    factor = {"nm": 1.0, "um": 1e3, "µm": 1e3, "a": 0.1, "å": 0.1, "pm": 1e-3,
              "m": 1e9}.get(str(axis.units).strip().lower())
    return None if factor is None or not axis.scale else float(axis.scale) * factor


def _read_microscope(path, slices):
    from .io.microscope import open_microscope_file

    block = open_microscope_file(path).data[slices]
    return np.asarray(block.compute() if hasattr(block, "compute") else block, dtype=float)

# ---------------------------------------------------------------------------
# running a scan: chunks on Dask, results in a zarr store
# ---------------------------------------------------------------------------

def _variables(plan):
    """Names of the per-pattern result variables, in store order."""
    names = list(STRAIN_NAMES) + [f"sigma_{n}" for n in STRAIN_NAMES]
    names += [f"sigma_stat_{n}" for n in STRAIN_NAMES]
    if plan.sample_rotation is not None:
        names += [f"sample_{n}" for n in STRAIN_NAMES]
        names += [f"sigma_sample_{n}" for n in STRAIN_NAMES]
    names += ["center_shift_x_px", "center_shift_y_px", "rms_px", "line_sigma_px",
              "n_lines", "n_points", "ok"]
    return names


_INTEGER_VARIABLES = ("n_lines", "n_points")


def _fit_chunk(block, plan):
    """Results of every pattern of one chunk, as {name: array of the chunk's nav shape}."""
    nav_shape = block.shape[:-2]
    flat = block.reshape((-1,) + block.shape[-2:])
    names = _variables(plan)
    out = {name: np.full(len(flat), np.nan) for name in names}
    out["ok"] = np.zeros(len(flat), bool)
    for name in _INTEGER_VARIABLES:
        out[name] = np.zeros(len(flat), np.int32)
    total_rot = plan.sample_rotation
    for i, image in enumerate(flat):  # patterns are independent; each is vectorised inside
        r = fit_pattern(image, plan)
        if not np.all(np.isfinite(r.strain)):
            continue
        sigma = r.sigma
        sigma_stat = np.sqrt(np.diag(r.covariance_statistical))
        for k, n in enumerate(STRAIN_NAMES):
            out[n][i] = r.strain[k]
            out[f"sigma_{n}"][i] = sigma[k]
            out[f"sigma_stat_{n}"][i] = sigma_stat[k]
        if total_rot is not None:
            s = total_rot @ r.strain
            s_sigma = np.sqrt(np.diag(total_rot @ r.covariance @ total_rot.T))
            for k, n in enumerate(STRAIN_NAMES):
                out[f"sample_{n}"][i] = s[k]
                out[f"sigma_sample_{n}"][i] = s_sigma[k]
        out["center_shift_x_px"][i], out["center_shift_y_px"][i] = r.center_shift_px
        out["rms_px"][i] = r.rms_px
        out["line_sigma_px"][i] = r.line_sigma_px
        out["n_lines"][i] = r.n_lines
        out["n_points"][i] = r.n_points
        out["ok"][i] = r.ok
    return {k: v.reshape(nav_shape) for k, v in out.items()}


def _failed_chunk(nav_shape, plan):
    names = _variables(plan)
    out = {name: np.full(nav_shape, np.nan) for name in names}
    out["ok"] = np.zeros(nav_shape, bool)
    for name in _INTEGER_VARIABLES:
        out[name] = np.zeros(nav_shape, np.int32)
    return out


def _run_chunk(block, plan, region, store, reader):
    """Fit one chunk (reading it first when a reader is given) and store it.

    Returns (region, results or None when stored, n_patterns, n_unreadable).
    """
    nav_shape = tuple(s.stop - s.start for s in region)
    unreadable = 0
    if reader is not None:
        try:
            block = reader(region)
        except Exception:  # a damaged chunk fails alone; its patterns are marked
            block = None
        if block is None or block.shape[:-2] != nav_shape:
            unreadable = int(np.prod(nav_shape))
            results = _failed_chunk(nav_shape, plan)
    if unreadable == 0:
        results = _fit_chunk(np.asarray(block, dtype=np.float32), plan)
    if store is None:
        return region, results, int(np.prod(nav_shape)), unreadable
    import zarr

    group = zarr.open_group(store, mode="r+")
    for name, values in results.items():
        group[name][region] = values
    group["unreadable"][region] = np.full(nav_shape, unreadable > 0)
    group["completed"][region] = np.ones(nav_shape, bool)  # last: marks the chunk done
    return region, None, int(np.prod(nav_shape)), unreadable


def _regions(scan):
    """The nav-space slices of every chunk, in order."""
    import itertools

    chunks = scan.data.chunks[:-2]
    bounds = [np.cumsum((0,) + tuple(c)) for c in chunks]
    out = []
    for idx in itertools.product(*(range(len(c)) for c in chunks)):
        out.append((idx, tuple(slice(int(b[i]), int(b[i + 1])) for b, i in zip(bounds, idx))))
    return out


def _template(scan, plan, attrs):
    """An empty result Dataset with the store's layout (lazy, nothing computed)."""
    import dask.array as da
    import xarray as xr

    shape, chunks = scan.nav_shape, scan.data.chunks[:-2]
    variables = {}
    for name in _variables(plan) + ["completed", "unreadable"]:
        if name in ("ok", "completed", "unreadable"):
            dtype, fill = bool, False
        elif name in _INTEGER_VARIABLES:
            dtype, fill = np.int32, 0
        else:
            dtype, fill = np.float64, np.nan
        variables[name] = (scan.nav_dims, da.full(shape, fill, dtype=dtype, chunks=chunks),
                           _variable_attrs(name))
    coords = {name: (name, values, {"units": unit})
              for name, (values, unit) in scan.nav_coords.items()}
    return xr.Dataset(variables, coords=coords, attrs=attrs)


def _variable_attrs(name):
    base = name.replace("sigma_stat_", "").replace("sigma_sample_", "").replace(
        "sigma_", "").replace("sample_", "")
    if base in STRAIN_NAMES:
        frame = "sample frame" if "sample" in name else "crystal frame"
        if name.startswith("sigma_stat_"):
            what = "statistical 1-sigma of"
        elif name.startswith("sigma_"):
            what = "total 1-sigma (statistical and systematic) of"
        else:
            what = "Green-Lagrange strain"
        return {"long_name": f"{what} {base} ({frame})", "units": "1"}
    return {
        "center_shift_x_px": {"long_name": "pattern centre shift from the calibration, x",
                              "units": "px"},
        "center_shift_y_px": {"long_name": "pattern centre shift from the calibration, y",
                              "units": "px"},
        "rms_px": {"long_name": "rms residual of the line positions", "units": "px"},
        "line_sigma_px": {"long_name": "per-line error term estimated from the residuals",
                          "units": "px"},
        "n_lines": {"long_name": "lines used"},
        "n_points": {"long_name": "line points used"},
        "ok": {"long_name": "fit succeeded and is plausible"},
        "completed": {"long_name": "pattern processed (for resuming an interrupted run)"},
        "unreadable": {"long_name": "pattern could not be read"},
    }.get(name, {})


def _attributes(scan, plan, fingerprint):
    from . import __version__

    return {
        "schema": MAP_SCHEMA,
        "laueline_version": __version__,
        "fingerprint": fingerprint,
        "source": scan.source,
        "settings": json.dumps(plan.settings, sort_keys=True),
        "lines": json.dumps([list(map(int, h)) for h in plan.hkl]),
        "source_metadata": json.dumps(scan.metadata, sort_keys=True, default=str),
        "strain": "Green-Lagrange, components exx eyy ezz eyz exz exy",
        "systematic_covariance": json.dumps(np.asarray(plan.systematic_covariance).tolist()),
        "cautions": ("A TEM lamella relaxes at its free surfaces: the strain is that of the "
                     "thin foil. The kinematic model ignores dynamical line shifts; the "
                     "systematic covariance in the totals is its estimate."),
    }


def _scan_fingerprint(scan, plan):
    h = hashlib.sha256()
    h.update(plan.fingerprint.encode())
    h.update(json.dumps([scan.source, list(scan.data.shape), [list(c) for c in scan.data.chunks],
                         str(scan.data.dtype)]).encode())
    return h.hexdigest()[:16]


def map_strain(scan, plan, *, out=None, force=False, scheduler=None, n_workers=None,
               progress=True):
    """Fit every pattern of a scan with the calibration held.

    Parameters
    ----------
    scan : Scan or array_like
        A :class:`Scan` (:func:`open_scan`) or an array (n, rows, cols) or
        (ny, nx, rows, cols).
    plan : ScanPlan
        From :func:`plan_scan`, made for the scan's pattern size.
    out : str or Path, optional
        A zarr store to write chunk by chunk.  If it exists and was started
        by the same scan and settings, the run continues from its finished
        chunks; a store of another scan or settings is refused unless
        ``force``, which starts it afresh.
    scheduler : str or distributed.Client, optional
        The address of a ``dask.distributed`` scheduler (or a Client).  By
        default a local pool of ``n_workers`` processes (all cores).
    n_workers : int, optional
        Local worker processes; 1 runs in this process.
    progress : bool
        Show a progress bar (patterns done, rate, time left) on stderr.

    Returns
    -------
    xarray.Dataset
        Variables ``exx ... exy`` (Green-Lagrange, crystal frame),
        ``sigma_exx ...`` (total 1-sigma), ``sigma_stat_exx ...``
        (statistical), with a sample frame ``sample_exx ...`` and
        ``sigma_sample_exx ...``; ``rms_px``, ``n_lines``, ``n_points``,
        ``line_sigma_px``, centre shifts, ``ok``.  Dimensions ``scan`` or
        ``scan_y, scan_x``.
    """
    import dask
    import xarray as xr

    if not isinstance(scan, Scan):
        scan = scan_from_array(scan)
    if scan.pattern_shape != tuple(plan.shape):
        raise InputError(f"the scan's patterns are {scan.pattern_shape[1]} x "
                         f"{scan.pattern_shape[0]} px but the calibration was made on "
                         f"{plan.shape[1]} x {plan.shape[0]} px patterns")
    fingerprint = _scan_fingerprint(scan, plan)
    regions = _regions(scan)
    store = None if out is None else str(out)
    todo = regions
    if store is not None:
        todo = _prepare_store(store, scan, plan, fingerprint, regions, force)

    lazy = scan.reader is None and scan.in_memory is None
    blocks = scan.data.to_delayed().reshape(-1) if lazy else None
    index_of = {idx: k for k, (idx, _) in enumerate(regions)}
    tasks = []
    for idx, region in todo:
        if scan.in_memory is not None:
            block = np.ascontiguousarray(scan.in_memory[region])
        else:
            block = blocks[index_of[idx]] if blocks is not None else None
        tasks.append(dask.delayed(_run_chunk, pure=False)(block, plan, region, store,
                                                          scan.reader))
    outcomes = _compute(tasks, scan, todo, scheduler, n_workers, progress)
    unreadable = sum(o[3] for o in outcomes)
    if store is not None:
        ds = xr.open_zarr(store, consolidated=False)
    else:
        ds = _assemble(scan, plan, fingerprint, outcomes)
    ds.attrs["n_unreadable"] = int(unreadable) if store is None else int(
        ds["unreadable"].sum().compute())
    return ds


def _prepare_store(store, scan, plan, fingerprint, regions, force):
    """Create the store, or check it belongs to this run; return the chunks left to do."""
    import xarray as xr

    path = Path(store)
    if path.exists():
        try:
            existing = xr.open_zarr(store, consolidated=False)
            same = existing.attrs.get("fingerprint") == fingerprint
        except Exception:
            existing, same = None, False
        if not same and not force:
            raise InputError(f"{store} holds results of another scan or other settings; give "
                             "force (--force) to start it afresh")
        if same and not force:
            done = np.asarray(existing["completed"].values)
            return [(idx, r) for idx, r in regions if not np.all(done[r])]
        import shutil

        shutil.rmtree(path) if path.is_dir() else path.unlink()
    template = _template(scan, plan, _attributes(scan, plan, fingerprint))
    # laid out beside the final name and renamed into place, so that a run
    # killed while creating it leaves no half-made store behind
    staging = path.with_name(f".{path.name}.{os.getpid()}.part")
    try:
        template.to_zarr(str(staging), mode="w", compute=False, consolidated=False)
        os.rename(staging, path)
    finally:
        if staging.exists():
            import shutil

            shutil.rmtree(staging, ignore_errors=True)
    return regions


def _compute(tasks, scan, todo, scheduler, n_workers, progress):
    """Run the chunk tasks, locally or on a cluster, with a progress bar."""
    import dask

    sizes = [int(np.prod([s.stop - s.start for s in r])) for _, r in todo]
    bar = None
    if progress and tasks:
        from tqdm import tqdm

        bar = tqdm(total=sum(sizes), unit="pattern", desc="patterns", leave=False)
    try:
        if scheduler is not None:
            return _compute_distributed(tasks, scheduler, bar)
        workers = n_workers or os.cpu_count() or 1
        if workers <= 1 or len(tasks) <= 1:
            results = []
            for t in tasks:
                results.append(t.compute(scheduler="synchronous"))
                if bar is not None:
                    bar.update(results[-1][2])
            return results
        from dask.callbacks import Callback

        keys = {t.key for t in tasks}

        class _Progress(Callback):
            def _posttask(self, key, result, dsk, state, worker_id):
                if bar is not None and key in keys:
                    bar.update(result[2])

        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor

        # fork where the platform has it: no re-import of the caller's script
        method = "fork" if "fork" in multiprocessing.get_all_start_methods() else "spawn"
        with ProcessPoolExecutor(min(workers, len(tasks)),
                                 mp_context=multiprocessing.get_context(method)) as pool, \
                _Progress():
            return list(dask.compute(*tasks, scheduler="processes", pool=pool))
    finally:
        if bar is not None:
            bar.close()


def _compute_distributed(tasks, scheduler, bar):
    from distributed import Client, as_completed

    client = scheduler if isinstance(scheduler, Client) else Client(scheduler)
    try:
        futures = client.compute(tasks)
        for future in as_completed(futures):
            if bar is not None:
                bar.update(future.result()[2])
        return client.gather(futures)
    finally:
        if client is not scheduler:
            client.close()


def _assemble(scan, plan, fingerprint, outcomes):
    """The result Dataset from in-memory chunk results."""
    import xarray as xr

    full = _failed_chunk(scan.nav_shape, plan)
    unreadable = np.zeros(scan.nav_shape, bool)
    for region, results, _, n_bad in outcomes:
        for name, values in results.items():
            full[name][region] = values
        unreadable[region] = n_bad > 0
    coords = {name: (name, values, {"units": unit})
              for name, (values, unit) in scan.nav_coords.items()}
    variables = {name: (scan.nav_dims, values, _variable_attrs(name))
                 for name, values in full.items()}
    variables["unreadable"] = (scan.nav_dims, unreadable, _variable_attrs("unreadable"))
    return xr.Dataset(variables, coords=coords, attrs=_attributes(scan, plan, fingerprint))


def map_summary_text(ds, frame_text="reference-cartesian"):
    """A short text summary of a result Dataset for people."""
    ok = np.asarray(ds["ok"].values, bool)
    n = ok.size
    lines = [f"\n{int(ok.sum())} of {n} patterns fitted"
             + (f"; {n - int(ok.sum())} failed or implausible (masked)" if n - ok.sum() else "")]
    n_bad = int(ds.attrs.get("n_unreadable", 0))
    if n_bad:
        lines.append(f"{n_bad} patterns could not be read (marked as failed)")
    if ok.any():
        lines.append("median over fitted patterns (Green-Lagrange, "
                     + ("crystal frame" if "sample_exx" not in ds else frame_text) + "):")
        prefix = "sample_" if "sample_exx" in ds else ""
        lines.append(f"  {'':4} {'value':>11} {'total 1-sigma':>14} {'spread':>11}")
        for name in STRAIN_NAMES:
            v = np.asarray(ds[prefix + name].values)[ok]
            s = np.asarray(ds[("sigma_sample_" if prefix else "sigma_") + name].values)[ok]
            lines.append(f"  {name:4} {np.median(v):+11.3e} {np.median(s):14.2e} "
                         f"{np.std(v):11.2e}")
        lines.append(f"  rms residual {np.median(np.asarray(ds['rms_px'].values)[ok]):.3f} px, "
                     f"{int(np.median(np.asarray(ds['n_lines'].values)[ok]))} lines per pattern")
    lines.append("Cautions: the strain is that of a thin lamella, which relaxes at its free "
                 "surfaces; the kinematic model ignores dynamical line shifts (the totals "
                 "include the systematic estimate stored with the results).")
    return "\n".join(lines)
