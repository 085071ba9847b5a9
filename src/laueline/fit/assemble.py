"""From a finished fit to its result: statistics, strain, checks and per-pattern tables."""

from __future__ import annotations

import math

import numpy as np

from ..crystal import cell_from_basis
from ..errors import InputError
from ..strain import green_lagrange, green_lagrange_report, propagate, voigt, voigt_rotation
from .constraints import STRAIN_COMPONENTS
from ..uncertainty import add_systematic
from .covariance import covariance_from_svd, scaled_svd
from .observations import CrossingData, Crossings
from .result import Check, FitResult, LineRecord, LineResidual, PatternResult, PointRecord

__all__ = ["assemble_result"]


def _snap(values, sigmas, floor):
    """Components with no variance are fixed: show them exactly, with sigma 0."""
    values, sigmas = np.array(values, float), np.array(sigmas, float)
    fixed = sigmas <= floor
    values[fixed] = np.round(values[fixed], 12) + 0.0
    sigmas[fixed] = 0.0
    return values, sigmas, fixed


def _snap_tensor(tensor, sigma, floor):
    v, s, fixed = _snap(voigt(tensor), voigt(sigma), floor)
    from ..strain import from_voigt

    return from_voigt(v), from_voigt(s), fixed


def assemble_result(problem, crystal, x, converged, message, warnings, *, stiffness,
                    sample_axes, exclude, hexagonal, unique_axis, inner_potential, tilts,
                    line_sigma=None, systematic_covariance=None):
    """The FitResult of parameters x (refined internal units) of a prepared problem."""
    from scipy.stats import chi2 as chi2_dist

    pm = problem.parameters
    p = len(pm.free)
    names = pm.names
    units = pm.units
    r_raw, J_raw = problem.raw(x, with_jacobian=True)
    r_w = problem.whiten(r_raw)
    n_obs = r_w.size
    dof = n_obs - p
    chi2 = float(r_w @ r_w)
    noise_estimated = line_sigma is not None and line_sigma.point_sigma_px is not None
    sigma_stated = all(o.sigma_stated for o in problem._obs)
    inflate = any(o.inflate for o in problem._obs)
    factor = 1.0
    if not sigma_stated:
        factor = chi2 / dof if dof > 0 else float("nan")
    elif inflate and dof > 0 and chi2 > dof:
        factor = chi2 / dof
    condition = 1.0
    if p:
        Jw = problem.whiten(J_raw)
        scale = np.linalg.norm(Jw, axis=0)
        if np.any(scale == 0):
            dead = [names[j] for j in np.flatnonzero(scale == 0)]
            raise InputError(f"degenerate fit: the data do not depend on {', '.join(dead)}; "
                             "hold it")
        scale, sv, vt = scaled_svd(Jw)
        condition = float(sv[0] / sv[-1]) if sv[-1] > 0 else float("inf")
        if not np.isfinite(condition) or condition > 1e10:
            worst = [names[j] for j in np.argsort(-np.abs(vt[-1]))[:2]]
            raise InputError(f"degenerate fit: {' and '.join(worst)} cannot be separated by "
                             "these observations; hold one of them or measure more")
        # parameter_covariance(J_raw, residual covariance), from the decomposition above
        cov_int = covariance_from_svd(scale, sv, vt) * factor
        cov = cov_int * np.outer(units, units)
    else:
        cov = np.zeros((0, 0))
    sig = np.sqrt(np.maximum(np.diag(cov), 0))
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cov / np.outer(sig, sig) if p else cov
    full = pm.full(x)
    L = pm.matrix
    values = np.array([_value_of(f, full, x[i]) for i, f in enumerate(pm.free)])

    # -- strain ----------------------------------------------------------------------
    basis = pm.bases(full)[0]
    cov_full = L @ cov @ L.T if p else np.zeros((pm.size, pm.size))
    if pm.cell_slots is None:
        e_voigt = np.array(full[:6])
        cov_e = cov_full[:6, :6]
    else:
        cols = pm.crystal_columns()

        def gl_of(xc):
            xx = np.array(x, float)
            xx[cols] = xc
            return voigt(green_lagrange(crystal.basis, pm.bases(pm.full(xx))[0]))

        e_voigt = gl_of(x[cols])
        cov_xc = cov[np.ix_(cols, cols)] / np.outer(units[cols], units[cols])
        cov_e = propagate(gl_of, x[cols], cov_xc, np.full(len(cols), 1e-4)) if cols else \
            np.zeros((6, 6))
    # a component with a spread a million times below the largest is fixed by the model
    floor = 1e-7 * max(float(np.sqrt(np.max(np.diag(cov_e)))) if cov_e.size else 0.0, 1e-300)
    fixed_crystal = np.sqrt(np.maximum(np.diag(cov_e), 0)) <= floor
    e_voigt = np.where(fixed_crystal, np.round(e_voigt, 12) + 0.0, e_voigt)
    cov_e = np.where(fixed_crystal[:, None] | fixed_crystal[None, :], 0.0, cov_e)
    if systematic_covariance is not None and np.shape(systematic_covariance) != (6, 6):
        raise InputError("systematic_covariance: give a 6 x 6 Voigt covariance of the strain "
                         "(crystal Cartesian frame)")
    parts = add_systematic(cov_e, systematic_covariance)
    cov_e_stat, cov_e = parts.statistical, parts.total
    strain = green_lagrange_report(crystal.basis, e_voigt, cov_e, stiffness=stiffness,
                                   axes=sample_axes)
    fixed = {"crystal": [n for n, f in zip(STRAIN_COMPONENTS, fixed_crystal) if f]}
    strain.green_lagrange, strain.green_lagrange_sigma, _ = _snap_tensor(
        strain.green_lagrange, strain.green_lagrange_sigma, floor)
    if strain.sample_green_lagrange is not None:
        strain.sample_green_lagrange, strain.sample_green_lagrange_sigma, fs = _snap_tensor(
            strain.sample_green_lagrange, strain.sample_green_lagrange_sigma, floor)
        fixed["sample"] = [n for n, f in zip(STRAIN_COMPONENTS, fs) if f]
    if strain.stress_GPa is not None:
        s_floor = floor * float(np.max(np.abs(stiffness)))
        strain.stress_GPa, strain.stress_sigma_GPa, _ = _snap_tensor(
            strain.stress_GPa, strain.stress_sigma_GPa, s_floor)
        if strain.sample_stress_GPa is not None:
            strain.sample_stress_GPa, strain.sample_stress_sigma_GPa, _ = _snap_tensor(
                strain.sample_stress_GPa, strain.sample_stress_sigma_GPa, s_floor)

    # -- cell -----------------------------------------------------------------------
    cell = cell_from_basis(basis)
    if np.any(cov_e):
        from ..strain import basis_from_green_lagrange, from_voigt

        cov_cell = propagate(lambda v: cell_from_basis(basis_from_green_lagrange(
            crystal.basis, from_voigt(v))), e_voigt, cov_e,
            np.maximum(np.sqrt(np.diag(cov_e)), 1e-9) * 1e-3)
        cell_sigma = np.sqrt(np.maximum(np.diag(cov_cell), 0))
    else:
        cell_sigma = np.zeros(6)

    # -- warnings on the statistics ---------------------------------------------------
    if dof < 5:
        warnings.append(f"only {dof} degrees of freedom: uncertainties are themselves "
                        "uncertain")
    for i in range(p):
        for j in range(i + 1, p):
            if abs(corr[i, j]) > 0.95 and not (names[i] in STRAIN_COMPONENTS and
                                               names[j] in STRAIN_COMPONENTS):
                warnings.append(f"{names[i]} and {names[j]} are correlated "
                                f"({corr[i, j]:+.3f}): they are poorly separated")
    poorly = _poorly_separated(cov_e, "crystal")
    if sample_axes is not None:
        T = voigt_rotation(sample_axes)
        poorly += _poorly_separated(T @ cov_e @ T.T, "sample")
    for a, b, c, frame in poorly:
        warnings.append(f"{a} and {b} are correlated ({c:+.3f}, {frame} frame): these "
                        "observations do not separate them well")
    chi2_out = None
    checks = [Check("converged", bool(converged), None, None)]
    if sigma_stated and dof > 0 and not noise_estimated:
        chi2_out = chi2
        p_value = float(chi2_dist.sf(chi2, dof))
        # limit 1e-3: an honest fit is refused once in a thousand (a 1 % level
        # refuses two of every 200 honest fits); sigmas understated by a third fail
        if not inflate:  # detected lines scale their covariance up by design
            checks.append(Check(
                "chi_square_p_value", p_value >= 1e-3, p_value, 1e-3,
                "" if p_value >= 1e-3 else
                f"chi square {chi2:.1f} for {dof} degrees of freedom (p = {p_value:.1e}): the "
                f"scatter is {math.sqrt(chi2 / dof):.2f} times what the stated sigmas allow "
                "(state larger sigma_px or a line sigma, or look for wrong points; --robust)"))
        if p_value < 0.01 and not inflate:
            warnings.append(f"chi-square {chi2:.1f} for {dof} degrees of freedom "
                            f"(p = {p_value:.1e}): the scatter exceeds the stated sigmas, so "
                            f"the uncertainties are underestimated by about "
                            f"{math.sqrt(chi2 / dof):.2f}x")
        elif chi2_dist.cdf(chi2, dof) < 0.01:
            warnings.append(f"chi-square {chi2:.1f} for {dof} degrees of freedom is "
                            "implausibly small: the stated sigmas may be overstated")
    checks.append(_residual_check(problem, r_raw, r_w, factor, noise_estimated, J_raw))
    checks += _scatter_checks(problem, x)
    rivals = [d.rivals for d in problem.data]
    checks.append(Check("orientation_unique", not any(rivals), None, None,
                        "the detector orientation is ambiguous" if any(rivals) else ""))
    checks += _mirror_checks(problem, x)
    checks += _calibration_checks(problem, crystal)
    if pm.model != "fixed" and any("scale" in nm for nm in names) and \
            not any(nm.startswith("kv") for nm in names) and len(problem.specs) == 1:
        warnings.append("the camera scale is refined together with the crystal: scale and "
                        "in-plane dilatation are nearly degenerate in one pattern; calibrate "
                        "the scale on a reference (a calibration) for trustworthy strain")
    constraints = list(pm.constraints.descriptions) if pm.constraints is not None else []
    if tilts:
        constraints.append("relative orientation of the patterns from the holder tilts "
                           "(one camera rotation)")

    patterns = [_pattern_result(problem, j, x, full, cov, factor, exclude, hexagonal)
                for j in range(len(problem.specs))]
    n_left = sum(p_.n_points - p_.n_used for p_ in patterns)
    if n_left:
        warnings.append(f"{n_left} observation(s) left out of the fit (see the tables)")
    failed = [c for c in checks if not c.passed and c.name != "converged"]
    if failed:
        reasons = "; ".join(c.detail or c.name for c in failed)
        message = f"{message}; {reasons}" if message else f"implausible fit: {reasons}"
    if not message:
        message = (f"converged: {sum(p_.n_used for p_ in patterns)} observations in "
                   f"{len(patterns)} pattern(s), {dof} degrees of freedom")
    return FitResult(
        success=bool(converged) and not failed, message=message, model=pm.model,
        parameters=names,
        values=values, sigmas=sig, covariance=cov, correlation=corr,
        condition_number=condition, strain=strain, strain_voigt=voigt(strain.green_lagrange),
        strain_covariance=cov_e, strain_covariance_statistical=cov_e_stat,
        strain_covariance_systematic=parts.systematic, fixed_components=fixed, cell=cell,
        cell_sigma=cell_sigma, reference_cell=crystal.cell, basis=basis, patterns=patterns,
        chi2=chi2_out, dof=int(dof), checks=checks, constraints=constraints,
        warnings=list(dict.fromkeys(warnings)), structure=crystal.summary(),
        unique_axis=unique_axis, inner_potential=inner_potential, crystal=crystal,
        poorly_separated=[(a, b, c, f) for a, b, c, f in poorly], line_sigma=line_sigma)


