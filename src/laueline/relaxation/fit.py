"""The joint fit of mid-foil strain and relaxation to all measured profiles.

See :mod:`laueline.relaxation` for the model and its sources.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from .depth import (MODELS, PARAMETER_UNITS, PARAMETERS, STRAIN_COMPONENTS, _check_thickness,
                    relaxation_displacement, relaxed_strain_phase_depth)
from .measure import _FWHM
from .profile import _N_SLABS, _ProfileEngine

__all__ = ["ProfileData", "ProfileFit", "fit_profiles"]


@dataclass
class ProfileData:
    """What the fit needs of each measured profile (p profiles, k samples).

    ``s_at_offset`` holds (s0, ds/dpx): the reference excitation error
    (1/angstrom, unstrained reference lattice, calibrated voltage, starting
    detector) at the profile's zero offset and its slope across the line;
    ``strain_shift`` (p, 6) the change of s per unit strain component;
    ``detector_shift`` (p, 3) per px of centre x, y and per degree of
    rotation; ``g_frame`` (p, 3) the reflection in the disk frame, 1/A.
    """

    offset_px: np.ndarray
    intensity: np.ndarray
    sigma: np.ndarray
    s_at_offset: np.ndarray
    strain_shift: np.ndarray
    detector_shift: np.ndarray
    g_frame: np.ndarray


@dataclass
class ProfileFit:
    """Result of :func:`fit_profiles`."""

    model: str
    names: list
    values: np.ndarray
    sigmas: np.ndarray
    units: list
    covariance: np.ndarray
    correlation: np.ndarray
    chi2: float
    dof: int
    success: bool
    message: str
    fitted: np.ndarray           # (p, k) model intensities
    uniform: np.ndarray          # (p, k) uniform-strain profile at the same strain and blur
    linear: np.ndarray           # (p, 3) background, slope, depth of each profile
    inflated: bool = False
    sigmas_stat: np.ndarray | None = None   # from the profile noise alone
    shift_ratio: float = 1.0     # scatter of profile positions over their noise

    def value(self, name):
        i = self.names.index(name)
        return float(self.values[i]), float(self.sigmas[i])


_STRAIN_UNIT = 1e-3


class _Model:
    """Forward model of all profiles for a parameter vector (nonlinear part)."""

    def __init__(self, data, thickness_nm, model, table, instrument_sigma_px, n_slabs,
                 fixed):
        self.data = data
        self.t = thickness_nm
        self.model = model
        self.table = table
        self.shape_names = list(PARAMETERS[model])
        self.fit_sigma = instrument_sigma_px is None
        self.sigma_px = instrument_sigma_px
        self.fixed = dict(fixed or {})
        names = list(STRAIN_COMPONENTS) + ["center_x", "center_y", "rotation"]
        names += self.shape_names
        if self.fit_sigma:
            names.append("instrument_sigma_px")
        self.all_names = names
        self.free = [n for n in names if n not in self.fixed]
        d = data.offset_px
        # the blur maps a grid reaching four of the widest blurs beyond the samples,
        # fine enough for the narrowest blur and the profile's fringes, onto the samples
        half_width = float(np.max(np.abs(d)))
        margin = 4.0 * _bounds(["instrument_sigma_px"], thickness_nm, half_width)[1][0]
        step = 0.25
        self.d_ext = np.arange(d[0] - margin, d[-1] + margin + 0.5 * step, step)
        self.z_nm = np.linspace(0.0, thickness_nm, n_slabs + 1)
        self.w = 1.0 / data.sigma
        self.engine = _ProfileEngine(data.s_at_offset[:, 1], self.d_ext, thickness_nm, n_slabs)
        g_len = float(np.median(np.linalg.norm(data.g_frame[:, :2], axis=1)))
        # finite-difference steps: 1e-4 of a displacement of one cycle, of t, of a pixel
        self.steps = {"ux_nm": 1e-5 / g_len, "uy_nm": 1e-5 / g_len, "relaxed_fraction": 1e-4,
                      "decay_length_nm": 1e-4 * thickness_nm, "scale": 1e-4,
                      "instrument_sigma_px": 1e-4}
        self.upper = _bounds(self.free, thickness_nm, float(np.max(np.abs(data.offset_px))))[1]

    def full(self, x):
        v = dict(self.fixed)
        v.update(zip(self.free, x))
        return v

    def intrinsic(self, v, relax=True, extra_shift=0.0):
        data = self.data
        e = np.array([v[c] for c in STRAIN_COMPONENTS]) * _STRAIN_UNIT
        det = np.array([v["center_x"], v["center_y"], v["rotation"]])
        shift = data.strain_shift @ e + data.detector_shift @ det + extra_shift
        if relax and self.model == "relaxed-strain":
            # local excitation error s + ds_mid f(z): phase ds_mid integral (f - 1) dz
            depth = relaxed_strain_phase_depth(v["relaxed_fraction"], v["decay_length_nm"],
                                               self.z_nm, self.t)
            gu = (data.strain_shift @ e)[:, None] * 10.0 * depth[None, :]
        elif relax and self.shape_names:
            u = relaxation_displacement(self.model, [v[n] for n in self.shape_names],
                                        self.z_nm, self.t, self.table)
            gu = 10.0 * data.g_frame @ u.T      # 1/A times nm -> cycles
        else:
            gu = np.zeros((len(shift), len(self.z_nm)))
        return self.engine(data.s_at_offset[:, 0] + shift, gu)

    def blur(self, v, profile):
        sig = v.get("instrument_sigma_px", self.sigma_px)
        diff = self.data.offset_px[:, None] - self.d_ext[None, :]
        kern = np.exp(-0.5 * (diff / sig) ** 2)
        kern /= kern.sum(axis=1, keepdims=True)
        return profile @ kern.T

    def design(self, shape):
        p, k = shape.shape
        d = np.broadcast_to(self.data.offset_px, (p, k))
        return np.stack([np.ones((p, k)), d, -shape], axis=-1)   # (p, k, 3)

    def linear(self, shape):
        """Background, slope and depth of each profile by weighted least squares."""
        a = self.design(shape) * self.w[..., None]
        y = self.data.intensity * self.w
        ata = np.einsum("pki,pkj->pij", a, a) + 1e-12 * np.eye(3)
        aty = np.einsum("pki,pk->pi", a, y)
        coef = np.linalg.solve(ata, aty[..., None])[..., 0]
        return coef, a, y

    def evaluate(self, v, extra_shift=0.0):
        shape = self.blur(v, self.intrinsic(v, extra_shift=extra_shift))
        coef, a, y = self.linear(shape)
        return (np.einsum("pki,pi->pk", a, coef) - y).ravel()

    def residuals(self, x):
        return self.evaluate(self.full(x))

    def jacobian(self, x):
        """Jacobian of the projected residuals.

        The strain, centre and rotation move each profile rigidly by one
        excitation-error shift, so one evaluation with every profile shifted
        gives all their columns (profiles are independent of each other);
        the relaxation parameters and the blur take one evaluation each.
        """
        v = self.full(x)
        r0 = self.evaluate(v)
        p, k = self.data.intensity.shape
        jac = np.empty((r0.size, len(self.free)))
        rigid = np.concatenate([self.data.strain_shift * _STRAIN_UNIT,
                                self.data.detector_shift], axis=1)     # (p, 9)
        rigid_names = list(STRAIN_COMPONENTS) + ["center_x", "center_y", "rotation"]
        h = 0.01 / (10.0 * self.t)                                      # 1/100 of 1/t
        d_shift = ((self.evaluate(v, h) - r0) / h).reshape(p, k)
        shape_depends_on_strain = self.model == "relaxed-strain"
        for j, name in enumerate(self.free):
            if name in STRAIN_COMPONENTS and shape_depends_on_strain:
                vv = dict(v)
                vv[name] = v[name] + 1e-3                               # 1e-6 strain
                jac[:, j] = (self.evaluate(vv) - r0) / 1e-3
            elif name in rigid_names:
                jac[:, j] = (d_shift * rigid[:, rigid_names.index(name), None]).ravel()
            else:
                step = self.steps[name] * (1.0 if x[j] <= self.upper[j] - self.steps[name]
                                           else -1.0)
                vv = dict(v)
                vv[name] = v[name] + step
                jac[:, j] = (self.evaluate(vv) - r0) / step
        return jac


def _bounds(names, thickness_nm, half_width_px):
    lo, hi = [], []
    for n in names:
        if n == "decay_length_nm":
            lo.append(thickness_nm / 100.0)
            hi.append(3.0 * thickness_nm)
        elif n == "instrument_sigma_px":
            lo.append(0.2)
            hi.append(max(0.25 * half_width_px, 0.5))
        elif n == "relaxed_fraction":
            lo.append(-1.0)
            hi.append(2.0)
        elif n == "scale":
            lo.append(-10.0)
            hi.append(10.0)
        else:
            lo.append(-np.inf)
            hi.append(np.inf)
    return np.array(lo), np.array(hi)


_RIGID = tuple(STRAIN_COMPONENTS) + ("center_x", "center_y", "rotation")


def _shift_scatter(m, x, n_rigid):
    """Birge ratio of the profiles' own best shifts about the fitted ones.

    Each profile's best extra shift and its sigma follow from one
    Gauss-Newton step on its residuals; the ratio is
    sqrt(sum (shift / sigma)^2 / (profiles - rigid parameters)).
    """
    v = m.full(x)
    r0 = m.evaluate(v)
    p = m.data.intensity.shape[0]
    h = 0.01 / (10.0 * m.t)
    jac = ((m.evaluate(v, h) - r0) / h).reshape(p, -1)
    r0 = r0.reshape(p, -1)
    info = np.sum(jac * jac, axis=1)
    shift = -np.sum(jac * r0, axis=1) / np.maximum(info, 1e-300)
    dof = p - n_rigid
    if dof < 1:
        return 1.0
    return float(math.sqrt(np.sum(shift ** 2 * info) / dof))


def _rigid_start(m, values, half_width_px):
    """Start values of strain, centre and rotation from a position scan of every profile.

    Each profile is compared with a line of uniform strain, blurred to the
    profile's own width, at shifts across the whole window; the best shift
    of every profile (in excitation error) then gives the rigid parameters by
    linear least squares through their per-profile shifts.
    """
    data = m.data
    slope = np.abs(data.s_at_offset[:, 1])
    deficit = data.intensity.max(axis=1, keepdims=True) - data.intensity
    width = np.median(_fwhm(data.offset_px, deficit))
    v = dict(values, instrument_sigma_px=max(float(width) / _FWHM, 0.5))
    grid = np.linspace(-0.8, 0.8, 41) * half_width_px            # px
    costs = np.empty((len(grid), len(slope)))
    for j, step in enumerate(grid):                               # 41 evaluations
        r = m.evaluate(v, step * slope).reshape(len(slope), -1)
        costs[j] = np.sum(r * r, axis=1)
    best = grid[np.argmin(costs, axis=0)] * slope                 # (p,) extra shift, 1/A
    rigid = np.concatenate([data.strain_shift * _STRAIN_UNIT, data.detector_shift], axis=1)
    names = list(STRAIN_COMPONENTS) + ["center_x", "center_y", "rotation"]
    free = [k for k, n in enumerate(names) if n not in m.fixed]
    scale = np.linalg.norm(rigid[:, free], axis=0)
    scale[scale == 0] = 1.0
    # robust (a profile may lock onto a neighbour) and damped towards the given start
    from scipy.optimize import least_squares

    a = rigid[:, free] / scale
    width_s = np.median(slope) * max(float(width), 1.0)
    damping = 0.05 * np.linalg.norm(a, 2)
    fit = least_squares(lambda x: np.concatenate([(a @ x - best) / width_s, damping * x]),
                        np.zeros(len(free)), loss="soft_l1", f_scale=0.5)
    step = fit.x / scale
    out = dict(values)
    for k, dv in zip(free, step):
        out[names[k]] = values[names[k]] + dv
    return out


def fit_profiles(data, thickness_nm, model="cosh", *, table=None, start=None,
                 instrument_sigma_px=None, hold=(), n_slabs=_N_SLABS, scan=True):
    """Fit the mid-foil strain and the relaxation to all profiles at once.

    Nonlinear parameters: the six mid-foil strain components (crystal
    Cartesian frame, basis (I + e) A), the pattern centre and rotation
    (offsets from the detector the profiles were measured with), the
    relaxation parameters of ``model`` and the instrument blur (Gaussian
    sigma, px; held when ``instrument_sigma_px`` is given).  Each profile
    also has a background, a background slope and a depth, solved by linear
    least squares for every trial of the others (variable projection).
    :func:`scipy.optimize.least_squares` minimises the residuals whitened by
    the measured sigmas; the covariance of the nonlinear parameters is
    (J^T J)^-1 of the projected problem, scaled up by chi2/dof when that
    exceeds 1.  A profile as a whole may also be moved by what the model
    lacks (a neighbouring line's wing, a dynamical shift): the scatter of
    each profile's own best position about the fitted one, over its
    statistical sigma (a Birge ratio over profiles - rigid parameters),
    scales every uncertainty up when above 1 (Birge 1932, Phys. Rev. 40,
    207);
    ``sigmas_stat`` keeps the purely statistical values.

    For the ``cosh`` family the surface displacement is first located by a
    scan over its size and direction (the profile is not a convex function
    of it), then everything is refined together.

    Parameters
    ----------
    data : ProfileData
    thickness_nm : float
    model : {'uniform', 'cosh', 'table'}
    table : DisplacementTable, for ``model='table'``
    start : dict, optional
        Start values by name (strain components dimensionless).
    instrument_sigma_px : float, optional
    hold : sequence of str
        Parameter names held at their start values.

    Returns
    -------
    ProfileFit
    """
    from scipy.optimize import least_squares

    thickness_nm = _check_thickness(thickness_nm)
    if model not in MODELS:
        raise InputError(f"unknown relaxation model '{model}'; choose one of {', '.join(MODELS)}")
    if model == "table" and table is None:
        raise InputError("model 'table' needs a displacement table (--displacement-table)")
    sig = np.asarray(data.sigma, dtype=float)
    if np.any(~np.isfinite(sig)) or np.any(sig <= 0):
        raise InputError("every profile sample needs a positive, finite sigma")
    half_width = float(np.max(np.abs(data.offset_px)))
    start = dict(start or {})
    values = {c: 0.0 for c in STRAIN_COMPONENTS}
    values.update(center_x=0.0, center_y=0.0, rotation=0.0)
    values.update({"ux_nm": 0.0, "uy_nm": 0.0, "decay_length_nm": thickness_nm / 5.0,
                   "scale": 1.0, "instrument_sigma_px": 1.0, "relaxed_fraction": 0.5})
    for k, v in start.items():
        values[k] = v / _STRAIN_UNIT if k in STRAIN_COMPONENTS else float(v)
    m = _Model(data, thickness_nm, model, table, instrument_sigma_px, n_slabs,
               {k: values[k] for k in hold})
    names = m.free

    def run(x0_values, fixed_extra, max_nfev):
        sub = _Model(data, thickness_nm, model, table, instrument_sigma_px, n_slabs,
                     {**m.fixed, **fixed_extra})
        x0 = np.array([x0_values[n] for n in sub.free])
        lo, hi = _bounds(sub.free, thickness_nm, half_width)
        room = 1e-9 * np.where(np.isfinite(hi - lo), hi - lo, 0.0)
        x0 = np.clip(x0, lo + room, hi - room)
        res = least_squares(sub.residuals, x0, jac=sub.jacobian, bounds=(lo, hi),
                            x_scale="jac", max_nfev=max_nfev, method="trf")
        out = dict(x0_values)
        out.update(zip(sub.free, res.x))
        return out, res, sub

    shape_names = list(PARAMETERS[model])
    # 0. each profile's position by a scan, then strain, centre and rotation from
    #    all positions by linear least squares: a start inside the right valley
    # 1. rigid positions and blur with the relaxation held at its start, from the
    #    given start and from the scan; the lower cost wins
    rigid_fixed = {n: values[n] for n in shape_names}
    starts = [values] + ([_rigid_start(m, values, half_width)] if scan else [])
    runs = [run(v0, rigid_fixed, 40) for v0 in starts]
    values = min(runs, key=lambda r: r[1].cost)[0]
    # 2. scan the surface displacement (cosh): its sign is not observable (the
    #    profile of a symmetric displacement field is unchanged by u -> -u)
    if model == "cosh" and scan and not {"ux_nm", "uy_nm"} & set(m.fixed):
        g_len = float(np.median(np.linalg.norm(data.g_frame[:, :2], axis=1)))
        best = (np.inf, values["ux_nm"], values["uy_nm"])
        cycles = np.array([0.1, 0.3, 0.6, 1.0, 1.6, 2.4])
        angles = np.radians(np.arange(0.0, 180.0, 22.5))
        amp = (cycles / (10.0 * g_len))[:, None]
        # no zero amplitude: the decay length would then be undefined
        ux, uy = (amp * np.cos(angles)).ravel(), (amp * np.sin(angles)).ravel()
        length = thickness_nm / 6.0
        for a, b in zip(ux, uy):
            trial = dict(values, ux_nm=a, uy_nm=b, decay_length_nm=length)
            cost = float(np.sum(m.residuals(np.array([trial[n] for n in names])) ** 2))
            if cost < best[0]:
                best = (cost, a, b)
        values.update(ux_nm=best[1], uy_nm=best[2], decay_length_nm=length)
    if model == "relaxed-strain" and scan and "relaxed_fraction" not in m.fixed:
        best = (np.inf, 0.5, thickness_nm / 6.0)
        for frac in (0.25, 0.5, 0.75, 1.0):
            for length in (thickness_nm / 12.0, thickness_nm / 6.0, thickness_nm / 3.0):
                trial = dict(values, relaxed_fraction=frac, decay_length_nm=length)
                cost = float(np.sum(m.residuals(np.array([trial[n] for n in names])) ** 2))
                if cost < best[0]:
                    best = (cost, frac, length)
        values.update(relaxed_fraction=best[1], decay_length_nm=best[2])
    # 3. everything together
    values, res, _ = run(values, {}, 200)
    x = np.array([values[n] for n in names])
    if model == "cosh" and (values["ux_nm"], values["uy_nm"]) < (0.0, 0.0):
        idx = [names.index(n) for n in ("ux_nm", "uy_nm") if n in names]
        x[idx] = -x[idx]
    r = m.residuals(x)
    chi2 = float(np.sum(r ** 2))
    dof = int(r.size - len(names) - 3 * len(data.intensity))
    jac = m.jacobian(x)
    scale = np.linalg.norm(jac, axis=0)
    if np.any(scale == 0):
        dead = [names[j] for j in np.flatnonzero(scale == 0)]
        raise InputError(f"degenerate fit: the profiles do not depend on {', '.join(dead)}; "
                         "hold it, or fit --model uniform when the lines show no relaxation")
    _, sv, vt = np.linalg.svd(jac / scale, full_matrices=False)
    cov = (vt.T / np.maximum(sv, 1e-300) ** 2) @ vt / np.outer(scale, scale)
    inflated = dof > 0 and chi2 > dof
    if inflated:
        cov = cov * (chi2 / dof)
    # per-profile position term: a neighbouring line's wing or a dynamical shift moves a
    # profile as a whole; the scatter of the profiles' own best shifts about the fitted
    # ones, against their statistical sigmas, is a Birge ratio that scales the whole
    # covariance: a moved profile moves one component of a split line against the
    # other, so the relaxation parameters take up the same error as the strain
    shift_ratio = _shift_scatter(m, x, 9 - sum(n in m.fixed for n in _RIGID))
    cov_stat = cov.copy()
    if shift_ratio > 1.0:
        cov = cov * shift_ratio ** 2
    units = np.array([_STRAIN_UNIT if n in STRAIN_COMPONENTS else 1.0 for n in names])
    cov = cov * np.outer(units, units)
    cov_stat = cov_stat * np.outer(units, units)
    sigmas = np.sqrt(np.maximum(np.diag(cov), 0.0))
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cov / np.outer(sigmas, sigmas)
    v = m.full(x)
    intrinsic_ext = m.intrinsic(v)
    blurred = m.blur(v, intrinsic_ext)
    coef, _, _ = m.linear(blurred)
    design = m.design(blurred)
    fitted = np.einsum("pki,pi->pk", design, coef)
    uniform = coef[:, :1] + coef[:, 1:2] * data.offset_px - coef[:, 2:3] * m.blur(
        v, m.intrinsic(v, relax=False))
    success = bool(res.success) and np.all(np.isfinite(sigmas))
    message = res.message if success else f"the fit did not converge: {res.message}"
    return ProfileFit(model, names, x * units, sigmas, [PARAMETER_UNITS[n] for n in names],
                      cov, corr, chi2, dof, success, str(message), fitted, uniform,
                      coef, inflated, np.sqrt(np.maximum(np.diag(cov_stat), 0.0)),
                      float(shift_ratio))


def _minima(profile):
    """Resolved minima of a deficit profile (p, k): count per profile.

    A minimum counts when it is at least a quarter of the deepest one and
    the profile rises between neighbouring counted minima by at least a
    tenth of the deepest (so a flat-bottomed or shouldered dip counts once).
    """
    counts = np.zeros(len(profile), dtype=int)
    for i, y in enumerate(profile):   # a few dozen profiles, reporting only
        base = np.max(y)
        deficit = base - y
        top = deficit.max()
        if top <= 0:
            continue
        inner = np.flatnonzero((y[1:-1] < y[:-2]) & (y[1:-1] <= y[2:])) + 1
        inner = inner[deficit[inner] >= 0.25 * top]
        kept = []
        for j in inner:
            if kept and deficit[kept[-1]:j + 1].min() > min(deficit[kept[-1]], deficit[j]) \
                    - 0.1 * top:
                if deficit[j] > deficit[kept[-1]]:
                    kept[-1] = j
                continue
            kept.append(j)
        counts[i] = len(kept)
    return counts


def _fwhm(x, deficit):
    """Full width (units of x) of the region where a deficit exceeds half its maximum."""
    top = deficit.max(axis=-1, keepdims=True)
    above = deficit >= 0.5 * top
    first = np.argmax(above, axis=-1)
    last = above.shape[-1] - 1 - np.argmax(above[..., ::-1], axis=-1)
    return x[last] - x[first]
