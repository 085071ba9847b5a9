"""Least-squares refinement of cell or strain and detector from crossings.

The model of a measured crossing is the exact crossing of two deficit lines
(:func:`laueline.lines.crossing_positions`) mapped to pixels by the detector
(:class:`laueline.detector.Detector`).  What is refined:

* the crystal, by ``model``: ``fixed`` (reference cell held, for
  calibration), ``strain`` (the six components of e, basis (I + e) A_ref),
  or a cell constrained to ``cubic``, ``tetragonal``, ``hexagonal``,
  ``orthorhombic``, ``monoclinic`` or ``triclinic`` symmetry (the unique
  axis of tetragonal and monoclinic cells is c and b by default and can be
  chosen);
* the detector centre, scale and rotation (the mirror is discrete and is
  chosen, not refined);
* optionally the voltage.  Voltage and hydrostatic strain shift HOLZ lines
  identically, so they are never freed together: the usual practice is to
  calibrate an effective voltage (and the camera scale) on an unstrained
  reference with ``model='fixed'`` and hold both on the strained region.

Uncertainties are the square roots of the diagonal of s^2 (J^T J)^-1 at the
solution, with s^2 the residual variance, or with s = 1 when positions carry
their own ``sigma_px`` (then a chi-square test checks the stated sigmas).
Points without labels are assigned to predicted crossings by optimal
matching (:func:`scipy.optimize.linear_sum_assignment`) inside a distance
gate, after a coarse search of rotation and mirror when the rotation is not
known; fit and assignment alternate until the assignment is stable.

References
----------
Zuo, J. M. (1992). Automated lattice parameter measurement from HOLZ lines
and their use for the measurement of oxygen content in YBa2Cu3O7-d from
nanometer-sized region. Ultramicroscopy 41, 211-223.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .crystal import basis_from_cell, cell_from_basis
from .detector import Detector, rotation_matrix
from .errors import InputError
from .limits import check_inputs
from .frame import default_x_axis, reduce_indices
from .lines import (crossing_angles_deg, crossing_positions, line_parameters_batch,
                    locus_distances, predict)
from .optics import make_beam, relativistic_factor, wave_number
from .strain import strain_report

__all__ = ["MODELS", "STRAIN_COMPONENTS", "PARAMETER_UNITS", "FitResult", "refine", "refine_image",
           "calibration_from_document", "fitted_pattern", "CAUTIONS"]

MODELS = ("strain", "fixed", "cubic", "tetragonal", "hexagonal", "orthorhombic",
          "monoclinic", "triclinic")
STRAIN_COMPONENTS = ("exx", "eyy", "ezz", "eyz", "exz", "exy")
CELL_NAMES = ("a", "b", "c", "alpha", "beta", "gamma")
DETECTOR_NAMES = ("center_x", "center_y", "scale", "rotation")

CAUTIONS = (
    "A TEM lamella relaxes at its free surfaces: the strain measured here is that of the "
    "thin foil and may differ from the strain in the bulk device.",
    "The model is kinematic: dynamical shifts of HOLZ lines are ignored; an effective "
    "voltage calibrated on a reference region absorbs them only in part.",
)

_UNITS = {  # internal step sizes: the fit works in these units, offsets from the start
    "strain": 1e-3, "length": 1e-3, "angle": 0.05, "kv": 1.0, "center": 1.0,
    "scale": 1e-3, "rotation": 0.05,
}
PARAMETER_UNITS = {"exx": "", "eyy": "", "ezz": "", "eyz": "", "exz": "", "exy": "",
                  "a": "A", "b": "A", "c": "A", "alpha": "deg", "beta": "deg", "gamma": "deg",
                  "kv": "kV", "center_x": "px", "center_y": "px", "scale": "px/mrad",
                  "rotation": "deg"}
_JAC_STEP = 1e-6


def _cell_model(model, unique_axis):
    """Independent cell parameters of a model and their expansion to six."""
    u = unique_axis
    if model == "cubic":
        return ["a"], lambda v: (v["a"], v["a"], v["a"], 90.0, 90.0, 90.0)
    if model == "tetragonal":
        u = u or "c"
        if u == "c":
            return ["a", "c"], lambda v: (v["a"], v["a"], v["c"], 90.0, 90.0, 90.0)
        if u == "b":
            return ["a", "b"], lambda v: (v["a"], v["b"], v["a"], 90.0, 90.0, 90.0)
        return ["a", "b"], lambda v: (v["a"], v["b"], v["b"], 90.0, 90.0, 90.0)
    if model == "hexagonal":
        if u not in (None, "c"):
            raise InputError("a hexagonal cell has its unique axis along c")
        return ["a", "c"], lambda v: (v["a"], v["a"], v["c"], 90.0, 90.0, 120.0)
    if model == "orthorhombic":
        return ["a", "b", "c"], lambda v: (v["a"], v["b"], v["c"], 90.0, 90.0, 90.0)
    if model == "monoclinic":
        u = u or "b"
        angle = {"a": "alpha", "b": "beta", "c": "gamma"}[u]

        def expand(v):
            angles = {"alpha": 90.0, "beta": 90.0, "gamma": 90.0, angle: v[angle]}
            return (v["a"], v["b"], v["c"], angles["alpha"], angles["beta"], angles["gamma"])
        return ["a", "b", "c", angle], expand
    if model == "triclinic":
        return list(CELL_NAMES), lambda v: tuple(v[n] for n in CELL_NAMES)
    raise InputError(f"unknown model '{model}'; choose one of {', '.join(MODELS)}")


@dataclass
class _Setup:
    """Everything fixed during one fit: names, units, start values, forward map."""

    crystal: object
    zone: tuple
    x_axis: tuple
    model: str
    free: list
    start: dict
    expand_cell: object
    mirror: bool
    inner_potential_u0: float | None

    @property
    def units(self):
        out = []
        for name in self.free:
            if name in STRAIN_COMPONENTS:
                out.append(_UNITS["strain"])
            elif name in ("a", "b", "c"):
                out.append(_UNITS["length"] * self.start[name])
            elif name in ("alpha", "beta", "gamma"):
                out.append(_UNITS["angle"])
            elif name == "kv":
                out.append(_UNITS["kv"])
            elif name in ("center_x", "center_y"):
                out.append(_UNITS["center"])
            elif name == "scale":
                out.append(_UNITS["scale"] * self.start["scale"])
            else:
                out.append(_UNITS["rotation"])
        return np.array(out)

    def values(self, x):
        v = dict(self.start)
        for name, unit, xi in zip(self.free, self.units, x):
            v[name] = self.start[name] + unit * xi
        return v

    def basis(self, v):
        if self.model == "strain":
            e = np.array([[v["exx"], v["exy"], v["exz"]],
                          [v["exy"], v["eyy"], v["eyz"]],
                          [v["exz"], v["eyz"], v["ezz"]]])
            return (np.eye(3) + e) @ self.crystal.basis
        if self.model == "fixed":
            return self.crystal.basis
        return basis_from_cell(*self.expand_cell(v))

    def wave_number(self, kv):
        k = wave_number(kv)
        if self.inner_potential_u0 is None:
            return k
        return math.sqrt(k * k + relativistic_factor(kv) * self.inner_potential_u0)

    def detector(self, v):
        return Detector((v["center_x"], v["center_y"]), v["scale"], v["rotation"], self.mirror)

    def crossings_mrad(self, v, hkl_a, hkl_b):
        return crossing_positions(self.basis(v), self.zone, self.x_axis,
                                  self.wave_number(v["kv"]), hkl_a, hkl_b)

    def crossings_px(self, v, hkl_a, hkl_b):
        return self.crossings_px_many([v], hkl_a, hkl_b)[0]

    def stacked(self, value_sets):
        """Bases, wave numbers, detector matrices and centres of several parameter sets."""
        bases = np.stack([self.basis(v) for v in value_sets])
        k = np.array([self.wave_number(v["kv"]) for v in value_sets])
        dets = [self.detector(v) for v in value_sets]
        matrices = np.stack([d.matrix for d in dets])
        centres = np.array([d.center_px for d in dets], dtype=float)
        return bases, k, matrices, centres

    def crossings_px_many(self, value_sets, hkl_a, hkl_b):
        """Crossing pixels for several parameter sets in one vectorised pass, (m, p, 2)."""
        bases, k, matrices, centres = self.stacked(value_sets)
        t = crossing_positions(bases, self.zone, self.x_axis, k, hkl_a, hkl_b)
        return t @ np.swapaxes(matrices, -1, -2) + centres[:, None, :]


@dataclass
class FitResult:
    """Outcome of :func:`refine`.

    The ``points`` list keeps every measured point with its assignment,
    residual (measured minus fitted, pixels) and whether it was used, with a
    reason when not.
    """

    model: str
    zone: tuple
    x_axis: tuple
    reference_cell: np.ndarray
    cell: np.ndarray
    cell_sigma: np.ndarray
    basis: np.ndarray
    kv: float
    kv_sigma: float | None
    detector: Detector
    detector_sigma: dict
    parameters: list
    values: np.ndarray
    sigmas: np.ndarray
    covariance: np.ndarray
    correlation: np.ndarray
    condition_number: float
    strain: object
    points: list
    rms_px: float
    n_points: int
    n_used: int
    chi2: float | None
    dof: int
    converged: bool
    warnings: list = field(default_factory=list)
    unique_axis: str | None = None
    disk_mrad: float = 6.0
    structure: dict | None = None
    inner_potential: bool = False
    wave_number: float = float("nan")
    lines: list | None = None
    assigned: bool = False

    def parameter(self, name):
        """(value, sigma) of a refined parameter."""
        i = self.parameters.index(name)
        return float(self.values[i]), float(self.sigmas[i])


def calibration_from_document(doc):
    """(kv, Detector) from a ``laueline.fit/1`` document."""
    try:
        det = doc["detector"]
        return float(doc["kv"]), Detector(tuple(float(v) for v in det["center_px"]),
                                          float(det["scale_px_per_mrad"]),
                                          float(det["rotation_deg"]), bool(det["mirror"]))
    except (KeyError, TypeError, ValueError):
        raise InputError("the calibration document lacks kv or detector fields") from None


# ---------------------------------------------------------------------------

def refine(crystal, zone, points, *, kv=200.0, model="strain", x_axis=None, free=(),
           hold=(), unique_axis=None, center_px=None, scale_px_per_mrad=None,
           rotation_deg=None, mirror=None, calibration=None, robust=False,
           disk_mrad=6.0, min_strength=0.1, min_angle_deg=5.0, match_mrad=0.25,
           inner_potential=False, stiffness=None, sample_axes=None):
    """Fit crystal and detector parameters to measured crossings.

    Parameters
    ----------
    crystal : Crystal
        The reference crystal (its cell is the strain reference).
    zone : sequence of 3 int
    points : laueline.points.Points
    kv : float
        Nominal voltage, the start value (or held value) of the fit.
    model : str
        One of :data:`MODELS`.
    x_axis : sequence of 3 int, optional
        Disk x axis; the default choice of :func:`laueline.frame.default_x_axis`.
    free, hold : sequence of str
        Parameters to free or hold besides the model's defaults: ``kv``,
        ``scale``, ``center``, ``rotation``, strain components or cell names.
    unique_axis : {'a', 'b', 'c'}, optional
        For tetragonal (default c) and monoclinic (default b) cells.
    center_px, scale_px_per_mrad, rotation_deg, mirror :
        Detector start values.  With labelled points they are estimated
        from the data when not given.
    calibration : (kv, Detector), optional
        From a reference fit: the voltage and the scale are held at its
        values; its centre, rotation and mirror are start values.
    robust : bool
        Down-weight outliers (soft-L1 loss) and list those rejected.
    disk_mrad : float
        Disk radius used to predict candidate crossings and to check points.
    min_strength, min_angle_deg :
        Candidate crossings for unlabelled points (see :func:`predict`).
    match_mrad : float
        Initial distance gate for assignment, mrad.
    inner_potential : bool
        Use the wave number inside the crystal.
    stiffness : ndarray (6, 6), optional
        Voigt stiffness (GPa) in the reference Cartesian frame, for stress.
    sample_axes : ndarray (3, 3), optional
        Rows of a sample frame for the strain (see :func:`laueline.strain.sample_axes`).

    Returns
    -------
    FitResult
    """
    check_inputs(rotation_deg=rotation_deg, scale_px_per_mrad=scale_px_per_mrad,
                 center_px=center_px, match_mrad=match_mrad, min_strength=min_strength,
                 min_angle_deg=min_angle_deg)
    if len(points) == 0:
        raise InputError("no points to fit")
    n = len(points)
    setup, warnings, center_px, scale_px_per_mrad, rotation_deg, mirror = _prepare(
        crystal, zone, kv=kv, model=model, x_axis=x_axis, free=free, hold=hold,
        unique_axis=unique_axis, center_px=center_px, scale_px_per_mrad=scale_px_per_mrad,
        rotation_deg=rotation_deg, mirror=mirror, calibration=calibration,
        inner_potential=inner_potential)

    xy = np.asarray(points.xy_px, dtype=float)
    _check_spread(xy)
    if center_px is not None and scale_px_per_mrad is not None:
        _check_inside_disk(xy, center_px, scale_px_per_mrad, disk_mrad)
    weights = np.ones(n) if points.sigma_px is None else 1.0 / points.sigma_px

    # -- labels ----------------------------------------------------------------
    if points.labelled:
        hkl_a, hkl_b = _check_labels(crystal, setup, points, disk_mrad)
        _start_detector_from_labels(setup, xy, hkl_a, hkl_b, center_px, scale_px_per_mrad,
                                    rotation_deg, mirror)
        used = np.ones(n, dtype=bool)
        reasons = [""] * n
        obs = _CrossingObs(xy, hkl_a, hkl_b, weights)
        x, fit_warnings, converged = _fit(setup, obs, robust)
        if robust:
            used, reasons, x, converged = _reject_outliers(setup, obs, x)
        warnings += fit_warnings
        fitted = setup.values(x)
        _check_inside_disk(xy, (fitted["center_x"], fitted["center_y"]), fitted["scale"],
                           disk_mrad)
    else:
        if scale_px_per_mrad is None:
            raise InputError("unlabelled points need a starting detector scale: give "
                             "--scale-px-per-mrad or --calibration")
        hkl_a, hkl_b, used, reasons, x, converged, assign_warnings = _assign_and_fit(
            setup, xy, weights, center_px, scale_px_per_mrad, rotation_deg, mirror,
            disk_mrad, min_strength, min_angle_deg, match_mrad, robust)
        warnings += assign_warnings

    rows, rms = _crossing_rows(setup, setup.values(x), xy, hkl_a, hkl_b, used, reasons)
    obs = _CrossingObs(xy, hkl_a, hkl_b, weights).subset(used)
    result = _result(setup, crystal, obs, x, converged, warnings, points.sigma_px is not None,
                     rows, rms, unique_axis=unique_axis if model in ("tetragonal", "monoclinic")
                     else None, disk_mrad=disk_mrad, stiffness=stiffness,
                     sample_axes=sample_axes, inner_potential=inner_potential)
    result.assigned = not points.labelled
    return result


def _prepare(crystal, zone, *, kv, model, x_axis, free, hold, unique_axis, center_px,
             scale_px_per_mrad, rotation_deg, mirror, calibration, inner_potential):
    """Validate the request and build the fit set-up and detector start values."""
    if model not in MODELS:
        raise InputError(f"unknown model '{model}'; choose one of {', '.join(MODELS)}")
    if unique_axis not in (None, "a", "b", "c"):
        raise InputError(f"the unique axis is a, b or c, got '{unique_axis}'")
    warnings = list(crystal.notes)
    zone, factor = reduce_indices(zone)
    if x_axis is None:
        x_axis = default_x_axis(crystal, zone)
    else:
        x_axis = tuple(int(v) for v in x_axis)
        if np.dot(x_axis, zone) != 0:
            raise InputError(f"the x axis {x_axis} is not normal to the zone {zone}")
    if calibration is not None:
        kv = calibration[0]
    kv = float(kv)
    make_beam(kv)  # validates the voltage

    # -- which parameters are free ----------------------------------------
    if model == "strain":
        crystal_names, expand = list(STRAIN_COMPONENTS), None
    elif model == "fixed":
        crystal_names, expand = [], None
    else:
        crystal_names, expand = _cell_model(model, unique_axis)
    free_set = set(crystal_names) | {"center_x", "center_y", "rotation"}
    if calibration is None:
        free_set.add("scale")
    allowed = set(crystal_names) | {"kv", "scale", "center", "rotation"}
    for word, action in [(w, "free") for w in free] + [(w, "hold") for w in hold]:
        if word not in allowed:
            raise InputError(f"cannot {action} '{word}' with model {model}; choose from "
                             f"{', '.join(sorted(allowed))}")
        names = ["center_x", "center_y"] if word == "center" else [word]
        if action == "free":
            free_set |= set(names)
        else:
            free_set -= set(names)
    if "kv" in free_set and _has_dilatation(model, free_set):
        raise InputError(
            "voltage and hydrostatic strain shift HOLZ lines in exactly the same way, so they "
            "cannot be freed together: calibrate the voltage on an unstrained reference "
            "(--model fixed --free kv) and hold it, or hold a normal strain component")
    order = crystal_names + ["kv"] + list(DETECTOR_NAMES)
    free_names = [nm for nm in order if nm in free_set]

    # -- start values ----------------------------------------------------------
    ref_cell = crystal.cell
    start = {nm: 0.0 for nm in STRAIN_COMPONENTS}
    start.update(dict(zip(CELL_NAMES, ref_cell)))
    if expand is not None:
        constrained = np.array(expand(start))
        if np.any(np.abs(constrained - ref_cell) > 1e-4 * np.maximum(np.abs(ref_cell), 1)):
            warnings.append(f"the reference cell does not have {model} symmetry; the fit "
                            f"starts from {np.round(constrained, 5).tolist()}")
    start["kv"] = kv
    det0 = calibration[1] if calibration is not None else None
    if center_px is None and det0 is not None:
        center_px = det0.center_px
    if scale_px_per_mrad is None and det0 is not None:
        scale_px_per_mrad = det0.scale_px_per_mrad
    if rotation_deg is None and det0 is not None:
        rotation_deg = det0.rotation_deg
    if mirror is None and det0 is not None:
        mirror = det0.mirror
    if scale_px_per_mrad is not None and not scale_px_per_mrad > 0:
        raise InputError("the detector scale must be positive")
    u0 = None
    if inner_potential:
        u0 = crystal.forward_scattering() / (math.pi * crystal.volume)
    setup = _Setup(crystal, zone, x_axis, model, free_names, start, expand, bool(mirror), u0)

    return setup, warnings, center_px, scale_px_per_mrad, rotation_deg, mirror


def _has_dilatation(model, free_set):
    if model == "fixed":
        return False
    if model == "strain":
        return {"exx", "eyy", "ezz"} <= free_set
    return True  # every cell model contains the uniform scaling of its lengths


def _check_spread(xy):
    if len(xy) >= 2:
        centred = xy - xy.mean(axis=0)
        sv = np.linalg.svd(centred, compute_uv=False)
        if sv[0] == 0 or sv[-1] < 1e-3 * sv[0]:
            raise InputError("the points are collinear (or coincide): a crossing pattern "
                             "needs points spread in two dimensions")


def _check_labels(crystal, setup, points, disk_mrad):
    hkl_a, hkl_b = points.hkl_a, points.hkl_b
    for h in np.concatenate([hkl_a, hkl_b]):
        if not np.any(h):
            raise InputError("a label names the reflection 0 0 0")
    absent = crystal.is_absent(np.concatenate([hkl_a, hkl_b]))
    if np.any(absent):
        bad = np.concatenate([hkl_a, hkl_b])[absent][0]
        raise InputError(f"label ({' '.join(map(str, bad))}) is a systematically absent "
                         f"reflection of {crystal.space_group_symbol}: it draws no line")
    layers = np.concatenate([hkl_a, hkl_b]) @ np.asarray(setup.zone)
    if np.any(layers < 0):
        bad = np.concatenate([hkl_a, hkl_b])[layers < 0][0]
        raise InputError(f"label ({' '.join(map(str, bad))}) has hu+kv+lw < 0 for zone "
                         f"{list(setup.zone)}: its line is not in the central disk")
    v = setup.start | {"center_x": 0.0, "center_y": 0.0, "scale": 1.0, "rotation": 0.0}
    t = setup.crossings_mrad(v, hkl_a, hkl_b)
    angles = crossing_angles_deg(setup.basis(v), setup.zone, setup.x_axis,
                                 setup.wave_number(v["kv"]), hkl_a, hkl_b,
                                 np.nan_to_num(t))
    bad = ~np.isfinite(t).all(axis=1) | (angles < 1.0)
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"row {i + 1}: lines ({' '.join(map(str, hkl_a[i]))}) and "
                         f"({' '.join(map(str, hkl_b[i]))}) are parallel or nearly so")
    return hkl_a, hkl_b


def _check_inside_disk(xy, center, scale, disk_mrad):
    """Refuse points far outside the disk of a known detector geometry."""
    t = (np.asarray(xy) - np.asarray(center)) / scale
    r = np.linalg.norm(t, axis=1)
    far = r > 1.5 * disk_mrad
    if np.any(far):
        i = int(np.flatnonzero(far)[0])
        raise InputError(f"point {i + 1} lies {r[i]:.1f} mrad from the centre, far outside "
                         f"a {disk_mrad:g} mrad disk (check the centre, the scale and "
                         "--disk-mrad)")


def _similarity(src, dst, mirror):
    """Least-squares dst = c + s R M src (Umeyama 1991), returns (c, s, angle_deg, rms)."""
    m = np.diag([1.0, -1.0 if mirror else 1.0])
    a = src @ m.T
    ca, cb = a.mean(axis=0), dst.mean(axis=0)
    a0, b0 = a - ca, dst - cb
    cov = b0.T @ a0
    angle = math.atan2(cov[1, 0] - cov[0, 1], cov[0, 0] + cov[1, 1])
    r = rotation_matrix(math.degrees(angle))
    s = np.sum((a0 @ r.T) * b0) / np.sum(a0 * a0)
    c = cb - s * (ca @ r.T)
    rms = math.sqrt(np.mean(np.sum((c + s * a @ r.T - dst) ** 2, axis=1)))
    return c, s, math.degrees(angle), rms


def _start_detector_from_labels(setup, xy, hkl_a, hkl_b, center, scale, rotation, mirror):
    t = setup.crossings_mrad(setup.start | {"center_x": 0, "center_y": 0, "scale": 1,
                                            "rotation": 0}, hkl_a, hkl_b)
    options = [mirror] if mirror is not None else [False, True]
    best = min((_similarity(t, xy, m) + (m,) for m in options), key=lambda r: r[3])
    c, s, angle, _, m = best
    setup.mirror = bool(m)
    setup.start["center_x"], setup.start["center_y"] = (c if center is None else center)
    setup.start["scale"] = s if scale is None else float(scale)
    setup.start["rotation"] = angle if rotation is None else float(rotation)


class _CrossingObs:
    """Measured crossings (px); one group is one crossing, two residuals."""

    kind = "crossings"
    group = 2

    def __init__(self, xy, hkl_a, hkl_b, weights):
        self.xy, self.hkl_a, self.hkl_b, self.weights = xy, hkl_a, hkl_b, weights

    def __len__(self):
        return len(self.xy)

    def subset(self, mask):
        return _CrossingObs(self.xy[mask], self.hkl_a[mask], self.hkl_b[mask],
                            self.weights[mask])

    def residuals(self, setup, value_sets):
        px = setup.crossings_px_many(value_sets, self.hkl_a, self.hkl_b)
        return ((px - self.xy) * self.weights[:, None]).reshape(len(value_sets), -1)

    def distances_px(self, setup, v):
        """Unweighted residual length per crossing, px."""
        return np.linalg.norm(setup.crossings_px(v, self.hkl_a, self.hkl_b) - self.xy, axis=1)


class _LineObs:
    """Points on detected lines (px); one group is one line.

    The residual of a point is its distance from the predicted exact locus of
    the line's reflection, whitened with the covariance of the detected
    line's position at those points.
    """

    kind = "lines"

    def __init__(self, hkl, points_px, whiten):
        self.hkl, self.points, self.whiten = hkl, points_px, whiten
        self.group = points_px.shape[1]

    def __len__(self):
        return len(self.hkl)

    def subset(self, mask):
        return _LineObs(self.hkl[mask], self.points[mask], self.whiten[mask])

    def _distances(self, setup, value_sets):
        bases, k, matrices, centres = setup.stacked(value_sets)
        inverse = np.linalg.inv(matrices)
        rel = self.points[None] - centres[:, None, None, :]            # (m, L, k, 2)
        t = np.einsum("mij,mlkj->mlki", inverse, rel)                   # mrad
        params = line_parameters_batch(bases, setup.zone, setup.x_axis, k, self.hkl)
        scale = np.array([v["scale"] for v in value_sets])
        return locus_distances(t * 1e-3, params) * 1e3 * scale[:, None, None]

    def residuals(self, setup, value_sets):
        d = self._distances(setup, value_sets)
        return np.einsum("lij,mlj->mli", self.whiten, d).reshape(len(value_sets), -1)

    def distances_px(self, setup, v):
        """Rms distance of each line's points from its predicted locus, px."""
        d = self._distances(setup, [v])[0]
        return np.sqrt(np.mean(d ** 2, axis=1))


