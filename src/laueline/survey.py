"""Planning a session: rank zone axes by the strain precision they deliver.

For each candidate zone axis the forward model (:func:`laueline.lines.predict`)
gives the usable lines and crossings.  The predicted precision is that of
the least-squares fit :mod:`laueline.refine` would make after a calibration
on a reference: crossing positions (mrad) with independent noise
``sigma_mrad`` in x and y, the six strain components free, the pattern
centre and rotation free as nuisance parameters, voltage and camera scale
held.  With J the Jacobian of all crossing coordinates with respect to
(e, centre, rotation), the covariance is sigma^2 (J^T J)^-1 and the strain
block of it is the marginal covariance (Cramer-Rao bound of the fit).

Symmetry: the pattern geometry and |F| are the same for axes related by the
crystal's Laue group (point group plus inversion; kinematic intensities obey
Friedel's law), so candidates are reduced to one representative per orbit,
unless ``near`` is given: then every axis within the tilt range is a
distinct setting of the holder and is kept.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import reduce

import numpy as np

from .errors import InputError
from .limits import check_inputs
from .lines import crossing_positions, predict
from .strain import from_voigt, voigt

__all__ = ["COMPONENTS", "AxisPrecision", "SurveyResult", "strain_precision",
           "candidate_axes", "survey_axis", "survey", "MAX_INDEX_CAP"]

COMPONENTS = ("exx", "eyy", "ezz", "eyz", "exz", "exy")
MAX_INDEX_CAP = 15
_STEP = 1e-6  # strain step of the central-difference Jacobian


def _voigt_rotation(axes):
    """6x6 matrix mapping Voigt strain components to those in the frame ``axes``."""
    T = np.empty((6, 6))
    for k in range(6):
        unit = np.zeros(6)
        unit[k] = 1.0
        T[:, k] = voigt(axes @ from_voigt(unit) @ axes.T)
    return T


def strain_precision(basis, zone, x_axis, wave_number, hkl_a, hkl_b, sigma_mrad, *,
                     axes=None):
    """Predicted 1-sigma of the six strain components from a set of crossings.

    Parameters
    ----------
    basis : ndarray (3, 3)
    zone, x_axis : sequence of 3 int
    wave_number : float
    hkl_a, hkl_b : ndarray (p, 3)
        The crossings that would be measured.
    sigma_mrad : float
        Standard uncertainty of each crossing coordinate, mrad.
    axes : ndarray (3, 3), optional
        Sample frame (rows) in which to express the components.

    Returns
    -------
    sigma : ndarray (6,)
        exx eyy ezz eyz exz exy (tensor components), in the frame asked for.
    covariance : ndarray (6, 6)
    """
    hkl_a, hkl_b = np.asarray(hkl_a), np.asarray(hkl_b)
    if len(hkl_a) * 2 < 9:
        return np.full(6, np.inf), np.full((6, 6), np.inf)
    bases = []
    for k in range(6):
        unit = np.zeros(6)
        unit[k] = _STEP
        e = from_voigt(unit)
        bases += [(np.eye(3) + e) @ basis, (np.eye(3) - e) @ basis]
    bases.append(np.asarray(basis, dtype=float))
    t = crossing_positions(np.stack(bases), zone, x_axis, wave_number, hkl_a, hkl_b)
    d_strain = (t[0:12:2] - t[1:12:2]) / (2 * _STEP)       # (6, p, 2) mrad per strain
    t0 = t[12]
    n = len(hkl_a)
    jac = np.empty((2 * n, 9))
    jac[:, :6] = d_strain.reshape(6, -1).T
    jac[:, 6] = np.tile([1.0, 0.0], n)                      # centre x
    jac[:, 7] = np.tile([0.0, 1.0], n)                      # centre y
    jac[:, 8] = np.stack([-t0[:, 1], t0[:, 0]], axis=1).ravel() * 1e-3  # rotation, mrad/mrad
    if not np.all(np.isfinite(jac)):
        return np.full(6, np.inf), np.full((6, 6), np.inf)
    scale = np.linalg.norm(jac, axis=0)
    _, sv, vt = np.linalg.svd(jac / scale, full_matrices=False)
    if sv[-1] <= 1e-12 * sv[0]:
        return np.full(6, np.inf), np.full((6, 6), np.inf)
    cov = sigma_mrad ** 2 * (vt.T / sv ** 2) @ vt / np.outer(scale, scale)
    cov = cov[:6, :6]
    if axes is not None:
        T = _voigt_rotation(axes)
        cov = T @ cov @ T.T
    return np.sqrt(np.maximum(np.diag(cov), 0.0)), cov


@dataclass
class AxisPrecision:
    """Survey figures of one zone axis."""

    zone: tuple
    tilt_deg: float | None
    n_lines: int
    n_crossings: int
    ring_radius_mrad: float
    max_convergence_mrad: float
    overlap: bool
    sigma_strain: np.ndarray
    score: float = float("nan")
    x_axis: tuple = ()


@dataclass
class SurveyResult:
    structure: dict
    kv: float
    disk_mrad: float
    sigma_mrad: float
    frame: str
    ranked_by: str
    axes: list
    warnings: list = field(default_factory=list)
    point_group: str = ""
    near: tuple | None = None
    max_tilt_deg: float | None = None
    cubic: bool = False


def survey_axis(crystal, zone, *, kv=200.0, disk_mrad=6.0, gmax=4.0, min_strength=0.05,
                min_angle_deg=5.0, sigma_mrad=0.005, axes=None, tilt_deg=None):
    """Lines, crossings, overlap and predicted strain precision of one zone axis."""
    pattern = predict(crystal, zone, kv, disk_mrad, gmax=gmax, min_strength=min_strength,
                      min_angle_deg=min_angle_deg)
    hkl_a, hkl_b = pattern.crossing_hkl()
    sigma, _ = strain_precision(crystal.basis, pattern.zone, pattern.x_axis,
                                pattern.beam.wave_number, hkl_a, hkl_b, sigma_mrad, axes=axes)
    ring = float(pattern.ring_radius_mrad[0]) if len(pattern.ring_radius_mrad) else float("nan")
    return AxisPrecision(
        zone=tuple(int(v) for v in pattern.zone), tilt_deg=tilt_deg,
        n_lines=int(np.sum(pattern.laue_zone >= 1)), n_crossings=pattern.n_crossings,
        ring_radius_mrad=ring, max_convergence_mrad=float(pattern.max_convergence_mrad),
        overlap=bool(disk_mrad > pattern.max_convergence_mrad), sigma_strain=sigma,
        x_axis=pattern.x_axis)


def _laue_rotations(crystal):
    """Rotations (fractional, acting on [uvw]) of the point group plus inversion."""
    rots = crystal.point_group_rotations()
    return np.unique(np.concatenate([rots, -rots]), axis=0)


def candidate_axes(crystal, max_index, *, near=None, max_tilt_deg=None):
    """Candidate zone axes: one per Laue-group orbit, or all within a tilt cone.

    Returns
    -------
    zones : ndarray (m, 3) of int
    tilts : ndarray (m,) of float or None
    """
    if not isinstance(max_index, (int, np.integer)) or max_index < 1:
        raise InputError(f"the maximum index must be a positive integer, got {max_index}")
    if max_index > MAX_INDEX_CAP:
        raise InputError(f"a maximum index of {max_index} is beyond the cap of "
                         f"{MAX_INDEX_CAP}: such axes have no usable HOLZ geometry")
    r = np.arange(-max_index, max_index + 1)
    uvw = np.stack(np.meshgrid(r, r, r, indexing="ij"), axis=-1).reshape(-1, 3)
    uvw = uvw[np.any(uvw != 0, axis=1)]
    g = reduce(np.gcd, [np.abs(uvw[:, 0]), np.abs(uvw[:, 1]), np.abs(uvw[:, 2])])
    uvw = uvw[g == 1]
    if near is not None:
        near = np.asarray(near, dtype=float)
        if near.shape != (3,) or not np.any(near):
            raise InputError("the --near axis must be three numbers, not all zero")
        if max_tilt_deg is None or not max_tilt_deg > 0:
            raise InputError("--near needs a positive --max-tilt-deg")
        dirs = crystal.direction(uvw)
        ref = crystal.direction(near)
        cos = dirs @ ref / (np.linalg.norm(dirs, axis=1) * np.linalg.norm(ref))
        tilt = np.degrees(np.arccos(np.clip(cos, -1, 1)))
        keep = tilt <= max_tilt_deg + 1e-9
        if not np.any(keep):
            raise InputError(f"no zone axis with indices up to {max_index} lies within "
                             f"{max_tilt_deg:g} deg of [{' '.join(f'{v:g}' for v in near)}]; "
                             "widen --max-tilt-deg or raise --max-index")
        order = np.argsort(tilt[keep], kind="stable")
        return uvw[keep][order], tilt[keep][order]
    rots = _laue_rotations(crystal)
    images = np.einsum("rij,nj->nri", rots, uvw)          # (n, r, 3)
    # representative: the lexicographically largest image
    key = images[..., 0] * 10_000 + images[..., 1] * 100 + images[..., 2]
    best = images[np.arange(len(uvw)), np.argmax(key, axis=1)]
    reps = np.unique(best, axis=0)[::-1]
    return reps, None


def survey(crystal, *, kv=200.0, disk_mrad=6.0, max_index=7, near=None, max_tilt_deg=None,
           gmax=4.0, min_strength=0.05, min_angle_deg=5.0, sigma_mrad=0.005, component=None,
           axes=None, frame_description="reference-cartesian", progress=False):
    """Rank candidate zone axes by predicted strain precision.

    Parameters
    ----------
    crystal : Crystal
    kv, disk_mrad, gmax, min_strength, min_angle_deg :
        As for :func:`laueline.lines.predict`.
    max_index : int
        Candidates [u v w] with max |index| <= max_index.
    near, max_tilt_deg : optional
        Keep every axis within ``max_tilt_deg`` of the direction ``near``.
    sigma_mrad : float
        Noise of a crossing coordinate, mrad (0.005 by default).
    component : str, optional
        Rank by this component (exx ... exy); by default by the worst of six.
    axes : ndarray (3, 3), optional
        Sample frame for the components.
    progress : bool
        Show a progress bar on stderr for surveys longer than a second.
    """
    check_inputs(max_tilt_deg=max_tilt_deg, sigma_mrad=sigma_mrad)
    if component is not None and component not in COMPONENTS:
        raise InputError(f"unknown component '{component}'; choose one of "
                         f"{', '.join(COMPONENTS)}")
    if not sigma_mrad > 0:
        raise InputError("--sigma-mrad must be positive")
    zones, tilts = candidate_axes(crystal, max_index, near=near, max_tilt_deg=max_tilt_deg)
    iterator = range(len(zones))
    if progress:
        from tqdm import tqdm

        iterator = tqdm(iterator, desc="zone axes", unit="axis", delay=1.0, leave=False)
    results = []
    for i in iterator:
        res = survey_axis(crystal, zones[i], kv=kv, disk_mrad=disk_mrad, gmax=gmax,
                          min_strength=min_strength, min_angle_deg=min_angle_deg,
                          sigma_mrad=sigma_mrad, axes=axes,
                          tilt_deg=None if tilts is None else float(tilts[i]))
        k = COMPONENTS.index(component) if component else None
        res.score = float(res.sigma_strain[k] if k is not None else np.max(res.sigma_strain))
        results.append(res)
    # near-ties (within 2 %) are broken by the number of crossings
    results.sort(key=lambda r: (_bucket(r.score), -r.n_crossings, r.score))
    warnings = []
    if all(not np.isfinite(r.score) for r in results):
        warnings.append("no candidate axis gives a determined strain: too few crossings; "
                        "lower --min-strength or enlarge the disk")
    is_cubic = 195 <= crystal.space_group_number <= 230
    return SurveyResult(
        structure=crystal.summary(), kv=float(kv), disk_mrad=float(disk_mrad),
        sigma_mrad=float(sigma_mrad), frame=frame_description,
        ranked_by=(component or "worst of exx eyy ezz eyz exz exy"), axes=results,
        warnings=warnings, point_group=_point_group_symbol(crystal),
        near=None if near is None else tuple(float(v) for v in near),
        max_tilt_deg=max_tilt_deg, cubic=is_cubic)


def _bucket(score):
    if not np.isfinite(score) or score <= 0:
        return float("inf")
    return math.floor(math.log(score) / math.log(1.02))


def _point_group_symbol(crystal):
    import gemmi

    try:
        return gemmi.SpaceGroup(crystal.space_group_symbol).point_group_hm()
    except (ValueError, RuntimeError):
        return ""