# ---------------------------------------------------------------------------
# plausibility checks
# ---------------------------------------------------------------------------

#: Largest rms distance (mrad) of measured crossings from their fitted
#: positions that a plausible fit leaves: a HOLZ deficit line is a few
#: hundredths of a mrad wide and is located to a fraction of its width, so a
#: scatter of a tenth of a mrad is a wrong model, assignment or reading, not
#: measurement noise (common practice).
MAX_RMS_MRAD = 0.1


def _robust_point_sigma(problem, r_raw, J_raw):
    """Point sigma from the median of the residuals left with every line offset free.

    1.4826 times the median absolute value (the normal consistency factor),
    times sqrt(n / dof) for the fitted parameters and offsets: a few gross
    errors cannot hide by inflating it.
    """
    from scipy.linalg import block_diag

    rows, loads = [], []
    for j, o in enumerate(problem._obs):
        if o.kind == "crossings" and len(o) and o.loading is not None:
            rows.append(np.arange(problem._rows[j], problem._rows[j + 1]))
            loads.append(o.loading)
    if not rows:
        return None
    idx = np.concatenate(rows)
    J = J_raw[idx][:, np.any(J_raw[idx] != 0, axis=0)]
    design = np.concatenate([J, block_diag(*loads)], axis=1)
    coef, _, rank, _ = np.linalg.lstsq(design, r_raw[idx], rcond=None)
    dof = len(idx) - int(rank)
    if dof < 1:
        return None
    left = r_raw[idx] - design @ coef
    value = 1.4826 * float(np.median(np.abs(left))) * math.sqrt(len(idx) / dof)
    # no measured position is better than a thousandth of a pixel: exact
    # synthetic data must not turn rounding into outliers
    return max(value, 1e-3)