def _residuals_and_jacobian(setup, x, obs):
    """Weighted residuals at x and their forward-difference Jacobian, one batched call."""
    trial = [x] + [x + _JAC_STEP * np.eye(x.size)[j] for j in range(x.size)]
    r = obs.residuals(setup, [setup.values(xx) for xx in trial])
    return r[0], ((r[1:] - r[0]) / _JAC_STEP).T


def _fit(setup, obs, robust, f_scale=None):
    """One least-squares fit; returns (x, warnings, converged)."""
    from scipy.optimize import least_squares

    p = len(setup.free)
    n_obs = len(obs) * obs.group
    if n_obs < p:
        raise InputError(f"{len(obs)} {obs.kind} give {n_obs} observations for "
                         f"{p} free parameters; measure more or hold parameters")

    def fun(x):
        return obs.residuals(setup, [setup.values(x)])[0]

    def jac(x):
        return _residuals_and_jacobian(setup, x, obs)[1]

    x0 = np.zeros(p)
    if p == 0:
        return x0, [], True
    if robust:
        if f_scale is None:
            r = np.linalg.norm(fun(x0).reshape(-1, obs.group), axis=1)
            f_scale = max(np.median(r) / _median_norm(obs.group), 1e-3)
        res = least_squares(fun, x0, jac=jac, method="trf", loss="soft_l1", f_scale=f_scale,
                            x_scale=1.0, max_nfev=100 * (p + 1))
    else:
        method = "lm" if n_obs >= p else "trf"
        res = least_squares(fun, x0, jac=jac, method=method, x_scale=1.0,
                            max_nfev=100 * (p + 1))
    warnings = []
    converged = bool(res.status > 0 and np.all(np.isfinite(res.x)))
    if not converged:
        warnings.append(f"the least-squares fit stopped without converging ({res.message})")
    return res.x, warnings, converged


