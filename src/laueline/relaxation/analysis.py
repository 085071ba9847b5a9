"""From an image to the mid-foil strain and relaxation: the pipeline, result and text.

See :mod:`laueline.relaxation` for the model and its sources.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError
from .depth import (MODELS, PARAMETERS, STRAIN_COMPONENTS, DisplacementTable,
                    _check_thickness, read_displacement_table, relaxation_displacement,
                    relaxed_strain_fraction)
from .fit import ProfileFit, _bounds, _fwhm, _minima, fit_profiles, ProfileData
from .measure import LineProfiles, _subset, measure_line_profiles
from .profile import _SINC2_FWHM, excitation_errors, strain_shifts

__all__ = ["RELAXATION_SCHEMA", "CAUTIONS", "RelaxationResult", "relaxation", "profile_data",
           "relaxation_text"]

RELAXATION_SCHEMA = "laueline.relaxation/1"

CAUTIONS = (
    "The line-profile model is kinematic: dynamical effects (shifts and shapes of strong "
    "lines, absorption) are ignored; treat the relaxation parameters as a kinematic "
    "description of the profiles, not as a dynamical result.",
    "A kinematic profile is unchanged when the foil is turned over: the two surfaces are "
    "not told apart, and a relaxation at one surface only looks like one at the other.",
    "The strain reported is that of the lamella at mid-foil; the bulk device before "
    "thinning may differ.",
)


@dataclass
class RelaxationResult:
    """Outcome of :func:`relaxation`: mid-foil strain and relaxation through the foil."""

    structure: dict
    zone: tuple
    x_axis: tuple
    kv: float
    thickness_nm: float
    model: str
    fit: ProfileFit
    profiles: LineProfiles
    strain_mid: np.ndarray          # six components
    strain_mid_sigma: np.ndarray
    strain_mid_sigma_stat: np.ndarray
    average_strain: np.ndarray      # six components of the single-strain fit
    average_strain_sigma: np.ndarray
    detector: object                # the fitted detector
    split: np.ndarray               # (p,) bool per profile
    broadened: np.ndarray           # (p,) bool
    width_px: np.ndarray            # (p,) FWHM of the fitted profile
    uniform_width_px: np.ndarray    # (p,) FWHM of a uniform-strain line, same blur
    table: DisplacementTable | None = None
    warnings: list = field(default_factory=list)
    cautions: tuple = CAUTIONS

    @property
    def success(self):
        return self.fit.success

    @property
    def parameters(self):
        """Relaxation parameters: (names, values, sigmas, units)."""
        names = [n for n in self.fit.names if n in PARAMETERS[self.model]
                 or n == "instrument_sigma_px"]
        idx = [self.fit.names.index(n) for n in names]
        return (names, self.fit.values[idx], self.fit.sigmas[idx],
                [self.fit.units[i] for i in idx])

    def depth_profile(self, n=101):
        """The fitted relaxation against depth, with 1-sigma bands.

        Returns (z_nm (n,), curves (n, m), sigmas (n, m), labels): for the
        displacement families du/dz of the relaxation in the disk frame x and y
        (twice the tensor shears e_xz, e_yz added to the mid-foil strain); for
        ``relaxed-strain`` the strain at depth over the mid-foil strain.
        Uncertainties are propagated from the covariance by finite differences.
        """
        z = np.linspace(0.0, self.thickness_nm, n)
        shape = [nm for nm in self.fit.names if nm in PARAMETERS[self.model]]
        idx = [self.fit.names.index(nm) for nm in shape]
        if self.model == "relaxed-strain":
            labels = ["e(z) / e_mid"]

            def curves(vals):
                return relaxed_strain_fraction(vals[0], vals[1], z, self.thickness_nm)[:, None]
        else:
            labels = ["du_x/dz", "du_y/dz"]

            def curves(vals):
                u = relaxation_displacement(self.model, vals, z, self.thickness_nm, self.table)
                return np.gradient(u[:, :2], z, axis=0)

        base = np.asarray([self.fit.values[i] for i in idx], dtype=float)
        values = curves(base)
        if not idx:
            return z, values, np.zeros_like(values), labels
        cov = self.fit.covariance[np.ix_(idx, idx)]
        jac = []
        for k in range(len(idx)):
            h = 1e-4 * max(abs(base[k]), 1e-3 * self.thickness_nm if shape[k].endswith("_nm")
                           else 1e-3)
            step = base.copy()
            step[k] += h
            jac.append((curves(step) - values) / h)
        jac = np.stack(jac, axis=-1)                         # (n, m, q)
        var = np.einsum("nij,jk,nik->ni", jac, cov, jac)
        return z, values, np.sqrt(np.maximum(var, 0.0)), labels

    def to_dict(self):
        """The ``laueline.relaxation/1`` document."""
        names, values, sigmas, units = self.parameters
        p = self.profiles
        lines = []
        for i in range(len(p)):
            lines.append({
                "hkl": p.hkl[i].tolist(), "segment": int(p.segment[i]),
                "split": bool(self.split[i]), "broadened": bool(self.broadened[i]),
                "width_px": float(self.width_px[i]),
                "uniform_width_px": float(self.uniform_width_px[i]),
                "n_columns": int(p.n_columns[i]),
                "offset_px": p.offset_px.tolist(),
                "measured": p.intensity[i].tolist(), "sigma": p.sigma[i].tolist(),
                "fitted": self.fit.fitted[i].tolist(),
                "fitted_uniform": self.fit.uniform[i].tolist(),
                "background": float(self.fit.linear[i, 0]),
                "depth": float(self.fit.linear[i, 2]),
                "columns_px": p.columns_px[i][[0, -1]].tolist(),
            })
        z, curves, curve_sigma, labels = self.depth_profile(41)
        det = self.detector
        return {
            "schema": RELAXATION_SCHEMA,
            "structure": self.structure, "zone": list(self.zone), "x_axis": list(self.x_axis),
            "kv": self.kv, "thickness_nm": self.thickness_nm, "model": self.model,
            "displacement_table": None if self.table is None else self.table.source,
            "parameters": {"names": names, "values": values, "sigmas": sigmas,
                           "units": units},
            "strain_mid": {"frame": "reference-cartesian",
                           "components": list(STRAIN_COMPONENTS),
                           "values": self.strain_mid, "sigmas": self.strain_mid_sigma,
                           "sigmas_statistical": self.strain_mid_sigma_stat,
                           "position_scatter_ratio": self.fit.shift_ratio},
            "average_strain": {"values": self.average_strain,
                               "sigmas": self.average_strain_sigma},
            "detector": det.as_dict(),
            "fit_parameters": {"names": self.fit.names, "values": self.fit.values,
                               "sigmas": self.fit.sigmas, "units": self.fit.units},
            "correlation": self.fit.correlation,
            "depth_profile": {"z_nm": z, "quantities": labels, "values": curves.T,
                              "sigmas": curve_sigma.T, "frame": "disk (x, y, beam)"},
            "lines": lines,
            "n_split": int(np.sum(self.split)), "n_broadened": int(np.sum(self.broadened)),
            "chi2": self.fit.chi2, "dof": self.fit.dof,
            "uncertainties_scaled": bool(self.fit.inflated),
            "success": bool(self.success), "message": self.fit.message,
            "warnings": list(self.warnings), "cautions": list(self.cautions),
        }


def _default_half_width(thickness_nm, g_perp, scale_px_per_mrad, blur_sigma_px=None):
    """Profile half-width W (px) from the kinematic line width and the instrument blur.

    The dip of a line whose surface layers are displaced by up to about one
    cycle of g.w lies within about 2.5 / t in excitation error of its
    mid-foil locus (the sinc^2 central lobe, +-1 / t, and the surface
    component moved by one fringe more); two blur sigmas beyond that, the
    outer quarter of the window (the flank level of every column) is clear
    of the dip: 0.75 W = 2.5 / t + 2 sigma, for the median line, within
    8..40 px.  The blur is ``blur_sigma_px`` or, when it is to be fitted,
    1 px (a detector's point spread, common practice).  Widths that the line
    detection reports are not used: those of split lines measure the split.
    """
    blur = 1.0 if blur_sigma_px is None else float(blur_sigma_px)
    px_per_inv_t = 1.0 / (10.0 * thickness_nm) / np.median(g_perp) * 1e3 * scale_px_per_mrad
    return float(np.clip((2.5 * px_per_inv_t + 2.0 * blur) / 0.75, 8.0, 40.0))


def profile_data(profiles, crystal, zone, x_axis, wave_number, detector):
    """The :class:`ProfileData` of measured profiles through the one forward model.

    Every sample pixel is mapped to the disk (``detector``) and to the
    excitation error of its reflection in the unstrained reference crystal
    at ``wave_number`` (:func:`excitation_errors`); the column average gives
    s across the profile, fitted by a straight line in the offset.  The
    shifts per strain component and per detector parameter are taken at
    the profile's mean locus point.
    """
    from ..frame import zone_frame
    from ..lines import line_parameters

    frame = zone_frame(crystal.basis, zone, x_axis)
    hkl = profiles.hkl
    lp = line_parameters(crystal.g_vectors(hkl), frame, wave_number)
    d = profiles.offset_px
    n_col = max(len(c) for c in profiles.columns_px)
    # pad the column lists to one array (repeating the last column; weights drop them)
    cols = np.stack([np.concatenate([c, np.repeat(c[-1:], n_col - len(c), 0)])
                     for c in profiles.columns_px])
    nrm = np.stack([np.concatenate([c, np.repeat(c[-1:], n_col - len(c), 0)])
                    for c in profiles.normals])
    weight = np.stack([np.arange(n_col) < len(c) for c in profiles.columns_px]).astype(float)
    weight /= weight.sum(axis=1, keepdims=True)
    # the samples that entered each offset's average, as weights (p, c, k)
    sample_w = np.zeros((len(hkl), n_col, len(d)))
    for i, mask in enumerate(profiles.masks):
        sample_w[i, :len(mask)] = mask
    sample_w /= np.maximum(sample_w.sum(axis=1, keepdims=True), 1.0)
    pix = cols[:, :, None, :] + d[None, None, :, None] * nrm[:, :, None, :]   # (p, c, k, 2)

    def mean_s(det):
        s = excitation_errors(det.to_mrad(pix), lp)                        # (p, c, k)
        return np.einsum("pck,pck->pk", s, sample_w)

    s = mean_s(detector)
    design = np.stack([np.ones_like(d), d], axis=1)
    coef = np.linalg.lstsq(design, s.T, rcond=None)[0].T                  # (p, 2)
    dc = 0.05
    cx, cy = detector.center_px
    shifts = [(mean_s(detector.replace(center_px=(cx + dc, cy))) - s) / dc,
              (mean_s(detector.replace(center_px=(cx, cy + dc))) - s) / dc,
              (mean_s(detector.replace(rotation_deg=detector.rotation_deg + 0.01)) - s) / 0.01]
    det_shift = np.stack([sh.mean(axis=1) for sh in shifts], axis=1)
    t_mid = detector.to_mrad(np.einsum("pc,pcj->pj", weight, cols))
    strain = strain_shifts(crystal.basis, zone, x_axis, wave_number, hkl, t_mid)
    g_frame = np.concatenate([lp.g_perp, lp.gz[:, None]], axis=1)
    return ProfileData(d, profiles.intensity, profiles.sigma, coef, strain, det_shift, g_frame)


def relaxation(crystal, zone, image, *, calibration, thickness_nm, model="cosh", table=None,
               x_axis=None, min_strength=0.1, half_width_px=None, segments=2,
               instrument_sigma_px=None, detection=None, disk_px=None, min_significance=5.0):
    """Mid-foil strain and relaxation profile of a thin lamella from one pattern.

    Steps: detect the lines (:func:`laueline.images.detect.detect_lines`);
    fit one strain to them with the calibration held
    (:func:`laueline.refine.refine_image`), which gives the pattern centre,
    rotation and start strain (when that strain is imprecise, as split lines
    often make it, the reference cell's loci are used instead); measure the
    profile across every predicted line along its exact locus, in stretches
    (:func:`measure_line_profiles`), leaving out those too weak; fit the
    mid-foil strain, the pattern centre and rotation, the relaxation
    parameters and the instrument blur to all profiles at once
    (:func:`fit_profiles`); then measure and fit once more along the loci of
    the fitted mid-foil strain, so that no locus runs askew to its line.

    Parameters
    ----------
    crystal : Crystal
        The unstrained reference.
    zone : sequence of 3 int
    image : ndarray (rows, cols)
    calibration : laueline.fit.Calibration or (kv, Detector)
        From a reference fit; the voltage and the scale are held.
    thickness_nm : float
        Foil thickness (for example from :mod:`laueline.thickness`).
    model : {'uniform', 'cosh', 'table'}
    table : DisplacementTable or path, for ``model='table'``
    x_axis : sequence of 3 int, optional
    min_strength : float
        Weaker predicted lines are neither profiled nor kept clear of.
    half_width_px : float, optional
        Half-width of each profile; by default from the kinematic line
        width (thickness) and the instrument blur (:func:`_default_half_width`).
    segments : int
        Profiles per line (stretches along it).
    instrument_sigma_px : float, optional
        Gaussian blur of a line by the instrument (detector, energy spread),
        px; fitted when not given.
    detection : laueline.images.detect.Detection, optional
    disk_px : (x, y, r), optional
    min_significance : float
        Profiles whose dip is less significant than this (depth over its
        sigma) are left out as too weak.

    Returns
    -------
    RelaxationResult
    """
    from ..images.detect import detect_lines

    thickness_nm = _check_thickness(thickness_nm)
    if model not in MODELS:
        raise InputError(f"unknown relaxation model '{model}'; choose one of {', '.join(MODELS)}")
    if model == "table":
        if table is None:
            raise InputError("model 'table' needs a displacement table (--displacement-table)")
        if not isinstance(table, DisplacementTable):
            table = read_displacement_table(table, thickness_nm)
    if calibration is None:
        raise InputError("a calibration (voltage and camera scale from a reference) is needed")
    if int(segments) < 1:
        raise InputError(f"segments must be at least 1, got {segments}")
    for name, value in (("half_width_px", half_width_px),
                        ("instrument_sigma_px", instrument_sigma_px)):
        if value is not None and not (math.isfinite(value) and value > 0):
            raise InputError(f"{name} must be positive, got {value:g}")
    image = np.asarray(image, dtype=float)
    if detection is None:
        detection = detect_lines(image, disk=disk_px)
    from ..fit import Calibration

    calibration = Calibration.coerce(calibration)
    kv = calibration.kv
    warnings = []
    single, avg = _average_fit(crystal, zone, detection, kv, calibration, x_axis,
                               min_strength, warnings)
    start = {c: avg.parameter(c)[0] for c in STRAIN_COMPONENTS if c in avg.parameters}
    strain = [start.get(c, 0.0) for c in STRAIN_COMPONENTS]
    settings = dict(image=image, crystal=crystal, zone=avg.zone, x_axis=avg.x_axis, kv=kv,
                    wave_number=avg.wave_number, disk=detection.disk,
                    min_strength=min_strength, segments=segments,
                    min_significance=min_significance, thickness_nm=thickness_nm,
                    model=model, table=table, instrument_sigma_px=instrument_sigma_px)
    # first pass along the loci of the single-strain fit; second pass along the loci
    # of the first pass's mid-foil strain (a locus askew to its line smears the
    # column average)
    profiles, fit, det, half = _profile_pass(avg.detector, strain, start, half_width_px, True,
                                             warnings, **settings)
    v = dict(zip(fit.names, fit.values))
    strain = [v[c] for c in STRAIN_COMPONENTS]
    if max(abs(e) for e in strain) < _PLAUSIBLE_STRAIN:
        det = det.replace(center_px=(det.center_px[0] + v["center_x"],
                                     det.center_px[1] + v["center_y"]),
                          rotation_deg=det.rotation_deg + v["rotation"])
        again = {k: val for k, val in v.items() if k not in ("center_x", "center_y", "rotation")}
        pass_warnings = []
        profiles, fit, det, half = _profile_pass(det, strain, again, half, False,
                                                 pass_warnings, **settings)
        warnings = [w for w in warnings if "too weak" not in w] + pass_warnings
    strain_idx = [fit.names.index(c) for c in STRAIN_COMPONENTS]
    avg_strain = np.array([single.parameter(c)[0] if single is not None
                           and c in single.parameters else np.nan for c in STRAIN_COMPONENTS])
    avg_sigma = np.array([single.parameter(c)[1] if single is not None
                          and c in single.parameters else np.nan for c in STRAIN_COMPONENTS])
    v = dict(zip(fit.names, fit.values))
    fitted_det = det.replace(center_px=(det.center_px[0] + v["center_x"],
                                        det.center_px[1] + v["center_y"]),
                             rotation_deg=det.rotation_deg + v["rotation"])
    lo, hi = _bounds(fit.names, thickness_nm, float(np.max(np.abs(profiles.offset_px))))
    at_bound = [n for n, v, a, b in zip(fit.names, fit.values, lo, hi)
                if np.isfinite(a) and (v <= a + 1e-6 * (b - a) or v >= b - 1e-6 * (b - a))]
    if at_bound:
        warnings.append(f"{', '.join(at_bound)} ended at the edge of the allowed range: the "
                        "model hardly describes these profiles")
    if fit.dof > 0 and fit.chi2 / fit.dof > _PLAUSIBLE_CHI2_PER_DOF:
        fit.success = False
        fit.message = (f"implausible: chi-square per degree of freedom {fit.chi2 / fit.dof:.1f} "
                       f"(above {_PLAUSIBLE_CHI2_PER_DOF:g}): the {model} model does not "
                       "describe these profiles; try another --model")
    if np.max(np.abs(fit.values[strain_idx])) >= _PLAUSIBLE_STRAIN:
        fit.success = False
        fit.message = (f"implausible: a mid-foil strain component of "
                       f"{np.max(np.abs(fit.values[strain_idx])):.3g} (beyond "
                       f"{_PLAUSIBLE_STRAIN:g}); the lines were probably misassigned")
    width = _fwhm(profiles.offset_px, fit.linear[:, :1] - fit.fitted)
    width_uniform = _fwhm(profiles.offset_px, fit.linear[:, :1] - fit.uniform)
    split = _minima(fit.fitted) >= 2
    broadened = width > 1.25 * width_uniform
    if not fit.success:
        warnings.append(fit.message)
    if fit.shift_ratio > 1.0:
        warnings.append(f"the profiles' positions scatter {fit.shift_ratio:.2f} times more than "
                        "their noise allows (neighbouring lines, dynamical shifts): a random "
                        "shift per profile of that size is included in every uncertainty")
    if fit.inflated:
        warnings.append(f"chi-square {fit.chi2:.1f} for {fit.dof} degrees of freedom: "
                        "uncertainties scaled up by "
                        f"{math.sqrt(fit.chi2 / fit.dof):.2f}")
    for i, j in zip(*np.triu_indices(len(fit.names), 1)):
        if abs(fit.correlation[i, j]) > 0.95:
            warnings.append(f"{fit.names[i]} and {fit.names[j]} are correlated "
                            f"({fit.correlation[i, j]:+.3f}): poorly separated")
    result = RelaxationResult(
        structure=crystal.summary(), zone=avg.zone, x_axis=avg.x_axis, kv=float(kv),
        thickness_nm=thickness_nm, model=model, fit=fit, profiles=profiles,
        strain_mid=fit.values[strain_idx], strain_mid_sigma=fit.sigmas[strain_idx],
        strain_mid_sigma_stat=fit.sigmas_stat[strain_idx],
        average_strain=avg_strain, average_strain_sigma=avg_sigma, detector=fitted_det,
        split=split, broadened=broadened, width_px=width, uniform_width_px=width_uniform,
        table=table, warnings=warnings)
    return result


_PLAUSIBLE_STRAIN = 0.02   # beyond 2 % a single HOLZ pattern's kinematic fit is not credible
# the profiles' own scatter sets their sigmas, so a right model gives chi2/dof near 1;
# dynamical effects add a little; five times that is a wrong model (common practice)
_PLAUSIBLE_CHI2_PER_DOF = 5.0


def _profile_pass(detector, strain, start, half_width_px, scan, warnings, *, image, crystal,
                  zone, x_axis, kv, wave_number, disk, min_strength, segments,
                  min_significance, thickness_nm, model, table, instrument_sigma_px):
    """Profiles along the loci predicted for ``strain`` and ``detector``, and their fit."""
    from ..lines import predict

    pattern = predict(crystal, zone, kv, disk.radius_px / detector.scale_px_per_mrad,
                      x_axis=x_axis, min_strength=min_strength, strain=strain,
                      wave_number=wave_number)
    # every predicted line is profiled along its locus, found by the detector or not:
    # broad or split lines are often missed, and the weak ones are sorted out below
    loci = detector.to_pixels(pattern.points_mrad)
    if half_width_px is None:
        g_perp = np.linalg.norm(pattern.frame.components(
            crystal.g_vectors(pattern.hkl))[:, :2], axis=1)
        half_width_px = _default_half_width(thickness_nm, g_perp, detector.scale_px_per_mrad,
                                            instrument_sigma_px)
    profiles = measure_line_profiles(
        image, list(loci), pattern.hkl, disk.center_px, disk.radius_px,
        half_width_px=half_width_px, segments=segments, obstacles_px=list(loci))
    if len(profiles):
        flank = np.abs(profiles.offset_px) >= 0.75 * half_width_px
        depth = profiles.intensity[:, flank].mean(axis=1) - profiles.intensity.min(axis=1)
        noise = np.median(profiles.sigma, axis=1)
        strong = depth > min_significance * noise
        if np.any(~strong):
            weak = {" ".join(map(str, h)) for h in profiles.hkl[~strong].tolist()}
            warnings.append(f"{int(np.sum(~strong))} profile(s) too weak to use "
                            f"(lines {', '.join(sorted(weak))})")
        profiles = _subset(profiles, strong)
    n_lines = len({tuple(h) for h in profiles.hkl.tolist()})
    if n_lines < 3:
        raise InputError(f"only {n_lines} line(s) are strong and clear enough to profile "
                         "(at least 3 are needed): the lines are too weak, too crowded, or "
                         "the profile window (half_width_px) is too wide")
    n_free = 9 + len(PARAMETERS[model]) + (instrument_sigma_px is None)
    if len(profiles) < n_free + 1:
        raise InputError(f"only {len(profiles)} profiles from {n_lines} lines for {n_free} "
                         "parameters: too few lines are strong and clear enough; try more "
                         "segments, a narrower half_width_px or a lower min_strength")
    data = profile_data(profiles, crystal, zone, x_axis, wave_number, detector)
    fit = fit_profiles(data, thickness_nm, model, table=table, start=start,
                       instrument_sigma_px=instrument_sigma_px, scan=scan)
    return profiles, fit, detector, half_width_px


def _average_fit(crystal, zone, detection, kv, calibration, x_axis, min_strength, warnings):
    """One strain for the whole pattern, and the fit whose loci the profiles follow.

    Returns (single-strain fit or None, fit giving centre, rotation and start
    strain).  Split and broadened lines often leave a single-strain fit
    imprecise; unless its strain is good to 1e-3, the profiles start from the
    loci of the reference cell (centre and rotation fitted), which lie within
    a few pixels of lines strained by a few 1e-3.
    """
    from ..refine import refine_image

    avg = None
    try:
        avg = refine_image(crystal, zone, detection, kv=kv, calibration=calibration,
                           x_axis=x_axis, min_strength=min_strength)
        values = [avg.parameter(c) for c in STRAIN_COMPONENTS if c in avg.parameters]
        if (avg.converged and max(abs(v) for v, _ in values) < _PLAUSIBLE_STRAIN / 4
                and max(s for _, s in values) < 1e-3):
            return avg, avg
    except InputError:
        pass
    warnings.append("the single-strain fit of the detected lines is imprecise or failed; "
                    "the profiles start from the loci of the reference cell")
    return avg, refine_image(crystal, zone, detection, kv=kv, calibration=calibration,
                             x_axis=x_axis, min_strength=min_strength, model="fixed")


def relaxation_text(result):
    """Plain-text summary of a :class:`RelaxationResult`."""
    out = [f"thin-lamella profile fit: {result.structure.get('name', '')} "
           f"[{' '.join(map(str, result.zone))}], {result.kv:g} kV, t = "
           f"{result.thickness_nm:g} nm, model {result.model}"
           + (f" ({result.table.source})" if result.table is not None else "")]
    n_lines = len({tuple(h) for h in result.profiles.hkl.tolist()})
    out.append(f"profiles: {len(result.profiles)} from {n_lines} lines; split "
               f"{int(np.sum(result.split))}, broadened {int(np.sum(result.broadened))}")
    out.append("")
    out.append(f"{'strain (crystal frame)':24} {'mid-foil':>12} {'sigma':>10} "
               f"{'one-strain fit':>15} {'sigma':>10}")
    for c, v, s, a, sa in zip(STRAIN_COMPONENTS, result.strain_mid, result.strain_mid_sigma,
                              result.average_strain, result.average_strain_sigma):
        out.append(f"{c:24} {v:12.3e} {s:10.1e} {a:15.3e} {sa:10.1e}")
    out.append("")
    names, values, sigmas, units = result.parameters
    for n, v, s, u in zip(names, values, sigmas, units):
        out.append(f"{n:24} {v:12.5g} {s:10.2g} {u}")
    out.append("")
    out.append(f"chi-square {result.fit.chi2:.1f} for {result.fit.dof} degrees of freedom; "
               f"{'converged' if result.success else 'NOT converged'}: {result.fit.message}")
    if result.model == "cosh":
        out.append("the sign of (ux, uy) is not determined by the profiles (u and -u give the "
                   "same profile); reported with ux >= 0")
    for w in result.warnings:
        out.append(f"warning: {w}")
    for c in result.cautions:
        out.append(f"caution: {c}")
    return "\n".join(out)