def _residual_check(problem, r_raw, r_w, factor, noise_estimated, J_raw):
    """The largest normalised residual, naming the worst points.

    Crossings: each coordinate's residual over the square root of its
    variance under the fitted error model; when the point noise was
    estimated from these same residuals, its robust counterpart
    (:func:`_robust_point_sigma`) takes its place.  Limit: the level the
    largest of n standard normal values exceeds with probability 0.1 %
    (Bonferroni).
    """
    from scipy.stats import norm

    z_all, names = [], []
    robust = _robust_point_sigma(problem, r_raw, J_raw) if noise_estimated else None
    for j, o in enumerate(problem._obs):
        lo, hi = problem._rows[j], problem._rows[j + 1]
        if o.kind == "crossings":
            cov = problem._cov[j]
            var = cov if cov.ndim == 1 else np.diag(cov)
            if robust is not None:
                # the point variance estimated from these residuals, outliers and all,
                # replaced by its robust counterpart; the line part kept
                var = var - np.repeat(o.sigma_px, 2) ** 2 + robust ** 2
            z = np.abs(r_raw[lo:hi]) / np.sqrt(var)
            rows = np.flatnonzero(problem.data[j].used)
            z_pt = z.reshape(-1, 2).max(axis=1)
            z_all.append(z_pt)
            names += [f"{problem.specs[j].label}point {i + 1}" for i in rows]
        else:
            z = np.abs(r_w[lo:hi]) / math.sqrt(factor if np.isfinite(factor) and factor > 0
                                               else 1.0)
            z_all.append(z.reshape(len(o), -1).max(axis=1))
            idx = np.flatnonzero(problem.data[j].used)
            names += [f"{problem.specs[j].label}line {problem.data[j].good[i] + 1}"
                      for i in idx]
    z = np.concatenate(z_all) if z_all else np.zeros(0)
    if not z.size:
        return Check("largest_normalised_residual", True, None, None)
    n = sum(2 * len(o) if o.kind == "crossings" else len(o) * o.group_size
            for o in problem._obs)
    limit = float(norm.isf(0.0005 / max(n, 1)))
    order = np.argsort(-z)
    worst = [f"{names[i]} ({z[i]:.1f} sigma)" for i in order[:3] if z[i] > limit]
    passed = float(z.max()) <= limit
    detail = "" if passed else (f"residuals far beyond the noise at {', '.join(worst)}: a "
                                "wrong label or outlier (check them, or use --robust)")
    return Check("largest_normalised_residual", passed, float(z.max()), limit, detail)