def _median_norm(k):
    """Median of the length of a k-dimensional standard Gaussian vector."""
    from scipy.stats import chi2

    return math.sqrt(chi2.ppf(0.5, k))


def _reject_outliers(setup, obs, x):
    """After a robust fit, drop groups beyond the 4-sigma level and refit by least squares.

    For one crossing (k = 2) the level is a residual 4 robust sigmas long
    (tail probability exp(-8)); other group sizes use the same probability.
    """
    from scipy.stats import chi2

    v = setup.values(x)
    r = np.linalg.norm(obs.residuals(setup, [v])[0].reshape(len(obs), obs.group), axis=1)
    sigma = max(np.median(r) / _median_norm(obs.group), 1e-9)
    level = math.sqrt(chi2.isf(math.exp(-8.0), obs.group))
    used = r <= level * sigma
    reasons = ["" if u else f"outlier: residual {ri / sigma:.1f} robust sigmas"
               for u, ri in zip(used, r)]
    x, _, converged = _fit(setup, obs.subset(used), robust=False)
    return used, reasons, x, converged


# -- assignment of unlabelled points -------------------------------------------

def _candidate_crossings(setup, v, disk_mrad, min_strength, min_angle_deg):
    crystal = setup.crystal.with_basis(setup.basis(v))
    pattern = predict(crystal, setup.zone, v["kv"], disk_mrad, x_axis=setup.x_axis,
                      min_strength=min_strength, min_angle_deg=min_angle_deg,
                      wave_number=setup.wave_number(v["kv"]))
    ha, hb = pattern.crossing_hkl()
    return ha, hb, pattern.crossing_mrad


