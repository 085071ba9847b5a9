"""The one fit engine: assignment and least squares for every kind of observation.

One loop serves crossings (labelled or not) and detected lines, for one
pattern or several of the same region:

1. each pattern's detector is started (from labels by a similarity fit, or
   by a search over rotation and mirror) -- :mod:`laueline.fit.observations`;
2. every pattern assigns its observations to predicted features; if no
   assignment changed since the last round the loop ends;
3. one least-squares fit of all patterns together (one crystal, one
   strain; a detector and voltage per pattern), whitened by each
   observation's residual covariance -- with a robust loss while
   observations are being assigned;
4. the assignment gates shrink toward the achieved precision; back to 2.

When observations were assigned (or ``robust`` is asked for), matches beyond
the 4-sigma level are then set aside, the assignment is revisited from the
clean fit, and a final least-squares fit is made without outliers.  The
covariance of the parameters comes from
:func:`laueline.fit.covariance.parameter_covariance`, fed by the residual
covariance of each observation type.

A fit that stops without converging is returned with ``success`` False and
the reason in ``message`` (its report is still written); one that diverges
to non-finite parameters raises :class:`laueline.errors.FitError`.

What is refined: the crystal by ``model`` (``strain``: the six Green-Lagrange
components, optionally reduced by exact constraints; ``fixed``: the
reference cell, for calibration; or a cell of given symmetry), the detector
centre, scale and rotation of each pattern (the mirror is chosen, not
refined; the elliptical distortion only when freed), and optionally the
voltage.  Voltage and hydrostatic strain shift HOLZ lines identically, so
they are never freed together.

References
----------
Zuo, J. M. (1992). Automated lattice parameter measurement from HOLZ lines
and their use for the measurement of oxygen content in YBa2Cu3O7-d from
nanometer-sized region. Ultramicroscopy 41, 211-223.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np

from ..errors import FitError, InputError
from ..frame import default_x_axis, reduce_indices
from ..optics import make_beam
from .assemble import assemble_result
from .calibration import Calibration, PixelFrame
from .constraints import STRAIN_COMPONENTS, strain_constraints
from .covariance import apply_whitener, whitener
from .indices import is_hexagonal, parse_direction, parse_plane
from .observations import CrossingData, LineData
from .orientation import orientation_from_tilts, pattern_rotations_deg
from .parameters import ParameterModel

__all__ = ["PatternSpec", "LineSigma", "DEFAULT_LINE_SIGMA_PX", "refine", "refine_image",
           "refine_patterns"]

_JAC_STEP = 1e-6
_MAX_ROUNDS = 12


@dataclass
class PatternSpec:
    """One pattern of a fit: what was measured and how it was recorded.

    Attributes
    ----------
    zone : sequence of int
        Zone axis [u v w] (or [U V T W] for a hexagonal crystal).
    points : laueline.points.Points, optional
        Measured crossings, internal y-down pixels (see ``pixel_frame``).
    detection : laueline.images.detect.Detection, optional
        Lines detected in an image (give ``points`` or ``detection``).
    x_axis : sequence of int, optional
        Disk x axis; the default of :func:`laueline.frame.default_x_axis`.
    calibration : Calibration or (kv, Detector), optional
        Its voltage, scale and distortion are held; its centre, rotation
        and mirror are start values.
    pixel_frame : PixelFrame
        The convention the user's coordinates (``center_px``) and reports use.
    tilt_deg : (first, second), optional
        Holder tilt readings (see :mod:`laueline.fit.orientation`).
    center_px, scale_px_per_mrad, rotation_deg, mirror :
        Detector start values (``center_px`` in the user's convention).
    disk_mrad : float, optional
        Disk radius (6 for points; from the detected radius for images).
    distortion : (e1, e2), optional
        Elliptical projector distortion (:class:`laueline.detector.Detector`),
        held unless freed (then the start value); default the calibration's,
        else none.
    min_strength, min_angle_deg, match_mrad, match_px :
        Candidate features and gates for assignment.
    source : str
        File the observations came from.
    structure : str, optional
        Structure named for this pattern (must be the fitted one).
    """

    zone: tuple
    points: object = None
    detection: object = None
    x_axis: tuple | None = None
    calibration: object = None
    pixel_frame: PixelFrame = field(default_factory=PixelFrame)
    tilt_deg: tuple | None = None
    center_px: tuple | None = None
    scale_px_per_mrad: float | None = None
    rotation_deg: float | None = None
    mirror: bool | None = None
    disk_mrad: float | None = None
    distortion: tuple | None = None
    min_strength: float = 0.1
    min_angle_deg: float = 5.0
    match_mrad: float = 0.25
    match_px: float | None = None
    source: str = ""
    structure: str | None = None
    label: str = ""


# ---------------------------------------------------------------------------
# the problem: parameters, patterns and their observations
# ---------------------------------------------------------------------------

class _Problem:
    """Everything fixed for one fit, and the residuals of all patterns."""

    def __init__(self, parameters, specs, data):
        self.parameters = parameters
        self.specs = specs
        self.data = data
        self.line_model = None   # (parameters x, line sigma px, point sigma px per pattern)

    def actives(self):
        return [d.active(self, j) for j, d in enumerate(self.data)]

    def prepare(self):
        """Active observations, their whiteners and the Jacobian columns of each pattern."""
        pm = self.parameters
        self._obs = self.actives()
        if self.line_model is not None:
            x, line_sigma, point_sigma = self.line_model
            full = pm.full(x)
            for j, o in enumerate(self._obs):
                if len(o) == 0:
                    continue
                o.attach_lines(pm.geometry(full[None], j), line_sigma)
                if point_sigma[j] is not None and getattr(o, "sigma_px", 0) is None:
                    o.sigma_px = np.full(len(o), point_sigma[j])
        self._cov = [o.residual_covariance() for o in self._obs]
        self._white = [whitener(c) if len(c) else np.zeros(0) for c in self._cov]
        self._cols = [pm.columns_of_pattern(j) for j in range(len(self.specs))]
        sizes = [len(o) * o.group_size for o in self._obs]
        self._rows = np.cumsum([0] + sizes)
        n_obs, p = int(self._rows[-1]), len(pm.free)
        if n_obs < p:
            kinds = " and ".join(sorted({o.kind for o in self._obs}))
            n_groups = sum(len(o) for o in self._obs)
            raise InputError(f"{n_groups} {kinds} give {n_obs} observations for {p} free "
                             "parameters; measure more or hold parameters")
        for j, o in enumerate(self._obs):
            if len(o) == 0:
                raise InputError(f"{self.specs[j].label}no observation of this pattern is "
                                 "assigned: check its zone axis and detector")

    def raw(self, x, with_jacobian=False):
        """Residuals (px, fitted minus measured) and, optionally, their Jacobian."""
        pm = self.parameters
        p = len(pm.free)
        r = np.empty(self._rows[-1])
        J = np.zeros((self._rows[-1], p)) if with_jacobian else None
        for j, obs in enumerate(self._obs):
            lo, hi = self._rows[j], self._rows[j + 1]
            cols = self._cols[j] if with_jacobian else []
            X = np.repeat(x[None], 1 + len(cols), axis=0)
            X[1 + np.arange(len(cols)), cols] += _JAC_STEP
            res = obs.residuals(pm.geometry(pm.full(X), j)).reshape(len(X), -1)
            r[lo:hi] = res[0]
            if with_jacobian:
                J[lo:hi][:, cols] = ((res[1:] - res[0]) / _JAC_STEP).T
        return r, J

    def whiten(self, v):
        out = np.empty_like(v)
        for j in range(len(self._obs)):
            lo, hi = self._rows[j], self._rows[j + 1]
            out[lo:hi] = apply_whitener(self._white[j], v[lo:hi])
        return out

    def residual_covariance(self):
        """Covariance of all residuals: variances (N,) or the block-diagonal matrix."""
        if all(c.ndim == 1 for c in self._cov):
            return np.concatenate(self._cov)
        from scipy.linalg import block_diag

        return block_diag(*[np.diag(c) if c.ndim == 1 else c for c in self._cov])

    def group_norms(self, x):
        """Whitened residual length of every group, per pattern."""
        r = self.whiten(self.raw(x)[0])
        return [np.linalg.norm(r[self._rows[j]:self._rows[j + 1]].reshape(len(o), -1), axis=1)
                for j, o in enumerate(self._obs)]


def _solve(problem, x0, robust):
    """One least-squares fit of all patterns; returns (x, converged, message)."""
    problem.prepare()
    p = len(problem.parameters.free)
    if p == 0:
        return x0, True, "nothing to refine"

    def fun(x):
        return problem.whiten(problem.raw(x)[0])

    def jac(x):
        _, J = problem.raw(x, with_jacobian=True)
        return problem.whiten(J)

    fun(x0)  # a start the model refuses is the caller's input error, raised here
    try:
        res = _least_squares(problem, fun, jac, x0, p, robust)
    except InputError as exc:
        # the start was checked; a state refused on the way is the fit running away
        raise FitError(f"the least-squares fit diverged: {exc}") from None
    if not np.all(np.isfinite(res.x)):
        raise FitError("the least-squares fit diverged to non-finite parameters")
    converged = bool(res.status > 0)
    message = "" if converged else f"the least-squares fit stopped without converging " \
                                   f"({res.message})"
    return res.x, converged, message


def _least_squares(problem, fun, jac, x0, p, robust):
    import scipy.optimize

    if robust:
        sizes = {o.group_size for o in problem._obs}
        norms = np.concatenate(problem.group_norms(x0))
        f_scale = max(np.median(norms) / _median_norm(max(sizes)), 1e-3)
        return scipy.optimize.least_squares(fun, x0, jac=jac, method="trf", loss="soft_l1",
                                            f_scale=f_scale, x_scale=1.0,
                                            max_nfev=100 * (p + 1))
    return scipy.optimize.least_squares(fun, x0, jac=jac, method="lm", x_scale=1.0,
                                        max_nfev=100 * (p + 1))


def _median_norm(k):
    """Median of the length of a k-dimensional standard Gaussian vector."""
    from scipy.stats import chi2

    return math.sqrt(chi2.ppf(0.5, k))


def _reject_outliers(problem, x):
    """Drop groups beyond the 4-sigma level (robust scale) and refit by least squares.

    For one crossing (k = 2) the level is a residual 4 robust sigmas long
    (tail probability exp(-8)); other group sizes use the same probability.
    """
    from scipy.stats import chi2

    norms = problem.group_norms(x)
    k = problem._obs[0].group_size
    # no measured position is better than a thousandth of its stated sigma (or of
    # a pixel): exact synthetic data must not turn rounding into outliers
    sigma = max(np.median(np.concatenate(norms)) / _median_norm(k), 1e-3)
    for j, r in enumerate(norms):
        level = math.sqrt(chi2.isf(math.exp(-8.0), problem._obs[j].group_size))
        keep = r <= level * sigma
        problem.data[j].set_used(keep, [f"outlier: residual {ri / sigma:.1f} robust sigmas"
                                        for ri in r])
    return _solve(problem, x, robust=False)


def _rms_px(problem, x):
    """Rms residual of each pattern's active observations: per crossing, or per line point."""
    raw = problem.raw(x)[0]
    out = []
    for j, obs in enumerate(problem._obs):
        part = raw[problem._rows[j]:problem._rows[j + 1]].reshape(len(obs), -1)
        if obs.kind == "crossings":
            out.append(float(np.sqrt(np.mean(np.sum(part ** 2, axis=1)))))
        else:
            out.append(float(np.sqrt(np.mean(part ** 2))))
    return out


def _settle(problem, x, robust, first_round=0):
    """Assign and fit until no assignment changes; returns (x, converged, message, settled)."""
    pm = problem.parameters
    previous = None
    converged, message = False, ""
    for round_ in range(first_round, first_round + _MAX_ROUNDS):
        full = pm.full(x)
        keys = [d.assign(problem, j, full, round_) for j, d in enumerate(problem.data)]
        if keys == previous:
            return x, converged, message, True
        previous = keys
        x, converged, message = _solve(problem, x, robust)
        full = pm.full(x)
        for j, (d, rms) in enumerate(zip(problem.data, _rms_px(problem, x))):
            d.after_round(problem, j, full, rms)
    return x, False, "the assignment did not settle", False


def _fit_loop(problem, robust):
    """The one assignment-and-fit loop; returns (x, converged, message, warnings).

    While points are being assigned some matches may be wrong: a robust loss
    keeps them from dragging the fit away.  Once the assignment settles, the
    matches beyond the 4-sigma level are set aside, the rest fitted by least
    squares, and the assignment is revisited from that fit (which usually
    gives the set-aside points their right partners); a final least-squares
    fit without outliers follows.
    """
    pm = problem.parameters
    searching = any(d.needs_assignment for d in problem.data)
    x = np.zeros(len(pm.free))
    x, converged, message, settled = _settle(problem, x, robust or searching)
    if searching and settled:
        x, converged, message = _reject_outliers(problem, x)
        full = pm.full(x)
        for j, (d, rms) in enumerate(zip(problem.data, _rms_px(problem, x))):
            d.after_round(problem, j, full, rms)
        x, converged, message, settled = _settle(problem, x, True, first_round=1)
    warnings = [] if settled else [f"the assignment did not settle in {_MAX_ROUNDS} rounds"]
    full = pm.full(x)
    for j, (d, rms) in enumerate(zip(problem.data, _rms_px(problem, x))):
        n = d.ambiguity(problem, j, full, rms)
        if n:
            warnings.append(f"{problem.specs[j].label}{n} point(s) lie as near to a second "
                            "predicted crossing (lines meeting almost at one point); their "
                            "assignment is ambiguous (see the points table)")
    if robust or searching:
        x, converged, message = _reject_outliers(problem, x)
    else:
        problem.prepare()
    if not settled:
        converged, message = False, "the assignment did not settle"
    return x, converged, message, warnings


# ---------------------------------------------------------------------------
# the per-line error model
# ---------------------------------------------------------------------------

#: Line sigma (px) assumed when the data cannot separate a per-line offset from
#: point noise and none is given: a quarter of a typical 2 px wide deficit line
#: at 40 px/mrad (common practice for the precision of locating a line).
DEFAULT_LINE_SIGMA_PX = 0.5


@dataclass
class LineSigma:
    """The per-line offset sigma a fit used.

    Attributes
    ----------
    value : float
        Pixels.
    source : str
        ``given``, ``estimated`` (restricted maximum likelihood from the
        residuals grouped by line), ``default`` (not determined by the data;
        :data:`DEFAULT_LINE_SIGMA_PX`) or ``none`` (detected lines whose own
        covariance is used alone).
    point_sigma_px : float or None
        Point sigma estimated from the scatter within lines (None when
        stated per point or not used).
    """

    value: float
    source: str
    point_sigma_px: float | None = None

    def to_dict(self):
        return {"value": self.value, "source": self.source,
                "point_sigma_px": self.point_sigma_px}


def _within_line_point_sigma(r, J, loading):
    """Point sigma from the scatter left when every line offset is free (one-way ANOVA).

    Searle, Casella and McCulloch (1992), ch. 3: the within-class mean square
    is unbiased for the point variance whatever the line variance.
    """
    design = np.concatenate([J, loading], axis=1)
    coef, _, rank, _ = np.linalg.lstsq(design, r, rcond=None)
    dof = len(r) - int(rank)
    if dof < 1:
        return None
    left = r - design @ coef
    return float(np.sqrt(left @ left / dof))


def _line_error_model(problem, x, line_sigma_px):
    """Set the per-line model of every pattern for the final fit; returns LineSigma.

    Crossings: the point sigma is the stated one, else estimated from the
    scatter within lines; the line sigma is given, else estimated by REML
    (:func:`laueline.uncertainty.estimate_line_sigma`) when the data
    determine it, else :data:`DEFAULT_LINE_SIGMA_PX`.  Detected lines carry
    the detection's covariance plus the given line term (none otherwise).
    """
    from scipy.linalg import block_diag

    from ..uncertainty import estimate_line_sigma

    pm = problem.parameters
    problem.line_model = None
    problem.prepare()
    full = pm.full(x)
    r, J = problem.raw(x, with_jacobian=True)
    point = [None] * len(problem._obs)
    rows, loads, sig = [], [], []
    for j, o in enumerate(problem._obs):
        if o.kind != "crossings" or len(o) == 0:
            continue
        o.attach_lines(pm.geometry(full[None], j), 0.0)
        rows.append(np.arange(problem._rows[j], problem._rows[j + 1]))
        loads.append(o.loading)
        sig.append(None if o.sigma_px is None else np.repeat(o.sigma_px, 2))
    if not rows:
        value = 0.0 if line_sigma_px is None else float(line_sigma_px)
        problem.line_model = (x, value, point)
        return LineSigma(value, "none" if line_sigma_px is None else "given")
    idx = np.concatenate(rows)
    r_c, J_c = r[idx], J[idx]
    J_c = J_c[:, np.any(J_c != 0, axis=0)]
    M = block_diag(*loads)
    estimated_point = None
    if any(s is None for s in sig):
        estimated_point = _within_line_point_sigma(r_c, J_c, M)
        if estimated_point is None or estimated_point <= 0:
            # no scatter left within lines: the scale of all residuals
            dof = max(len(r_c) - J_c.shape[1], 1)
            estimated_point = max(float(np.sqrt(r_c @ r_c / dof)), 1e-6)
        for j, o in enumerate(problem._obs):
            if o.kind == "crossings" and o.sigma_px is None:
                point[j] = estimated_point
        sig = [np.full(len(l), estimated_point) if s is None else s for s, l in zip(sig, loads)]
    point_sigma = np.concatenate(sig)
    if line_sigma_px is not None:
        result = LineSigma(float(line_sigma_px), "given", estimated_point)
    else:
        est = estimate_line_sigma(r_c, M, point_sigma, J_c)
        if est.determined:
            result = LineSigma(est.line_sigma, "estimated", estimated_point)
        else:
            result = LineSigma(DEFAULT_LINE_SIGMA_PX, "default", estimated_point)
    problem.line_model = (x, result.value, point)
    return result


# ---------------------------------------------------------------------------
# setting up
# ---------------------------------------------------------------------------

def _resolve_specs(crystal, specs):
    hexagonal = is_hexagonal(crystal.cell)
    out = []
    for j, spec in enumerate(specs):
        label = f"pattern {j + 1}: " if len(specs) > 1 else ""
        if spec.structure is not None and spec.structure not in (crystal.name, crystal.formula):
            raise InputError(f"{label}the pattern is of structure '{spec.structure}', the fit "
                             f"of '{crystal.name}': all patterns of a joint fit show one "
                             "crystal")
        zone, _ = reduce_indices(parse_direction(spec.zone, hexagonal, "zone"))
        if spec.x_axis is None:
            x_axis = default_x_axis(crystal, zone)
        else:
            x_axis = parse_plane(spec.x_axis, hexagonal, "x_axis")
            if np.dot(x_axis, zone) != 0:
                raise InputError(f"{label}x_axis: the x axis {x_axis} is not normal to the "
                                 f"zone {zone}")
        cal = Calibration.coerce(spec.calibration)
        scale = spec.scale_px_per_mrad
        if scale is None and cal is not None:
            scale = cal.detector.scale_px_per_mrad
        if scale is not None and not scale > 0:
            raise InputError(f"{label}scale_px_per_mrad: the detector scale must be positive")
        center = spec.pixel_frame.to_internal(spec.center_px)
        if center is None and cal is not None:
            center = np.asarray(cal.detector.center_px, float)
        rotation = spec.rotation_deg
        if rotation is None and cal is not None:
            rotation = cal.detector.rotation_deg
        mirror = spec.mirror
        if mirror is None and cal is not None:
            mirror = cal.detector.mirror
        disk = spec.disk_mrad
        if spec.detection is not None:
            radius = spec.detection.disk.radius_px
            if scale is None:
                if disk is None:
                    raise InputError(f"{label}fitting an image needs the camera scale: give "
                                     "scale_px_per_mrad, a calibration or disk_mrad")
                scale = radius / float(disk)
            if disk is None:
                disk = radius / scale
            # the pattern centre moves between regions; the disk centre is the better start
            if spec.center_px is None:
                center = np.asarray(spec.detection.disk.center_px, float)
        elif spec.points is None:
            raise InputError(f"{label}give points or a detection for every pattern")
        out.append(replace(spec, zone=zone, x_axis=tuple(int(v) for v in x_axis),
                           calibration=cal, scale_px_per_mrad=scale,
                           center_px=None if center is None else tuple(center),
                           rotation_deg=rotation, mirror=mirror,
                           disk_mrad=6.0 if disk is None else float(disk), label=label))
    return out, hexagonal


def _parse_exclusions(exclude_lines, hexagonal):
    out = set()
    for item in exclude_lines or ():
        out.add(tuple(parse_plane(item, hexagonal, "exclude_lines")))
    return out


def _build(crystal, specs, *, kv, model, free, hold, unique_axis, robust, inner_potential,
           hold_strain, biaxial, zero_normal_stress, foil_normal, stiffness, sample_axes,
           exclude_lines, tilt_tolerance_deg):
    if unique_axis not in (None, "a", "b", "c"):
        raise InputError(f"unique_axis: the unique axis is a, b or c, got '{unique_axis}'")
    specs, hexagonal = _resolve_specs(crystal, specs)
    n = len(specs)
    constraints = None
    wants_constraints = hold_strain or biaxial or zero_normal_stress
    strain_holds = [h for h in hold if h in STRAIN_COMPONENTS]
    if model == "strain":
        constraints = strain_constraints(
            crystal.basis, hold=hold_strain, hold_crystal=strain_holds, sample_axes=sample_axes,
            biaxial=biaxial, zero_normal_stress=zero_normal_stress, foil_normal=foil_normal,
            stiffness=stiffness)
    elif wants_constraints:
        raise InputError("hold_strain, biaxial and zero_normal_stress constrain the strain "
                         "model; choose model='strain'")
    pm = ParameterModel(crystal, model, n, constraints=constraints, unique_axis=unique_axis,
                        inner_potential=inner_potential)
    crystal_names = set(pm.names) if model != "strain" else set(STRAIN_COMPONENTS)
    allowed = crystal_names | {"kv", "scale", "center", "rotation", "distortion"}
    free_set, hold_set = set(), set()
    for word, target in [(w, free_set) for w in free] + [(w, hold_set) for w in hold]:
        if word not in allowed:
            action = "free" if target is free_set else "hold"
            raise InputError(f"{action}: cannot {action} '{word}' with model {model}; choose from "
                             f"{', '.join(sorted(allowed))}")
        target.add(word)
    if model != "strain":
        pm.free = [f for f in pm.free if f.name not in hold_set]
    exclude = _parse_exclusions(exclude_lines, hexagonal)
    warnings = list(crystal.notes)
    if model not in ("strain", "fixed"):
        if np.any(np.abs(pm.full0[:6] - crystal.cell) > 1e-4 * np.maximum(np.abs(crystal.cell),
                                                                           1)):
            warnings.append(f"the reference cell does not have {model} symmetry; the fit "
                            f"starts from {np.round(pm.full0[:6], 5).tolist()}")
    for j, spec in enumerate(specs):
        cal = spec.calibration
        kv_j = cal.kv if cal is not None else float(kv)
        make_beam(kv_j)  # validates the voltage
        pm.set_start("kv", j, kv_j)
        distortion = spec.distortion if spec.distortion is not None else \
            cal.detector.distortion if cal is not None else (0.0, 0.0)
        pm.set_start("e1", j, float(distortion[0]))
        pm.set_start("e2", j, float(distortion[1]))
        if cal is not None:
            if cal.structure and cal.structure != crystal.name:
                warnings.append(f"{spec.label}the calibration was made on {cal.structure}, "
                                f"not {crystal.name}")
            if not cal.converged:
                warnings.append(f"{spec.label}the calibration's own fit did not converge")
        if spec.scale_px_per_mrad is not None:
            pm.set_start("scale", j, spec.scale_px_per_mrad)
        if spec.center_px is not None:
            pm.set_start("center_x", j, spec.center_px[0])
            pm.set_start("center_y", j, spec.center_px[1])
    data = []
    for spec in specs:
        if spec.detection is not None:
            d = LineData(spec.detection, exclude)
            d.gate = spec.match_px if spec.match_px is not None else \
                max(3.0, 0.5 * spec.scale_px_per_mrad)
            warnings += [spec.label + w for w in spec.detection.warnings]
        else:
            d = CrossingData(spec.points, exclude)
        data.append(d)
    problem = _Problem(pm, specs, data)
    for j, d in enumerate(data):
        d.check(problem, j)
        if isinstance(d, CrossingData) and specs[j].center_px is not None and \
                specs[j].scale_px_per_mrad is not None:
            d.check_inside_disk(specs[j], specs[j].center_px, specs[j].scale_px_per_mrad)

    # -- tilts: relative orientation fixed ------------------------------------------
    tilts = [s.tilt_deg for s in specs]
    phi = None
    if any(t is not None for t in tilts):
        if any(t is None for t in tilts):
            raise InputError("tilt_deg: give the tilt readings for every pattern or for none")
        U, _ = orientation_from_tilts(crystal.basis, [s.zone for s in specs], tilts,
                                      tolerance_deg=tilt_tolerance_deg)
        phi = pattern_rotations_deg(crystal.basis, [s.zone for s in specs],
                                    [s.x_axis for s in specs], tilts, U)

    # -- detector starts ------------------------------------------------------------
    for j, d in enumerate(data):
        if phi is not None and j > 0:
            # one camera: the first pattern's orientation and the tilts give the others'
            sign = -1.0 if pm.mirror[0] else 1.0
            theta0 = pm.start("rotation", 0) - sign * phi[0]
            specs[j] = replace(specs[j], mirror=pm.mirror[0],
                               rotation_deg=(theta0 + sign * phi[j]) % 360.0)
        warnings += d.start(problem, j)
        if isinstance(d, CrossingData):
            d.check_inside_disk(specs[j], (pm.start("center_x", j), pm.start("center_y", j)),
                                pm.start("scale", j))

    # -- free detector parameters ---------------------------------------------------
    for j, spec in enumerate(specs):
        defaults = {"center", "rotation"} | ({"scale"} if spec.calibration is None else set())
        chosen = (defaults | free_set) - hold_set
        if "center" in chosen:
            pm.add_free("center_x", [j], _name("center_x", j, n))
            pm.add_free("center_y", [j], _name("center_y", j, n))
        if "scale" in chosen:
            pm.add_free("scale", [j], _name("scale", j, n))
        if "rotation" in chosen and phi is None:
            pm.add_free("rotation", [j], _name("rotation", j, n))
        if "kv" in chosen:
            pm.add_free("kv", [j], _name("kv", j, n))
        if "distortion" in chosen:
            pm.add_free("e1", [j], _name("e1", j, n))
            pm.add_free("e2", [j], _name("e2", j, n))
    if phi is not None and "rotation" not in hold_set:
        # one camera rotation; each pattern turned by its tilts (theta0 +- phi_j)
        pm.add_free("rotation", list(range(n)), "rotation")
    if "kv" in free_set and _has_dilatation(pm):
        raise InputError(
            "voltage and hydrostatic strain shift HOLZ lines in exactly the same way, so they "
            "cannot be freed together: calibrate the voltage on an unstrained reference "
            "(model='fixed', free=['kv']) and hold it, or hold a normal strain component")
    return problem, warnings, exclude, hexagonal, phi


def _name(field_, j, n):
    return field_ if n == 1 else f"{field_}[{j + 1}]"


def _has_dilatation(pm):
    if pm.model == "fixed":
        return False
    if pm.model == "strain":
        return pm.constraints.contains_dilatation()
    return True  # every cell model contains the uniform scaling of its lengths


# ---------------------------------------------------------------------------
# public entry points
# ---------------------------------------------------------------------------

def refine_patterns(crystal, patterns, *, kv=200.0, model="strain", free=(), hold=(),
                    unique_axis=None, robust=False, inner_potential=False, hold_strain=None,
                    biaxial=False, zero_normal_stress=False, foil_normal=None, stiffness=None,
                    sample_axes=None, exclude_lines=(), tilt_tolerance_deg=1.0,
                    line_sigma_px=None, systematic_covariance=None):
    """Fit one crystal (one strain) to one or several patterns of the same region.

    Parameters
    ----------
    crystal : Crystal
        The reference crystal (its cell is the strain reference).
    patterns : sequence of PatternSpec
        Each with its own zone axis, x axis, detector and observations.
    kv : float
        Nominal voltage (start or held value) of patterns without calibration.
    model : str
        One of :data:`laueline.fit.MODELS`.
    free, hold : sequence of str
        Parameters to free or hold besides the defaults: ``kv``, ``scale``,
        ``center``, ``rotation``, ``distortion`` (the elliptical term, held by
        default), cell names, or strain components (held at zero, crystal frame).
    unique_axis : {'a', 'b', 'c'}, optional
        For tetragonal (default c) and monoclinic (default b) cells.
    robust : bool
        Down-weight outliers (soft-L1 loss), then reject those beyond 4 sigma.
    inner_potential : bool
        Use the wave number inside the crystal.
    hold_strain : dict of str to float, optional
        Strain components held at a value, in the sample frame when
        ``sample_axes`` is given, else in the crystal frame (exact constraint).
    biaxial : bool
        Equal in-plane normal strains of the sample frame.
    zero_normal_stress : bool
        No normal stress along the foil normal (``foil_normal``, or the
        sample z axis); needs ``stiffness``.
    foil_normal : sequence of 3 numbers, optional
        Crystal direction of the foil normal.
    stiffness : ndarray (6, 6), optional
        Voigt stiffness (GPa), crystal Cartesian frame: stress and constraints.
    sample_axes : ndarray (3, 3), optional
        Rows of a sample frame (:func:`laueline.strain.sample_axes`).
    exclude_lines : sequence of index triples (or quadruples, hexagonal)
        Reflections left out of the fit.
    tilt_tolerance_deg : float
        Largest misfit between a tilted zone axis and the beam.
    line_sigma_px : float, optional
        Standard deviation (px) of an offset shared by all observations of
        one line (detection, dynamical shift).  By default estimated from
        the residuals grouped by line (REML) when the data determine it,
        else :data:`DEFAULT_LINE_SIGMA_PX` with a warning.
    systematic_covariance : ndarray (6, 6), optional
        Systematic covariance of the strain (Voigt, crystal Cartesian frame),
        for example a kinematic-bias estimate; added to the statistical
        part (:func:`laueline.uncertainty.add_systematic`).

    Returns
    -------
    FitResult
        ``success`` False when the fit did not converge or failed a
        plausibility check (see ``message`` and ``checks``).

    Raises
    ------
    InputError
        Inconsistent or insufficient input, or a degenerate fit.
    """
    if not patterns:
        raise InputError("patterns: give at least one pattern")
    free, hold = tuple(free or ()), tuple(hold or ())
    problem, warnings, exclude, hexagonal, phi = _build(
        crystal, list(patterns), kv=kv, model=model, free=free, hold=hold,
        unique_axis=unique_axis, robust=robust, inner_potential=inner_potential,
        hold_strain=hold_strain, biaxial=biaxial, zero_normal_stress=zero_normal_stress,
        foil_normal=foil_normal, stiffness=stiffness, sample_axes=sample_axes,
        exclude_lines=exclude_lines, tilt_tolerance_deg=tilt_tolerance_deg)
    if line_sigma_px is not None and not (np.isfinite(line_sigma_px) and line_sigma_px >= 0):
        raise InputError(f"line_sigma_px: must be a non-negative number of pixels, got "
                         f"{line_sigma_px}")
    x, converged, message, loop_warnings = _fit_loop(problem, robust)
    warnings += loop_warnings
    line = _line_error_model(problem, x, line_sigma_px)
    if line.source == "default":
        warnings.append(f"the per-line error is not determined by these data (too few "
                        f"crossings per line); {DEFAULT_LINE_SIGMA_PX:g} px is assumed: give "
                        "line_sigma_px")
    if converged:
        # the generalised least-squares fit under the per-line model
        x, converged, message = _solve(problem, x, robust=False)
    else:
        problem.prepare()
    if message:
        warnings.append(message)
    return assemble_result(problem, crystal, x, converged, message, warnings,
                           line_sigma=line, systematic_covariance=systematic_covariance,
                           stiffness=stiffness,
                           sample_axes=sample_axes, exclude=exclude, hexagonal=hexagonal,
                           unique_axis=unique_axis if model in ("tetragonal", "monoclinic")
                           else None, inner_potential=inner_potential, tilts=phi is not None)


def _single_kwargs(kwargs):
    keys = ("x_axis", "center_px", "scale_px_per_mrad", "rotation_deg", "mirror",
            "calibration", "disk_mrad", "distortion", "min_strength", "min_angle_deg",
            "match_mrad", "match_px", "pixel_frame", "source")
    spec = {k: kwargs.pop(k) for k in keys if k in kwargs}
    from ..limits import check_inputs

    check_inputs(**{k: v for k, v in spec.items()
                    if k in ("center_px", "scale_px_per_mrad", "rotation_deg", "disk_mrad",
                             "min_strength", "min_angle_deg", "match_mrad")},
                 **{k: kwargs[k] for k in ("kv",) if k in kwargs})
    return spec, kwargs


def refine(crystal, zone, points, **kwargs):
    """Fit crystal and detector parameters to measured crossings of one pattern.

    Parameters
    ----------
    crystal : Crystal
    zone : sequence of int
        [u v w], or [U V T W] for a hexagonal crystal.
    points : laueline.points.Points
        Internal y-down pixels (:func:`laueline.points.read_points` converts).
    **kwargs
        Pattern settings of :class:`PatternSpec` (``x_axis``, ``center_px``,
        ``scale_px_per_mrad``, ``rotation_deg``, ``mirror``, ``calibration``,
        ``disk_mrad``, ``min_strength``, ``min_angle_deg``, ``match_mrad``,
        ``pixel_frame``, ``source``) and the fit options of
        :func:`refine_patterns`.

    Returns
    -------
    FitResult
    """
    spec, rest = _single_kwargs(dict(kwargs))
    if len(points) == 0:
        raise InputError("points: no points to fit")
    return refine_patterns(crystal, [PatternSpec(zone, points=points, **spec)], **rest)


def refine_image(crystal, zone, detection, **kwargs):
    """Fit crystal and detector parameters to lines detected in one pattern image.

    The detected lines (:func:`laueline.images.detect.detect_lines`) are
    assigned to predicted lines by optimal matching inside a distance gate,
    after a search over rotation and mirror when the rotation is unknown;
    the fit then minimises the distances of three points on each detected
    line from the exact predicted locus of its reflection, weighted with
    the detection's covariance of the line position.  When the scatter
    exceeds what those covariances promise, the uncertainties are scaled up
    by sqrt(chi2 / dof).  Parameters are those of :func:`refine`; the
    pattern centre starts at the detected disk centre, and the disk radius
    in mrad follows from the detected radius and the scale (or, given
    ``disk_mrad``, the scale from the radius).
    """
    spec, rest = _single_kwargs(dict(kwargs))
    spec.setdefault("source", getattr(detection, "source", ""))
    return refine_patterns(crystal, [PatternSpec(zone, detection=detection, **spec)], **rest)