def _scatter_checks(problem, x):
    """Rms of crossing residuals in mrad against :data:`MAX_RMS_MRAD`."""
    pm = problem.parameters
    full = pm.full(x)
    raw = problem.raw(x)[0]
    out = []
    for j, o in enumerate(problem._obs):
        if o.kind != "crossings" or len(o) == 0:
            continue
        part = raw[problem._rows[j]:problem._rows[j + 1]].reshape(len(o), 2)
        rms = float(np.sqrt(np.mean(np.sum(part ** 2, axis=1))))
        rms_mrad = rms / pm.detector(full, j).scale_px_per_mrad
        passed = rms_mrad <= MAX_RMS_MRAD
        detail = "" if passed else (
            f"{problem.specs[j].label}the crossings lie {rms:.3g} px ({rms_mrad:.2g} mrad) rms "
            "from the fitted pattern: the model does not describe them (a strained region "
            "fitted with a fixed cell, y read upward without --y-up, wrong labels, or another "
            "zone axis)")
        out.append(Check("residual_rms_mrad", passed, rms_mrad, MAX_RMS_MRAD, detail))
    return out


def _mirror_checks(problem, x):
    """Does the mirrored reading fit the labelled crossings much better?

    The fitted crossing positions (mrad) are mapped onto the measured pixels
    by the best similarity with and without a mirror (Umeyama 1991); when
    the mirror the fit did not use leaves less than half the rms, the points
    were read with y the other way round (or the detector's mirror is held
    wrong).
    """
    from ..lines import crossing_positions
    from .observations import _similarity

    pm = problem.parameters
    full = pm.full(x)
    out = []
    for j, (o, d) in enumerate(zip(problem._obs, problem.data)):
        if o.kind != "crossings" or not isinstance(d, CrossingData) or not d.labelled \
                or len(o) < 3:
            continue
        geo = pm.geometry(full[None], j)
        spec = problem.specs[j]
        t = crossing_positions(geo.bases[0], spec.zone, spec.x_axis, geo.wave_numbers[0],
                               o.hkl_a, o.hkl_b)
        mirror = bool(pm.mirror[j])
        fit_rms = _similarity(t, o.xy_px, mirror)[3]
        other_rms = _similarity(t, o.xy_px, not mirror)[3]
        ratio = other_rms / fit_rms if fit_rms > 0 else float("inf")
        passed = not ratio < 0.5
        detail = "" if passed else (
            f"{spec.label}the mirrored reading fits {1 / ratio:.0f} times better: the points' "
            "y axis points the other way (give --y-up, or leave it out), or the held mirror is "
            "wrong (the right calibration)")
        out.append(Check("mirror", passed, float(ratio), 0.5, detail))
    return out