def _vote_offset(u, t, gate, bound):
    """Mode of the differences u_i - t_j on a grid of cell ``gate``.

    ``bound`` limits |u_i - t_j| componentwise, which fixes the grid.
    """
    d = (u[:, None, :] - t[None, :, :]).reshape(-1, 2)
    span = int(math.ceil(2 * bound / gate)) + 1
    q = ((d + bound) / gate).astype(np.int64)
    counts = np.bincount(q[:, 0] * span + q[:, 1], minlength=span * span)
    best = int(np.argmax(counts))
    centre = (np.array([best // span, best % span]) + 0.5) * gate - bound
    near = np.sum((d - centre) ** 2, axis=1) < (1.5 * gate) ** 2
    return np.median(d[near], axis=0)


def _search_orientation(xy, t_cand, scale, center, rotation, mirror, gate_mrad):
    """Search rotation, mirror (and centre) maximising gated matches.

    Coarse steps of 3 degrees with a gate wide enough for the step, then
    fine steps around the five best coarse candidates.  Without a centre,
    the offset is the mode of all point-candidate differences.
    """
    from scipy.spatial import cKDTree

    tree = cKDTree(t_cand)
    mirrors = [mirror] if mirror is not None else [False, True]
    r_max = max(float(np.max(np.linalg.norm(t_cand, axis=1))), 1e-9)

    def score(m, rot, gate):
        inv = np.diag([1.0, -1.0 if m else 1.0]) @ rotation_matrix(-rot) / scale
        u = xy @ inv.T  # lies on the candidates, shifted, when (R, M, s) are right
        if center is None:
            bound = float(np.max(np.abs(u))) + r_max
            offset = _vote_offset(u, t_cand, gate, bound)
        else:
            offset = np.asarray(center) @ inv.T
        dist, _ = tree.query(u - offset, distance_upper_bound=gate)
        hits = np.isfinite(dist)
        return (int(hits.sum()), -float(np.sum(dist[hits]))), np.linalg.solve(inv, offset)

    if rotation is not None:
        trials = [(m, float(rotation)) for m in mirrors]
        fine_step = None
    else:
        coarse = 3.0
        coarse_gate = max(gate_mrad, 0.6 * r_max * math.radians(coarse))
        ranked = sorted(((score(m, rot, coarse_gate)[0], m, rot) for m in mirrors
                         for rot in np.arange(0.0, 360.0, coarse)),
                        key=lambda r: r[0], reverse=True)[:5]
        fine_step = min(1.0, math.degrees(gate_mrad / r_max))
        trials = [(m, rot + d) for _, m, rot in ranked
                  for d in np.arange(-coarse, coarse + 1e-9, fine_step)]
    results = sorted(((score(m, rot % 360.0, gate_mrad), m, rot % 360.0)
                      for m, rot in trials),
                     key=lambda r: (r[0][0][0], not r[1], r[0][0][1]), reverse=True)
    (sc, c), m, rot = results[0]
    rivals = [(other_m, other_rot) for (other_sc, _), other_m, other_rot in results[1:]
              if other_sc[0] >= sc[0] and (other_m != m or
                                           abs((other_rot - rot + 180) % 360 - 180) > 5)]
    return sc, m, rot, c, rivals


def _match(xy_px, cand_px, gate_px, distinct=False, minimum=0):
    """Optimal one-to-one assignment within a gate; returns candidate index or -1.

    With ``distinct``, only points whose nearest candidate is less than half
    as far as the next are matched (unless that leaves fewer than ``minimum``
    points): the unambiguous matches that start the alternation safely.
    """
    from scipy.optimize import linear_sum_assignment
    from scipy.spatial.distance import cdist

    d = cdist(xy_px, cand_px)
    if distinct and d.shape[1] > 1:
        two = np.sort(d, axis=1)[:, :2]
        clear = (two[:, 0] <= gate_px) & (two[:, 0] < 0.5 * two[:, 1])
        if 2 * clear.sum() >= max(minimum, 6):
            d = np.where(clear[:, None], d, np.inf)
    cost = np.where(d <= gate_px, d, 1e6)
    rows, cols = linear_sum_assignment(cost)
    assigned = np.full(len(xy_px), -1)
    ok = d[rows, cols] <= gate_px
    assigned[rows[ok]] = cols[ok]
    return assigned


def _assign_and_fit(setup, xy, weights, center, scale, rotation, mirror, disk_mrad,
                    min_strength, min_angle_deg, match_mrad, robust):
    warnings = []
    v0 = dict(setup.start)
    ha, hb, t_cand = _candidate_crossings(setup, v0, disk_mrad, min_strength, min_angle_deg)
    if len(t_cand) < 2:
        raise InputError("fewer than two predicted crossings to match the points to; "
                         "lower --min-strength or check the zone axis")
    score, m, rot, c, rivals = _search_orientation(xy, t_cand, scale, center, rotation,
                                                   mirror, match_mrad)
    if score[0] < max(3, 0.3 * len(xy)):
        raise InputError(f"only {score[0]} of {len(xy)} points lie within {match_mrad:g} mrad "
                         "of a predicted crossing in any orientation: check the zone axis, "
                         "the scale or --match-mrad")
    if rotation is None:
        warnings.append(f"orientation found by search: rotation {rot:.1f} deg, mirror "
                        f"{'yes' if m else 'no'}")
    if rivals:
        other_m, other_rot = rivals[0]
        warnings.append(
            f"the points fit the pattern equally well at rotation {other_rot:.1f} deg, mirror "
            f"{'yes' if other_m else 'no'}: the pattern's symmetry leaves the assignment, and "
            "with it the sign or order of some strain components, undetermined; fix the "
            "orientation with --rotation-deg and --mirror (or --calibration) from a "
            "labelled reference")
    setup.mirror = bool(m)
    setup.start.update(center_x=float(c[0]), center_y=float(c[1]), scale=float(scale),
                       rotation=float(rot))

    gate = match_mrad
    x = np.zeros(len(setup.free))
    previous = None
    converged = False
    for round_ in range(12):
        v = setup.values(x)
        if previous is not None:
            ha, hb, t_cand = _candidate_crossings(setup, v, disk_mrad, min_strength,
                                                  min_angle_deg)
        cand_px = setup.detector(v).to_pixels(t_cand)
        assigned = _match(xy, cand_px, gate * v["scale"], distinct=round_ == 0,
                          minimum=len(setup.free))
        used = assigned >= 0
        key = tuple((tuple(ha[a]), tuple(hb[a])) if a >= 0 else None for a in assigned)
        if key == previous:
            break
        previous = key
        if 2 * used.sum() < len(setup.free):
            raise InputError(f"only {int(used.sum())} points matched a predicted crossing: "
                             f"too few for {len(setup.free)} parameters")
        full_a = np.zeros((len(xy), 3), dtype=np.int64)
        full_b = np.zeros((len(xy), 3), dtype=np.int64)
        full_a[used], full_b[used] = ha[assigned[used]], hb[assigned[used]]
        obs = _CrossingObs(xy, full_a, full_b, weights).subset(used)
        # the first round starts from the reference and may hold wrong matches: a
        # robust loss keeps them from dragging the fit away
        x_new, fit_warnings, converged = _fit(setup, obs, robust or round_ == 0)
        setup_v = setup.values(x_new)
        r = obs.distances_px(setup, setup_v)
        # shrink the gate toward the achieved precision, never below 3 px
        gate = max(min(match_mrad, 6 * np.sqrt(np.mean(r ** 2)) / setup_v["scale"]),
                   3.0 / setup_v["scale"])
        x = x_new
    else:
        warnings.append("the assignment of points to crossings did not settle in 12 rounds")
        converged = False
    reasons = ["" if u else "no predicted crossing within the gate" for u in used]
    # a point near two predicted crossings (lines meeting almost at one point)
    # could be either: say so where the second is within three residuals
    v = setup.values(x)
    cand_px = setup.detector(v).to_pixels(t_cand)
    fitted = obs.distances_px(setup, v)
    level = 3 * max(float(np.sqrt(np.mean(fitted ** 2))), 0.05)
    from scipy.spatial.distance import cdist

    d = cdist(xy, cand_px)
    ambiguous = 0
    for i in np.flatnonzero(used):
        near = np.flatnonzero(d[i] < level)
        others = [k for k in near if {tuple(ha[k]), tuple(hb[k])} !=
                  {tuple(full_a[i]), tuple(full_b[i])}]
        if others:
            k = others[0]
            reasons[i] = (f"ambiguous: the crossing of ({' '.join(map(str, ha[k]))}) and "
                          f"({' '.join(map(str, hb[k]))}) is as near")
            ambiguous += 1
    if ambiguous:
        warnings.append(f"{ambiguous} point(s) lie as near to a second predicted crossing "
                        "(lines meeting almost at one point); their assignment is ambiguous "
                        "(see the points table)")
    if robust:
        used_r, reasons_r, x, converged = _reject_outliers(
            setup, _CrossingObs(xy, full_a, full_b, weights).subset(used), x)
        idx = np.flatnonzero(used)
        for k, i in enumerate(idx):
            if not used_r[k]:
                used[i] = False
                reasons[i] = reasons_r[k]
    n_left = int((~used).sum())
    if n_left:
        warnings.append(f"{n_left} point(s) left out of the fit (see the points table)")
    warnings += fit_warnings
    return full_a, full_b, used, reasons, x, converged, warnings


# -- results -------------------------------------------------------------------

def _crossing_rows(setup, v, xy, hkl_a, hkl_b, used, reasons):
    """Points table: measured, assigned, residual (measured - fitted, px), used, note."""
    fitted = np.full_like(xy, np.nan)
    labelled = np.any(hkl_a != 0, axis=1)
    if np.any(labelled):
        fitted[labelled] = setup.crossings_px(v, hkl_a[labelled], hkl_b[labelled])
    rows = [{"x_px": xy[i, 0], "y_px": xy[i, 1], "hkl_a": hkl_a[i].tolist(),
             "hkl_b": hkl_b[i].tolist(), "residual_px": (xy[i] - fitted[i]).tolist(),
             "used": bool(used[i]), "note": reasons[i]} for i in range(len(xy))]
    res = (xy - fitted)[used]
    rms = float(np.sqrt(np.mean(np.sum(res ** 2, axis=1)))) if np.any(used) else float("nan")
    return rows, rms


def _result(setup, crystal, obs, x, converged, warnings, sigma_given, rows, rms, *,
            unique_axis, disk_mrad, stiffness, sample_axes, inner_potential, lines=None,
            inflate=False):
    """Statistics, strain and stress of a finished fit on the used observations ``obs``.

    With ``inflate``, stated uncertainties are scaled up by sqrt(chi2 / dof)
    when the scatter exceeds them (never down).
    """
    p = len(setup.free)
    v = setup.values(x)

    f0, jac = _residuals_and_jacobian(setup, x, obs)
    m = f0.size
    dof = m - p
    chi2 = float(np.sum(f0 ** 2))
    if p:
        scale = np.linalg.norm(jac, axis=0)
        if np.any(scale == 0):
            dead = [setup.free[j] for j in np.flatnonzero(scale == 0)]
            raise InputError(f"degenerate fit: the data do not depend on {', '.join(dead)}; "
                             "hold it")
        _, sv, vt = np.linalg.svd(jac / scale, full_matrices=False)
        condition = float(sv[0] / sv[-1]) if sv[-1] > 0 else float("inf")
        if not np.isfinite(condition) or condition > 1e10:
            worst = vt[-1]
            names = [setup.free[j] for j in np.argsort(-np.abs(worst))[:2]]
            raise InputError(f"degenerate fit: {' and '.join(names)} cannot be separated by "
                             f"these {obs.kind}; hold one of them or measure more")
        cov_int = (vt.T / sv ** 2) @ vt / np.outer(scale, scale)
        if not sigma_given:
            s2 = chi2 / dof if dof > 0 else float("nan")
            cov_int = cov_int * s2
        elif inflate and dof > 0 and chi2 > dof:
            cov_int = cov_int * (chi2 / dof)
        units = setup.units
        cov = cov_int * np.outer(units, units)
    else:
        condition = 1.0
        cov = np.zeros((0, 0))
    sig = np.sqrt(np.maximum(np.diag(cov), 0))
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cov / np.outer(sig, sig) if p else cov
    values = np.array([v[nm] for nm in setup.free])

    # -- warnings on the statistics ---------------------------------------------
    if dof < 5:
        warnings.append(f"only {dof} degrees of freedom: uncertainties are themselves "
                        "uncertain")
    for i in range(p):
        for j in range(i + 1, p):
            if abs(corr[i, j]) > 0.95:
                warnings.append(f"{setup.free[i]} and {setup.free[j]} are correlated "
                                f"({corr[i, j]:+.3f}): they are poorly separated")
    chi2_out = None
    if sigma_given and dof > 0:
        from scipy.stats import chi2 as chi2_dist

        chi2_out = chi2
        p_value = float(chi2_dist.sf(chi2, dof))
        if p_value < 0.01:
            warnings.append(f"chi-square {chi2:.1f} for {dof} degrees of freedom "
                            f"(p = {p_value:.1e}): the scatter exceeds sigma_px, so the "
                            f"uncertainties are underestimated by about "
                            f"{math.sqrt(chi2 / dof):.2f}x")
        elif chi2_dist.cdf(chi2, dof) < 0.01:
            warnings.append(f"chi-square {chi2:.1f} for {dof} degrees of freedom is "
                            "implausibly small: sigma_px may be overstated")

    # -- derived quantities ---------------------------------------------------------
    steps = np.maximum(sig, 1e-12 * np.maximum(np.abs(values), 1.0)) * 1e-3
    if p == 0:
        steps = np.zeros(0)

    def basis_of(vals):
        vv = dict(v)
        vv.update(zip(setup.free, vals))
        return setup.basis(vv)

    from .strain import propagate

    basis = setup.basis(v)
    cell = cell_from_basis(basis)
    if p:
        cov_cell = propagate(lambda vals: cell_from_basis(basis_of(vals)), values, cov, steps)
        cell_sigma = np.sqrt(np.maximum(np.diag(cov_cell), 0))
        strain = strain_report(crystal.basis, basis_of, values, cov, steps,
                               stiffness=stiffness, axes=sample_axes)
    else:
        cell_sigma = np.zeros(6)
        strain = strain_report(crystal.basis, lambda _: basis, np.zeros(1), np.zeros((1, 1)),
                               np.ones(1), stiffness=stiffness, axes=sample_axes)

    def sigma_of(name):
        return float(sig[setup.free.index(name)]) if name in setup.free else None

    det_sigma = {
        "center_px": ([sigma_of("center_x"), sigma_of("center_y")]
                      if "center_x" in setup.free else None),
        "scale_px_per_mrad": sigma_of("scale"),
        "rotation_deg": sigma_of("rotation"),
    }
    if p and "kv" not in setup.free and setup.model != "fixed" and "scale" in setup.free:
        warnings.append("the camera scale is refined together with the crystal: scale and "
                        "in-plane dilatation are nearly degenerate in one pattern; calibrate "
                        "the scale on a reference (--calibration) for trustworthy strain")
    return FitResult(
        model=setup.model, zone=setup.zone, x_axis=setup.x_axis,
        reference_cell=crystal.cell, cell=cell, cell_sigma=cell_sigma, basis=basis,
        kv=v["kv"], kv_sigma=sigma_of("kv"), detector=setup.detector(v),
        detector_sigma=det_sigma, parameters=list(setup.free), values=values, sigmas=sig,
        covariance=cov, correlation=corr, condition_number=condition, strain=strain,
        points=rows, rms_px=rms, n_points=len(rows), n_used=int(sum(r["used"] for r in rows)),
        chi2=chi2_out,
        dof=int(dof), converged=converged, warnings=list(dict.fromkeys(warnings)),
        unique_axis=unique_axis, disk_mrad=disk_mrad, structure=crystal.summary(),
        inner_potential=inner_potential, wave_number=setup.wave_number(v["kv"]),
        lines=lines)


def fitted_pattern(result, crystal, min_strength=0.05):
    """The pattern predicted with the fitted basis and wave number (for figures)."""
    return predict(crystal.with_basis(result.basis), result.zone, result.kv, result.disk_mrad,
                   x_axis=result.x_axis, min_strength=min_strength,
                   wave_number=result.wave_number)


# ---------------------------------------------------------------------------
# fitting detected lines
# ---------------------------------------------------------------------------

_POINTS_PER_LINE = (-0.8, 0.0, 0.8)  # positions along each chord, fractions of its half


def _line_samples(detection, indices):
    """Three points on each detected line and their whitening matrices."""
    cx, cy = detection.disk.center_px
    points, whiten = [], []
    for i in indices:
        ln = detection.lines[i]
        ang = math.radians(ln.normal_angle_deg)
        n = np.array([math.cos(ang), math.sin(ang)])
        m = np.array([-n[1], n[0]])
        along = (ln.points_px - [cx, cy]) @ m
        half = 0.5 * (along.max() - along.min())
        mid = 0.5 * (along.max() + along.min())
        s = mid + half * np.array(_POINTS_PER_LINE)
        offset = ln.offset_px + ln.curvature_per_px * s * s
        pts = np.array([cx, cy]) + offset[:, None] * n + s[:, None] * m
        # position along the normal moves by d_rho - s d_angle + s^2 d_kappa
        jac = np.stack([np.ones_like(s), -s, s * s], axis=1)
        cov = jac @ ln.covariance @ jac.T + np.eye(3) * 1e-12
        whiten.append(np.linalg.inv(np.linalg.cholesky(cov)))
        points.append(pts)
    return np.array(points), np.array(whiten)


def _predicted_lines_px(setup, v, disk_mrad, min_strength, centre):
    """Predicted lines as (hkl, normal angle rad, offset px from ``centre``) in pixels."""
    crystal = setup.crystal.with_basis(setup.basis(v))
    pattern = predict(crystal, setup.zone, v["kv"], disk_mrad, x_axis=setup.x_axis,
                      min_strength=min_strength, min_angle_deg=0.0,
                      wave_number=setup.wave_number(v["kv"]))
    det = setup.detector(v)
    # a straight line n.t = d in mrad maps to pixels as N.(p - c) = d with N = M^-T n
    normal_px = pattern.normal @ np.linalg.inv(det.matrix)
    length = np.linalg.norm(normal_px, axis=1)
    normal_px /= length[:, None]
    offset = pattern.offset_mrad / length + normal_px @ (np.asarray(det.center_px) - centre)
    return pattern.hkl, np.arctan2(normal_px[:, 1], normal_px[:, 0]), offset


def _line_cost(detection, indices, angles, offsets, centre):
    """Mean distance (px) of each detected line's chord points from each predicted line.

    Lines more than 1 deg apart in direction get an infinite cost: voltage and
    strain move lines sideways far more than they turn them.
    """
    cost = np.empty((len(indices), len(angles)))
    normals = np.stack([np.cos(angles), np.sin(angles)], axis=1)
    for r, i in enumerate(indices):
        ln = detection.lines[i]
        pts = ln.points_px[::8] - centre
        cost[r] = np.mean(np.abs(pts @ normals.T - offsets[None, :]), axis=0)
        da = np.angle(np.exp(1j * (math.radians(ln.normal_angle_deg) - angles)))
        turned = np.minimum(np.abs(da), np.pi - np.abs(da)) > math.radians(1.0)
        cost[r, turned] = np.inf
    return cost


def _search_line_orientation(detection, indices, setup, v0, disk_mrad, min_strength,
                             rotation, mirror, gate_px):
    """Rotation and mirror that bring most predicted lines onto detected ones."""
    centre = np.asarray(detection.disk.center_px)
    d_ang = np.array([math.radians(detection.lines[i].normal_angle_deg) for i in indices])
    d_off = np.array([detection.lines[i].offset_px for i in indices])
    mirrors = [mirror] if mirror is not None else [False, True]
    rotations = [float(rotation)] if rotation is not None else np.arange(0.0, 360.0, 0.5)
    results = []
    for m in mirrors:
        setup.mirror = bool(m)
        v = dict(v0, rotation=0.0)
        hkl, p_ang, p_off = _predicted_lines_px(setup, v, disk_mrad, min_strength, centre)
        for rot in rotations:  # the detector rotation turns every line normal by rot
            ang = p_ang + math.radians(rot)
            # compare lines as (angle, offset) pairs, allowing the flipped description
            da = np.angle(np.exp(1j * (d_ang[:, None] - ang[None, :])))
            same = (np.abs(da) < math.radians(1.0)) & (np.abs(d_off[:, None] - p_off[None, :])
                                                      < gate_px)
            flipped = (np.abs(np.abs(da) - math.pi) < math.radians(1.0)) & \
                (np.abs(d_off[:, None] + p_off[None, :]) < gate_px)
            hits = int(np.sum(np.any(same | flipped, axis=1)))
            results.append((hits, not m, -rot, m, rot))
    results.sort(reverse=True)
    hits, _, _, m, rot = results[0]
    rivals = [(r[3], r[4]) for r in results[1:] if r[0] >= hits and
              (r[3] != m or abs((r[4] - rot + 180) % 360 - 180) > 5)]
    return hits, m, rot, rivals


def refine_image(crystal, zone, detection, *, kv=200.0, model="strain", x_axis=None, free=(),
                 hold=(), unique_axis=None, center_px=None, scale_px_per_mrad=None,
                 rotation_deg=None, mirror=None, calibration=None, robust=False,
                 disk_mrad=None, min_strength=0.1, match_px=None, inner_potential=False,
                 stiffness=None, sample_axes=None):
    """Fit crystal and detector parameters to detected line positions.

    The detected lines (:func:`laueline.images.detect.detect_lines`) are
    assigned to predicted lines by optimal matching inside a distance gate,
    after a search over rotation and mirror when the rotation is unknown;
    the fit then minimises the distances of three points on each detected
    line from the exact predicted locus of its reflection, whitened with the
    detection's covariance of the line position.  Fit and assignment
    alternate until the assignment is stable.  When the scatter exceeds what
    the detection's covariances promise (chi2 / dof > 1: crossings, background
    and profile shape are modelled only approximately), the uncertainties are
    scaled up by sqrt(chi2 / dof).  Parameters are those of
    :func:`refine`; the pattern centre starts at the detected disk centre,
    and the disk radius in mrad follows from the detected radius and the
    scale (or, given ``disk_mrad``, the scale from the radius).

    Returns
    -------
    FitResult
        With ``lines`` listing every detected line, its assignment and
        residual, and ``points`` the detected crossings against the fitted ones.
    """
    from scipy.optimize import linear_sum_assignment

    good = detection.good_lines
    if len(good) < 3:
        raise InputError(f"only {len(good)} usable lines were detected: too few to fit")
    radius_px = detection.disk.radius_px
    if calibration is not None and scale_px_per_mrad is None:
        scale_px_per_mrad = calibration[1].scale_px_per_mrad
    if scale_px_per_mrad is None:
        if disk_mrad is None:
            raise InputError("fitting an image needs the camera scale: give "
                             "--scale-px-per-mrad, --calibration or --disk-mrad")
        scale_px_per_mrad = radius_px / float(disk_mrad)
    if disk_mrad is None:
        disk_mrad = radius_px / scale_px_per_mrad
    if center_px is None:
        center_px = detection.disk.center_px
    setup, warnings, center_px, scale_px_per_mrad, rotation_deg, mirror = _prepare(
        crystal, zone, kv=kv, model=model, x_axis=x_axis, free=free, hold=hold,
        unique_axis=unique_axis, center_px=center_px, scale_px_per_mrad=scale_px_per_mrad,
        rotation_deg=rotation_deg, mirror=mirror, calibration=calibration,
        inner_potential=inner_potential)
    warnings = warnings + list(detection.warnings)
    if calibration is not None:
        # the pattern centre moves between regions; the disk centre is the better start
        center_px = detection.disk.center_px
    setup.start.update(center_x=float(center_px[0]), center_y=float(center_px[1]),
                       scale=float(scale_px_per_mrad))
    # a voltage a few kV off, or a strain of a few 1e-3, moves lines by up to about
    # half a mrad: the first assignment needs a gate that wide
    gate = match_px if match_px is not None else max(3.0, 0.5 * scale_px_per_mrad)

    hits, m, rot, rivals = _search_line_orientation(
        detection, good, setup, dict(setup.start), disk_mrad, min_strength, rotation_deg,
        mirror, gate)
    if hits < max(3, 0.3 * len(good)):
        raise InputError(f"only {hits} of {len(good)} detected lines match predicted ones in "
                         "any orientation: check the zone axis, the voltage and the scale")
    if rotation_deg is None:
        warnings.append(f"orientation found by search: rotation {rot:.1f} deg, mirror "
                        f"{'yes' if m else 'no'}")
    if rivals:
        warnings.append(
            f"the lines fit the pattern equally well at rotation {rivals[0][1]:.1f} deg, "
            f"mirror {'yes' if rivals[0][0] else 'no'}: the pattern's symmetry leaves the "
            "assignment, and with it the sign or order of some strain components, "
            "undetermined; fix the orientation from a labelled reference")
    setup.mirror = bool(m)
    setup.start["rotation"] = float(rot)

    points_all, whiten_all = _line_samples(detection, good)
    centre = np.asarray(detection.disk.center_px)
    x = np.zeros(len(setup.free))
    previous = None
    converged = False
    fit_warnings = []
    for _ in range(12):
        v = setup.values(x)
        hkl, p_ang, p_off = _predicted_lines_px(setup, v, disk_mrad, min_strength, centre)
        cost = _line_cost(detection, good, p_ang, p_off, centre)
        rows_, cols_ = linear_sum_assignment(np.where(cost <= gate, cost, 1e6))
        assigned = np.full(len(good), -1)
        ok = cost[rows_, cols_] <= gate
        assigned[rows_[ok]] = cols_[ok]
        key = tuple(tuple(hkl[a]) if a >= 0 else None for a in assigned)
        if key == previous:
            break
        previous = key
        used = assigned >= 0
        if used.sum() * 3 < len(setup.free):
            raise InputError(f"only {int(used.sum())} detected lines matched predicted ones: "
                             f"too few for {len(setup.free)} parameters")
        line_hkl = np.zeros((len(good), 3), dtype=np.int64)
        line_hkl[used] = hkl[assigned[used]]
        obs = _LineObs(line_hkl, points_all, whiten_all).subset(used)
        x_new, fit_warnings, converged = _fit(setup, obs, robust)
        r = obs.distances_px(setup, setup.values(x_new))
        gate = max(min(gate, 6 * float(np.sqrt(np.mean(r ** 2)))), 2.0)
        x = x_new
    else:
        warnings.append("the assignment of lines did not settle in 12 rounds")
        converged = False
    reasons = ["" if u else "no predicted line within the gate" for u in used]
    if robust:
        used_r, reasons_r, x, converged = _reject_outliers(
            setup, _LineObs(line_hkl, points_all, whiten_all).subset(used), x)
        for k, i in enumerate(np.flatnonzero(used)):
            if not used_r[k]:
                used[i] = False
                reasons[i] = reasons_r[k]
    warnings += fit_warnings
    if int((~used).sum()):
        warnings.append(f"{int((~used).sum())} detected line(s) left out of the fit "
                        "(see the lines table)")

    v = setup.values(x)
    full = _LineObs(line_hkl, points_all, whiten_all)
    dist = np.full(len(good), np.nan)
    offsets = np.full((len(good), points_all.shape[1]), np.nan)
    if np.any(used):
        dist[used] = full.subset(used).distances_px(setup, v)
        offsets[used] = full.subset(used)._distances(setup, [v])[0]
    lines = []
    index_of = {i: k for k, i in enumerate(good)}
    for i, ln in enumerate(detection.lines):
        k = index_of.get(i)
        entry = {"index": i, "hkl": line_hkl[k].tolist() if k is not None else [0, 0, 0],
                 "residual_px": float(dist[k]) if k is not None else None,
                 "used": bool(k is not None and used[k]),
                 "note": ln.flag if k is None else reasons[k],
                 "normal_angle_deg": ln.normal_angle_deg}
        if k is not None:
            # signed distances of the line's sample points from the fitted locus
            entry["points_px"] = points_all[k].tolist()
            entry["point_residuals_px"] = offsets[k].tolist()
        lines.append(entry)
    # the detected crossings of assigned lines, against the fitted ones
    label = {i: line_hkl[k] for k, i in enumerate(good) if used[k]}
    cx_rows = [(xy, label[a], label[b]) for (a, b), xy in
               zip(detection.crossing_lines, detection.crossing_px) if a in label and b in label]
    if cx_rows:
        xy = np.array([c[0] for c in cx_rows])
        ha = np.array([c[1] for c in cx_rows])
        hb = np.array([c[2] for c in cx_rows])
        rows, _ = _crossing_rows(setup, v, xy, ha, hb, np.ones(len(xy), bool),
                                 ["derived from two fitted lines"] * len(xy))
    else:
        rows = []
    rms = float(np.sqrt(np.nanmean(dist[used] ** 2))) if np.any(used) else float("nan")
    obs = full.subset(used)
    result = _result(setup, crystal, obs, x, converged, warnings, True, rows, rms,
                     unique_axis=unique_axis if model in ("tetragonal", "monoclinic") else None,
                     disk_mrad=disk_mrad, stiffness=stiffness, sample_axes=sample_axes,
                     inner_potential=inner_potential, lines=lines, inflate=True)
    result.n_used = int(used.sum())
    result.n_points = len(good)
    return result
