"""Planning a session: rank zone axes by the strain precision they deliver.

For each candidate zone axis the forward model (:func:`laueline.lines.predict`)
gives the lines and crossings; a contrast estimate at the foil thickness
decides which lines will be seen, and only crossings of two visible lines
are counted.  The predicted precision is that of the fit a calibrated
session makes: crossing positions (mrad) with independent noise
``sigma_mrad`` in x and y and, shared by all crossings of a line, an offset
of each line along its normal with standard deviation ``line_sigma_mrad``
(detection, dynamical shifts: :mod:`laueline.uncertainty`); the six strain
components free, the pattern centre and rotation free as nuisance
parameters, voltage and camera scale held.  The strain block of the
generalised least-squares covariance (J^T V^-1 J)^-1 is the Cramer-Rao
bound of that fit, computed by the same functions a fit uses.

Visibility.  A line's contrast is estimated as the peak deficit depth of the
two-beam rocking curve (Hirsch et al. 1965): the largest diffracted
intensity over excitation error, for a foil of thickness t and the
kinematic extinction distance xi_g of the reflection.  For t << xi_g it is
the kinematic (pi t / xi_g)^2, so it grows as |F_g|^2; it saturates at 1.
Lines below ``min_contrast`` (0.02 by default: a 2 % dip is about the
smallest seen against shot noise and the background of a real disk; common
practice) do not count.  Another contrast model (a dynamical calculation)
plugs in through the ``contrast`` argument.

Symmetry.  The pattern geometry and |F| are the same for axes related by
the crystal's Laue group (point group plus inversion; kinematic
intensities obey Friedel's law), so candidates are reduced to one
representative per orbit, unless ``near`` is given: then every axis within
the tilt range is a distinct setting of the holder and is kept.  In a
frame other than the crystal's own (a sample frame, or one component asked
for) the members of an orbit give different precisions: every member is
evaluated, by rotating the representative's covariance with the
symmetry operation that carries it onto the member, and the best member is
reported.

Disk overlap and reflection limit.  An axis whose zero-layer disks overlap
at the requested convergence is evaluated at the largest convergence it
allows, and marked.  The reflection limit is raised for each axis until the
lines of its first HOLZ ring are enumerated.

References
----------
Hirsch, P. B., Howie, A., Nicholson, R. B., Pashley, D. W. and Whelan,
M. J. (1965). *Electron Microscopy of Thin Crystals*. London: Butterworths
(ch. 8, the two-beam dynamical theory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import reduce

import numpy as np

from .errors import InputError
from .results import ResultMixin, format_indices
from .limits import check_inputs
from .lines import crossing_positions, predict
from .strain import from_voigt, voigt
from .thickness import two_beam_intensity
from .uncertainty import crossing_loading_of_lines, predicted_covariance

__all__ = ["COMPONENTS", "AxisPrecision", "SurveyResult", "strain_precision",
           "candidate_axes", "family_members", "survey_axis", "survey", "kinematic_contrast",
           "extinction_distances_nm", "rocking_curve_peak", "MAX_INDEX_CAP",
           "DEFAULT_THICKNESS_NM", "DEFAULT_MIN_CONTRAST", "DEFAULT_LINE_SIGMA_MRAD"]

COMPONENTS = ("exx", "eyy", "ezz", "eyz", "exz", "exy")
MAX_INDEX_CAP = 15
DEFAULT_THICKNESS_NM = 200.0    # a usual foil for HOLZ work, 150-300 nm (common practice)
DEFAULT_MIN_CONTRAST = 0.02     # smallest deficit seen in a real disk (common practice)
# offset of a whole line fitted along its chord: about 0.1 px at 40 px/mrad
# (common practice), plus what dynamical shifts leave after a calibration
DEFAULT_LINE_SIGMA_MRAD = 0.002
_STEP = 1e-6  # strain step of the central-difference Jacobian
_ROCKING_SAMPLES = 257  # samples of the rocking curve beyond its central peak


def _voigt_rotation(axes):
    """6x6 matrix mapping Voigt strain components to those in the frame ``axes``."""
    T = np.empty((6, 6))
    for k in range(6):
        unit = np.zeros(6)
        unit[k] = 1.0
        T[:, k] = voigt(axes @ from_voigt(unit) @ axes.T)
    return T


def strain_precision(basis, zone, x_axis, wave_number, hkl_a, hkl_b, sigma_mrad, *,
                     line_sigma_mrad=0.0, axes=None):
    """Predicted 1-sigma of the six strain components from a set of crossings.

    The Cramer-Rao bound of the fit (strain, centre and rotation free) under
    the per-line error model of :mod:`laueline.uncertainty`.

    Parameters
    ----------
    basis : ndarray (3, 3)
    zone, x_axis : sequence of 3 int
    wave_number : float
    hkl_a, hkl_b : ndarray (p, 3)
        The crossings that would be measured.
    sigma_mrad : float
        Independent noise of each crossing coordinate, mrad.
    line_sigma_mrad : float
        Standard deviation of each line's offset along its normal, shared by
        all its crossings, mrad (0: crossings independent).
    axes : ndarray (3, 3), optional
        Sample frame (rows) in which to express the components.

    Returns
    -------
    sigma : ndarray (6,)
        exx eyy ezz eyz exz exy (tensor components), in the frame asked for;
        infinite when the crossings do not determine the strain.
    covariance : ndarray (6, 6)
    """
    hkl_a, hkl_b = np.asarray(hkl_a).reshape(-1, 3), np.asarray(hkl_b).reshape(-1, 3)
    undetermined = np.full(6, np.inf), np.full((6, 6), np.inf)
    if len(hkl_a) * 2 < 9:
        return undetermined
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
        return undetermined
    try:
        loading, _ = crossing_loading_of_lines(basis, zone, x_axis, wave_number, hkl_a, hkl_b,
                                               t0)
        cov = predicted_covariance(jac, loading, sigma_mrad, line_sigma_mrad)[:6, :6]
    except InputError:  # parallel lines or undetermined strain
        return undetermined
    if axes is not None:
        T = _voigt_rotation(axes)
        cov = T @ cov @ T.T
    return np.sqrt(np.maximum(np.diag(cov), 0.0)), cov


# ---------------------------------------------------------------------------
# line visibility
# ---------------------------------------------------------------------------

def extinction_distances_nm(pattern):
    """Kinematic two-beam extinction distance of each line of a pattern, nm.

    xi_g = pi V cos(theta_B) / (lambda gamma |F_g|) (Hirsch et al. 1965;
    the same formula as :func:`laueline.thickness.kinematic_extinction_distance_nm`,
    vectorised over the pattern's lines).
    """
    from .optics import relativistic_factor

    lam = pattern.beam.wavelength_A
    theta = np.arcsin(np.clip(lam * pattern.g_inv_A / 2.0, 0.0, 1.0))
    with np.errstate(divide="ignore"):
        xi_A = (math.pi * pattern.crystal.volume * np.cos(theta)
                / (lam * relativistic_factor(pattern.beam.kv) * pattern.f_abs))
    return xi_A / 10.0


def rocking_curve_peak(thickness_nm, extinction_nm):
    """Largest two-beam diffracted intensity over excitation error.

    The peak of ``two_beam_intensity(s, t, xi)`` (Hirsch et al. 1965) over s:
    with u = pi t s_eff >= u0 = pi t / xi it is the maximum of
    u0^2 sin^2(u) / u^2, at u = u0 (the exact Bragg condition) while
    t <= xi / 2 and on a later subsidiary maximum otherwise; sampled over
    one period beyond u0.

    Parameters
    ----------
    thickness_nm : float
    extinction_nm : ndarray

    Returns
    -------
    ndarray
        Between 0 and 1; (pi t / xi)^2 to first order for t << xi.
    """
    xi = np.asarray(extinction_nm, dtype=float)
    t = float(thickness_nm)
    u0 = math.pi * t / xi
    u = u0[..., None] + np.linspace(0.0, 2.0 * math.pi, _ROCKING_SAMPLES)
    s_eff = u / (math.pi * t)
    s = np.sqrt(np.maximum(s_eff ** 2 - 1.0 / xi[..., None] ** 2, 0.0))
    return np.max(two_beam_intensity(s, t, xi[..., None]), axis=-1)


def kinematic_contrast(pattern, thickness_nm):
    """Estimated deficit depth of each line of a pattern at a foil thickness.

    The peak of the two-beam rocking curve with the kinematic extinction
    distance of each reflection (:func:`rocking_curve_peak`).  This is the
    default ``contrast`` model of :func:`survey`; any callable with the same
    signature, ``contrast(pattern, thickness_nm) -> ndarray (n_lines,)``,
    can replace it (for example a dynamical calculation of the dip).
    """
    if len(pattern.hkl) == 0:
        return np.zeros(0)
    return rocking_curve_peak(thickness_nm, extinction_distances_nm(pattern))


# ---------------------------------------------------------------------------
# one zone axis
# ---------------------------------------------------------------------------

@dataclass
class AxisPrecision:
    """Survey figures of one zone axis.

    ``zone`` is the orbit's representative (or the axis itself with a tilt
    range); ``member`` the symmetry-equivalent axis whose figures are shown
    (the best in the frame asked for) and ``x_axis`` that member's disk x
    reflection.  ``sigma_strain`` is the predicted total 1-sigma under the
    per-line model, in the survey's frame; ``covariance`` its 6 x 6 matrix.
    ``disk_mrad`` is the convergence the figures are for: the requested one,
    or the largest the axis allows when its disks overlap (``overlap``).
    """

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
    member: tuple = ()
    n_visible_lines: int = 0
    thickness_nm: float = DEFAULT_THICKNESS_NM
    disk_mrad: float = float("nan")
    gmax: float = float("nan")
    n_members: int = 1
    covariance: np.ndarray | None = None


@dataclass(repr=False)
class SurveyResult(ResultMixin):
    """Ranked zone axes with their predicted strain precision.

    ``axes`` lists one entry per candidate (dicts, best first); the JSON
    document (:meth:`to_dict`), the text and the stereographic map
    (:meth:`plot`) are those of ``laueline survey``.
    """

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
    line_sigma_mrad: float = DEFAULT_LINE_SIGMA_MRAD
    thickness_nm: float = DEFAULT_THICKNESS_NM
    min_contrast: float = DEFAULT_MIN_CONTRAST
    contrast_model: str = "kinematic two-beam"
    sample_axes: np.ndarray | None = None

    def _summary(self):
        best = self.axes[0] if self.axes else None
        top = "" if best is None else (f"; best [{format_indices(best.get('member') or best['zone'])}]"
                                       if isinstance(best, dict) else "")
        return (f"{self.structure.get('name', '')}, {self.kv:g} kV, disk {self.disk_mrad:g} mrad, "
                f"{len(self.axes)} axes ranked by {self.ranked_by} ({self.frame}){top}")

    def _document(self):
        from .report import survey_document

        return survey_document(self)

    def _figure(self, crystal=None, **kwargs):
        from .crystal import read_crystal
        from .plot import survey_figure

        crystal = crystal or read_crystal(self.structure.get("name", ""))
        return survey_figure(self, crystal, **kwargs)


def _needed_gmax(pattern, disk_mrad):
    """|g| (1/A) up to which the lines of the first HOLZ ring must be enumerated.

    Lines of layer n reach a disk of radius alpha when
    |gz - |g|^2 / 2K| <= |g| alpha (see :func:`laueline.lines.enumerate_reflections`),
    so |g| <= sqrt(2 K gz) + K alpha to first order; a 5 % margin covers
    the second-order terms.
    """
    from .lines import _rings

    K = pattern.beam.wave_number
    H = pattern.frame.layer_spacing
    probe = math.sqrt(2.0 * K * H * 24.0)   # any centring empties fewer than 24 layers
    layers, _ = _rings(pattern.crystal, pattern.frame, K, probe)
    if not len(layers):
        return 0.0
    gz = float(layers[0]) * H
    return 1.05 * (math.sqrt(2.0 * K * gz) + K * disk_mrad * 1e-3)


def survey_axis(crystal, zone, *, kv=200.0, disk_mrad=6.0, gmax=4.0, min_strength=0.05,
                min_angle_deg=5.0, sigma_mrad=0.005, line_sigma_mrad=DEFAULT_LINE_SIGMA_MRAD,
                thickness_nm=DEFAULT_THICKNESS_NM, min_contrast=DEFAULT_MIN_CONTRAST,
                contrast=None, axes=None, tilt_deg=None, component=None, members=True):
    """Visible lines, crossings, overlap and predicted strain precision of one zone axis.

    Parameters are those of :func:`survey`; ``members`` says whether the
    symmetry-equivalent axes of ``zone`` are evaluated too (the best one is
    reported as ``member``).
    """
    contrast = kinematic_contrast if contrast is None else contrast
    pattern = predict(crystal, zone, kv, disk_mrad, gmax=gmax, min_strength=min_strength,
                      min_angle_deg=min_angle_deg)
    overlap = bool(disk_mrad > pattern.max_convergence_mrad)
    disk_used = min(float(disk_mrad), float(pattern.max_convergence_mrad))
    gmax_used = max(float(gmax), _needed_gmax(pattern, disk_used))
    if overlap or gmax_used > gmax:
        try:
            pattern = predict(crystal, zone, kv, disk_used, gmax=gmax_used,
                              min_strength=min_strength, min_angle_deg=min_angle_deg,
                              x_axis=pattern.x_axis)
        except InputError:  # too many reflections to enumerate: keep the limit given
            gmax_used = float(gmax)
            pattern = predict(crystal, zone, kv, disk_used, gmax=gmax,
                              min_strength=min_strength, min_angle_deg=min_angle_deg,
                              x_axis=pattern.x_axis)
    depth = np.asarray(contrast(pattern, thickness_nm), dtype=float)
    if depth.shape != (pattern.n_lines,):
        raise InputError(f"the contrast model returned shape {depth.shape} for "
                         f"{pattern.n_lines} lines")
    visible = depth >= min_contrast
    holz = pattern.laue_zone >= 1
    usable = visible[pattern.crossing_lines].all(axis=1)
    hkl_a, hkl_b = pattern.crossing_hkl()
    _, cov = strain_precision(crystal.basis, pattern.zone, pattern.x_axis,
                              pattern.beam.wave_number, hkl_a[usable], hkl_b[usable],
                              sigma_mrad, line_sigma_mrad=line_sigma_mrad)
    zone_rep = tuple(int(v) for v in pattern.zone)
    if members:
        member_zones, rotations, x_axes = family_members(crystal, zone_rep, pattern.x_axis)
    else:
        member_zones = np.array([zone_rep])
        rotations = np.eye(3)[None]
        x_axes = np.array([pattern.x_axis])
    frame = np.eye(3) if axes is None else np.asarray(axes, dtype=float)
    if np.all(np.isfinite(cov)):
        T = np.stack([_voigt_rotation(frame @ q) for q in rotations])
        covs = T @ cov @ np.swapaxes(T, 1, 2)
        sigmas = np.sqrt(np.maximum(np.diagonal(covs, axis1=1, axis2=2), 0.0))
    else:
        covs = np.full((len(rotations), 6, 6), np.inf)
        sigmas = np.full((len(rotations), 6), np.inf)
    scores = _scores(sigmas, component)
    # the best member; exact ties (symmetry) keep the first, the representative
    best = int(np.argmin(np.where(np.isfinite(scores), scores, np.inf))) \
        if np.any(np.isfinite(scores)) else 0
    best = int(np.flatnonzero(scores <= scores[best] * (1 + 1e-9))[0]) \
        if np.isfinite(scores[best]) else 0
    ring = float(pattern.ring_radius_mrad[0]) if len(pattern.ring_radius_mrad) else float("nan")
    return AxisPrecision(
        zone=zone_rep, tilt_deg=tilt_deg,
        n_lines=int(np.sum(holz)), n_crossings=int(np.sum(usable)),
        ring_radius_mrad=ring, max_convergence_mrad=float(pattern.max_convergence_mrad),
        overlap=overlap, sigma_strain=sigmas[best], score=float(scores[best]),
        x_axis=tuple(int(v) for v in x_axes[best]),
        member=tuple(int(v) for v in member_zones[best]),
        n_visible_lines=int(np.sum(visible & holz)), thickness_nm=float(thickness_nm),
        disk_mrad=disk_used, gmax=gmax_used, n_members=len(member_zones),
        covariance=covs[best])


def _scores(sigmas, component):
    if component is None:
        return np.max(sigmas, axis=-1)
    return sigmas[..., COMPONENTS.index(component)]


def _laue_rotations(crystal):
    """Rotations (fractional, acting on [uvw]) of the point group plus inversion."""
    rots = crystal.point_group_rotations()
    return np.unique(np.concatenate([rots, -rots]), axis=0)


def family_members(crystal, zone, x_axis=None):
    """The distinct axes symmetry-equivalent to ``zone`` and the operations giving them.

    Members are the images of ``zone`` under the Laue group (point group plus
    inversion); an axis and its opposite give the same strain precision
    (the inversion leaves a strain tensor unchanged), so they count once.

    Parameters
    ----------
    crystal : Crystal
    zone : sequence of 3 int
    x_axis : sequence of 3 int, optional
        The disk x reflection of ``zone``; its image is returned per member.

    Returns
    -------
    members : ndarray (k, 3) of int
        ``zone`` first.
    rotations : ndarray (k, 3, 3)
        Cartesian orthogonal matrices Q with A member = Q A zone: a strain e
        seen from ``zone`` is Q e Q^T seen from the member.
    x_axes : ndarray (k, 3) of int
        Images of ``x_axis`` (reciprocal indices transform with R^-T).
    """
    zone = np.asarray(zone, dtype=int)
    rots = _laue_rotations(crystal)
    images = rots @ zone
    # one sign per axis: the lexicographically larger of +/- the image
    flip = np.array([tuple(v) < tuple(-v) for v in images])
    images[flip] *= -1
    signs = np.where(flip, -1, 1)
    _, first = np.unique(images, axis=0, return_index=True)
    first = np.sort(first)
    identity = np.flatnonzero(np.all(images[first] == (zone if tuple(zone) >= tuple(-zone)
                                                       else -zone), axis=1))
    order = np.concatenate([first[identity], np.delete(first, identity)])
    A = crystal.basis
    A_inv = np.linalg.inv(A)
    q = A @ rots[order] @ A_inv
    members = images[order]
    if x_axis is None:
        x_axes = np.zeros_like(members)
    else:
        inv_t = np.round(np.swapaxes(np.linalg.inv(rots[order]), 1, 2)).astype(int)
        x_axes = (inv_t @ np.asarray(x_axis, dtype=int)) * signs[order][:, None]
    return members, q, x_axes


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
           gmax=4.0, min_strength=0.05, min_angle_deg=5.0, sigma_mrad=0.005,
           line_sigma_mrad=DEFAULT_LINE_SIGMA_MRAD, thickness_nm=DEFAULT_THICKNESS_NM,
           min_contrast=DEFAULT_MIN_CONTRAST, contrast=None, component=None, axes=None,
           frame_description="reference-cartesian", progress=False):
    """Rank candidate zone axes by predicted strain precision.

    Parameters
    ----------
    crystal : Crystal
    kv, disk_mrad, gmax, min_strength, min_angle_deg :
        As for :func:`laueline.lines.predict`; ``gmax`` is raised per axis
        where the first HOLZ ring lies beyond it, ``disk_mrad`` lowered per
        axis to the largest convergence without disk overlap.
    max_index : int
        Candidates [u v w] with max |index| <= max_index.
    near, max_tilt_deg : optional
        Keep every axis within ``max_tilt_deg`` of the direction ``near``.
    sigma_mrad : float
        Independent noise of a crossing coordinate, mrad (0.005).
    line_sigma_mrad : float
        Offset of a whole line along its normal, shared by its crossings,
        mrad (0.002).
    thickness_nm : float
        Foil thickness for the contrast estimate, nm (200).
    min_contrast : float
        Lines with a smaller estimated deficit depth are not seen (0.02).
    contrast : callable, optional
        ``contrast(pattern, thickness_nm) -> ndarray (n_lines,)``, the
        deficit depth of each line; :func:`kinematic_contrast` by default.
    component : str, optional
        Rank by this component (exx ... exy); by default by the worst of six.
    axes : ndarray (3, 3), optional
        Sample frame (rows) for the components.
    progress : bool
        Show a progress bar on stderr for surveys longer than a second.
    """
    check_inputs(max_tilt_deg=max_tilt_deg, sigma_mrad=sigma_mrad)
    if component is not None and component not in COMPONENTS:
        raise InputError(f"unknown component '{component}'; choose one of "
                         f"{', '.join(COMPONENTS)}")
    for name, value in (("sigma_mrad", sigma_mrad), ("thickness_nm", thickness_nm)):
        if not (math.isfinite(value) and value > 0):
            raise InputError(f"{name} must be positive, got {value:g}")
    if not (math.isfinite(line_sigma_mrad) and line_sigma_mrad >= 0):
        raise InputError(f"line_sigma_mrad must be zero or positive, got {line_sigma_mrad:g}")
    if not 0 <= min_contrast < 1:
        raise InputError(f"min_contrast must be in [0, 1), got {min_contrast:g}")
    if axes is not None:
        axes = np.asarray(axes, dtype=float)
        if axes.shape != (3, 3) or not np.allclose(axes @ axes.T, np.eye(3), atol=1e-9):
            raise InputError("axes must be the three orthonormal rows of a sample frame")
    zones, tilts = candidate_axes(crystal, max_index, near=near, max_tilt_deg=max_tilt_deg)
    iterator = range(len(zones))
    if progress:
        from tqdm import tqdm

        iterator = tqdm(iterator, desc="zone axes", unit="axis", delay=1.0, leave=False)
    results = []
    for i in iterator:
        results.append(survey_axis(
            crystal, zones[i], kv=kv, disk_mrad=disk_mrad, gmax=gmax,
            min_strength=min_strength, min_angle_deg=min_angle_deg, sigma_mrad=sigma_mrad,
            line_sigma_mrad=line_sigma_mrad, thickness_nm=thickness_nm,
            min_contrast=min_contrast, contrast=contrast, axes=axes, component=component,
            tilt_deg=None if tilts is None else float(tilts[i]), members=near is None))
    # near-ties (within 2 %) are broken by the number of crossings
    results.sort(key=lambda r: (_bucket(r.score), -r.n_crossings, r.score))
    warnings = []
    if all(not np.isfinite(r.score) for r in results):
        warnings.append("no candidate axis gives a determined strain: too few visible "
                        "crossings; lower --min-contrast, change --thickness-nm or enlarge "
                        "the disk")
    raised = [r for r in results if r.gmax > gmax * (1 + 1e-9)]
    if raised:
        warnings.append(f"the reflection limit was raised above {gmax:g} 1/A for "
                        f"{_count(raised, 'axis', 'axes')} (up to "
                        f"{max(r.gmax for r in raised):.2f} 1/A) to reach the first HOLZ ring")
    reduced = [r for r in results if r.overlap]
    if reduced:
        warnings.append(f"{_count(reduced, 'axis overlaps its', 'axes overlap their')} "
                        f"zero-layer disks at {disk_mrad:g} mrad: evaluated at the largest "
                        "convergence allowed (marked *)")
    is_cubic = 195 <= crystal.space_group_number <= 230
    return SurveyResult(
        structure=crystal.summary(), kv=float(kv), disk_mrad=float(disk_mrad),
        sigma_mrad=float(sigma_mrad), frame=frame_description,
        ranked_by=(component or "worst of exx eyy ezz eyz exz exy"), axes=results,
        warnings=warnings, point_group=_point_group_symbol(crystal),
        near=None if near is None else tuple(float(v) for v in near),
        max_tilt_deg=max_tilt_deg, cubic=is_cubic, line_sigma_mrad=float(line_sigma_mrad),
        thickness_nm=float(thickness_nm), min_contrast=float(min_contrast),
        contrast_model="kinematic two-beam" if contrast is None
        else getattr(contrast, "__name__", "user-supplied"),
        sample_axes=axes)


def _count(items, one, many):
    return f"{len(items)} {one if len(items) == 1 else many}"


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