def _calibration_checks(problem, crystal):
    """A held calibration must come from this structure, this zone axis and a converged fit."""
    from ..frame import reduce_indices

    out = []
    for spec in problem.specs:
        cal = spec.calibration
        if cal is None:
            continue
        where = f"{spec.label}the calibration{' ' + cal.source if cal.source else ''}"
        same = not cal.structure or cal.structure in (crystal.name, crystal.formula) or \
            (cal.formula and cal.formula == crystal.formula)
        out.append(Check("calibration_structure", bool(same), None, None, "" if same else
                         f"{where} was made on {cal.structure}, this fit is of {crystal.name}: "
                         "use a calibration made on this structure"))
        if cal.zone is not None:
            zone = tuple(int(v) for v in reduce_indices(np.asarray(cal.zone, int))[0]) \
                if len(cal.zone) == 3 else tuple(cal.zone)
            same = zone == tuple(int(v) for v in spec.zone)
            out.append(Check("calibration_zone", same, None, None, "" if same else
                             f"{where} was made at zone {list(cal.zone)}, this pattern is at "
                             f"{list(spec.zone)}: the effective voltage and camera scale "
                             "belong to one zone axis; use a calibration at this zone axis"))
        shape = (cal.settings or {}).get("image_shape")
        if shape and spec.detection is not None:
            same = tuple(int(v) for v in shape) == tuple(spec.detection.shape)
            out.append(Check("calibration_detector", same, None, None, "" if same else
                             f"{where} was made on {shape[0]} x {shape[1]} px images, this "
                             f"image has {spec.detection.shape[0]} x "
                             f"{spec.detection.shape[1]}: another detector or binning; use a "
                             "calibration made with this camera setting"))
        out.append(Check("calibration_converged", bool(cal.converged), None, None,
                         "" if cal.converged else f"{where} comes from a fit that did not "
                         "converge or was implausible: make the calibration again"))
    return out


def _value_of(f, full, xi):
    """Physical value of a free parameter: its slot (slots tied with weight 1), or the
    coordinate along a reduced strain direction."""
    nz = np.flatnonzero(f.column)
    if np.all(f.column[nz] == 1.0):
        return float(full[nz[0]])
    return float(xi * f.unit)


def _poorly_separated(cov6, frame, level=0.9):
    """Pairs of components whose correlation exceeds ``level``.

    Pairs tied exactly by the model or a constraint (|correlation| = 1 to
    rounding, such as exx = eyy of a tetragonal cell) are not the data's
    failing and are left out.
    """
    s = np.sqrt(np.maximum(np.diag(cov6), 0))
    out = []
    for i in range(6):
        for j in range(i + 1, 6):
            if s[i] > 0 and s[j] > 0:
                c = cov6[i, j] / (s[i] * s[j])
                if level < abs(c) < 1 - 1e-9:
                    out.append((STRAIN_COMPONENTS[i], STRAIN_COMPONENTS[j], float(c), frame))
    return out


def _pattern_result(problem, j, x, full, cov, factor, exclude, hexagonal):
    pm, spec, data = problem.parameters, problem.specs[j], problem.data[j]
    det = pm.detector(full, j)
    names = pm.names
    sig = np.sqrt(np.maximum(np.diag(cov), 0)) if len(cov) else np.zeros(0)

    def sigma_of(field_):
        for i, f in enumerate(pm.free):
            if f.column[pm.slot(field_, j)] != 0:
                return float(sig[i])
        return None

    det_sigma = {
        "center_px": ([sigma_of("center_x"), sigma_of("center_y")]
                      if sigma_of("center_x") is not None else None),
        "scale_px_per_mrad": sigma_of("scale"),
        "rotation_deg": sigma_of("rotation"),
        "distortion": ([sigma_of("e1"), sigma_of("e2")] if sigma_of("e1") is not None
                       else None),
    }
    geo = pm.geometry(full[None], j)
    s_factor = math.sqrt(factor) if np.isfinite(factor) and factor > 0 else 1.0
    table_hkl, table_d, table_z = np.zeros((0, 3), np.int64), np.zeros(0), np.zeros(0)
    if isinstance(data, CrossingData):
        obs = problem._obs[j]
        records = []
        res_all = np.full((len(data), 2), np.nan)
        if len(obs):
            fitted = obs.predicted_px(geo)[0]
            res_all[data.used] = obs.xy_px - fitted
            normals = obs.line_normals_px(geo)
            sigma = (obs.sigma_px if obs.sigma_px is not None else np.ones(len(obs))) * s_factor
            # each crossing's residual across each of its two lines
            d = np.einsum("ni,nsi->ns", obs.xy_px - fitted, normals)
            table_hkl = np.concatenate([obs.hkl_a, obs.hkl_b])
            table_d = np.concatenate([d[:, 0], d[:, 1]])
            table_z = table_d / np.concatenate([sigma, sigma])
        for i in range(len(data)):
            records.append(PointRecord(float(data.xy[i, 0]), float(data.xy[i, 1]),
                                       data.hkl_a[i].tolist(), data.hkl_b[i].tolist(),
                                       res_all[i].tolist(), bool(data.used[i]), data.notes[i]))
        used = res_all[data.used]
        rms = float(np.sqrt(np.mean(np.sum(used ** 2, axis=1)))) if len(used) else float("nan")
        lines = None
        n_points, n_used = len(data), int(data.used.sum())
    else:
        obs = problem._obs[j]
        offsets = np.full((len(data), data.points.shape[1]), np.nan)
        if len(obs):
            offsets[data.used] = obs.residuals(geo)[0]
            sd = np.sqrt(np.diagonal(obs.covariance, axis1=1, axis2=2)) * s_factor
            k = offsets.shape[1]
            table_hkl = np.repeat(obs.hkl, k, axis=0)
            table_d = -offsets[data.used].ravel()     # measured minus fitted
            table_z = table_d / sd.ravel()
        dist = np.sqrt(np.mean(offsets ** 2, axis=1))
        index_of = {i: k for k, i in enumerate(data.good)}
        lines = []
        for i, ln in enumerate(data.detection.lines):
            k = index_of.get(i)
            if k is None:
                lines.append(LineRecord(i, [0, 0, 0], None, False, ln.flag,
                                        ln.normal_angle_deg))
                continue
            lines.append(LineRecord(i, data.hkl[k].tolist(),
                                    float(dist[k]) if data.used[k] else None,
                                    bool(data.used[k]), data.notes[k], ln.normal_angle_deg,
                                    data.points[k].tolist(), offsets[k].tolist()))
        records = _detected_crossings(problem, j, geo, data)
        rms = float(np.sqrt(np.nanmean(dist[data.used] ** 2))) if data.used.any() \
            else float("nan")
        n_points, n_used = len(data), int(data.used.sum())
    line_table = _line_table(table_hkl, table_d, table_z)
    kv_sigma = sigma_of("kv")
    return PatternResult(
        index=j, zone=spec.zone, x_axis=spec.x_axis, detector=det, detector_sigma=det_sigma,
        kv=float(full[pm.slot("kv", j)]), kv_sigma=kv_sigma,
        wave_number=float(pm.wave_numbers(full, j)[0]), disk_mrad=spec.disk_mrad,
        points=records, lines=lines, line_table=line_table, rms_px=rms, n_points=n_points,
        n_used=n_used, assigned=data.needs_assignment, tilt_deg=spec.tilt_deg,
        source=spec.source, pixel_frame=spec.pixel_frame, calibration=spec.calibration,
        excluded=tuple(sorted(exclude)), hexagonal=hexagonal,
        image_shape=None if lines is None else tuple(int(v) for v in data.detection.shape))


def _line_table(hkl, d, z):
    """Residuals gathered by reflection, most observed lines first."""
    if not len(hkl):
        return []
    lines, inverse = np.unique(hkl, axis=0, return_inverse=True)
    inverse = inverse.ravel()
    n = np.bincount(inverse)
    mean = np.bincount(inverse, d) / n
    rms = np.sqrt(np.bincount(inverse, d * d) / n)
    z_rms = np.sqrt(np.bincount(inverse, z * z) / n)
    order = np.lexsort((-rms, -n))
    return [LineResidual([int(v) for v in lines[i]], int(n[i]), float(mean[i]),
                         float(rms[i]), float(z_rms[i])) for i in order]


def _detected_crossings(problem, j, geo, data):
    """The detected crossings of assigned lines, against the fitted ones."""
    det = data.detection
    label = {i: data.hkl[k] for k, i in enumerate(data.good) if data.used[k]}
    rows = [(xy, label[a], label[b]) for (a, b), xy in
            zip(det.crossing_lines, det.crossing_px) if a in label and b in label]
    if not rows:
        return []
    spec = problem.specs[j]
    obs = Crossings(spec.zone, spec.x_axis, np.array([r[0] for r in rows]),
                    np.array([r[1] for r in rows]), np.array([r[2] for r in rows]))
    res = obs.xy_px - obs.predicted_px(geo)[0]
    return [PointRecord(float(xy[0]), float(xy[1]), list(map(int, a)), list(map(int, b)),
                        r.tolist(), True, "derived from two fitted lines")
            for (xy, a, b), r in zip(rows, res)]


