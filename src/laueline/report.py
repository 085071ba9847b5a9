"""Output: JSON documents with schema versions, CSV tables, readable text.

Every JSON document carries ``"schema"``, naming its kind and version
(``laueline.pattern/1`` ...); keys and meanings are fixed by the README.
Files are written atomically by :mod:`laueline.io.outputs` and never
overwritten unless the caller passes ``force=True``.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

from .errors import InputError
from .io import outputs

__all__ = [
    "PATTERN_SCHEMA",
    "PATTERN_SCHEMA_DYNAMICAL",
    "dynamical_text",
    "FIT_SCHEMA",
    "fit_document",
    "fit_text",
    "THICKNESS_SCHEMA",
    "SURVEY_SCHEMA",
    "DETECTION_SCHEMA",
    "detection_document",
    "detection_text",
    "survey_document",
    "survey_text",
    "thickness_document",
    "thickness_text",
    "thickness_fit_document",
    "thickness_fit_text",
    "FIGURE_SUFFIXES",
    "check_outputs",
    "write_json",
    "write_csv",
    "read_json",
    "pattern_document",
    "pattern_tables",
    "pattern_text",
    "format_hkl",
]

PATTERN_SCHEMA = "laueline.pattern/1"
#: A pattern document with the dynamical minima, contrast and width of its lines.
PATTERN_SCHEMA_DYNAMICAL = "laueline.pattern/2"
FIGURE_SUFFIXES = outputs.FIGURE_SUFFIXES

F_UNIT = ("angstrom; kinematic electron structure factor sum_j occ_j f_j exp(-B_j s^2) "
          "exp(2 pi i h.x_j) with neutral-atom factors of International Tables C 4.3.2.2, "
          "non-relativistic (multiply by gamma for the fast electron)")


def format_hkl(hkl):
    """Miller indices as signed integers with spaces: (2, -3, 10) -> '2 -3 10', (1, 1, 1) -> '1 1 1'.

    One format for every text output (figures draw bars instead of minus signs).
    """
    from .results import format_indices

    return format_indices(hkl)


# Files are written by laueline.io.outputs (atomic, exclusive without force);
# these names stay here for callers of the report module.
check_outputs = outputs.check_outputs
write_json = outputs.write_json
write_csv = outputs.write_csv
json_text = outputs.json_text
_clean = outputs.json_ready


def read_json(path, schema_prefix):
    """Read a laueline JSON document and check its schema kind."""
    path = Path(path)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror}") from None
    except UnicodeDecodeError:
        raise InputError(f"{path} is not UTF-8 text (expected a laueline JSON document)") \
            from None
    except RecursionError:
        raise InputError(f"{path}: JSON nested too deeply") from None
    except json.JSONDecodeError as exc:
        raise InputError(f"{path} is not JSON ({exc.msg}, line {exc.lineno})") from None
    schema = doc.get("schema") if isinstance(doc, dict) else None
    if not isinstance(schema, str) or not schema.startswith(schema_prefix + "/"):
        raise InputError(f"{path} has schema {schema!r}; expected {schema_prefix}/<version>")
    return doc


# ---------------------------------------------------------------------------
# pattern
# ---------------------------------------------------------------------------

def pattern_document(pattern, dynamical=None):
    """The ``laueline.pattern/1`` document of a :class:`~laueline.lines.Pattern`.

    Built from plain Python values (arrays converted once with ``tolist``),
    so it is ready for :func:`json_text` without another pass.  With
    ``dynamical`` (a :class:`laueline.dynamical.DynamicalLines`) the document
    is ``laueline.pattern/2``: every line gains ``dynamical`` (the deficit
    minima in mrad, depth, width and the shifts from the kinematic locus) and
    the top level gains ``dynamical`` (thickness, absorption ratio, beam
    count, convergence).  Version 1 keys are unchanged.
    """
    keys = ("hkl", "laue_zone", "g_inv_A", "f_abs", "strength", "normal", "offset_mrad",
            "points_mrad")
    columns = [getattr(pattern, k).tolist() for k in keys]
    lines = [dict(zip(keys, row)) for row in zip(*columns)]
    if dynamical is not None:
        for i, line in enumerate(lines):
            found = np.isfinite(dynamical.shift_mrad[i])
            line["dynamical"] = _clean({
                "minima_mrad": dynamical.minima_mrad[i][found],
                "contrast": dynamical.contrast[i], "width_mrad": dynamical.width_mrad[i],
                "shift_mrad": dynamical.shift_mrad[i][found],
                "normals": dynamical.normal_points[i][found],
                "contrast_points": dynamical.contrast_points[i][found],
                "width_points_mrad": dynamical.width_points_mrad[i][found],
            })
    crossings = [{"lines": ab, "xy_mrad": xy, "angle_deg": angle}
                 for ab, xy, angle in zip(pattern.crossing_lines.tolist(),
                                          pattern.crossing_mrad.tolist(),
                                          pattern.crossing_angle_deg.tolist())]
    frame = pattern.frame
    rotation = np.asarray(frame.rotation, dtype=float).tolist()
    doc = {
        "schema": PATTERN_SCHEMA,
        "structure": _clean(pattern.crystal.summary()),
        "beam": {"kv": float(pattern.beam.kv), "wavelength_A": float(pattern.beam.wavelength_A),
                 "disk_mrad": float(pattern.disk_mrad),
                 "inner_potential_V": _clean(pattern.beam.inner_potential_V),
                 "wave_number_inv_A": float(pattern.beam.wave_number)},
        "zone": [int(v) for v in frame.zone],
        "x_axis": [int(v) for v in frame.x_axis],
        "x_axis_chosen": bool(frame.x_axis_chosen),
        "frame_cartesian": {"x": rotation[0], "y": rotation[1], "beam_direction": rotation[2]},
        "strain": None if pattern.strain is None else np.asarray(pattern.strain).tolist(),
        "gmax_inv_A": float(pattern.gmax),
        "f_unit": F_UNIT,
        "lines": lines,
        "crossings": crossings,
        "rings": [{"laue_zone": n, "radius_mrad": r}
                  for n, r in zip(np.asarray(pattern.ring_layers).tolist(),
                                  np.asarray(pattern.ring_radius_mrad).tolist())],
        "max_convergence_mrad": _clean(pattern.max_convergence_mrad),
        "overlap_hkl": [int(v) for v in pattern.overlap_hkl],
        "warnings": list(pattern.warnings) + (list(dynamical.warnings) if dynamical else []),
    }
    if dynamical is not None:
        doc["schema"] = PATTERN_SCHEMA_DYNAMICAL
        doc["dynamical"] = _clean(dict(dynamical.summary(), shift_sign=(
            "shift_mrad is the distance of each minimum from the exact kinematic locus along "
            "the unit normal given beside it (the side the reflection's g points to)"),
            caution=DYNAMICAL_CAUTION))
    return doc


def pattern_tables(pattern):
    """Line table and crossing table as (header, rows) pairs for CSV."""
    line_header = ["index", "h", "k", "l", "laue_zone", "g_inv_A", "f_abs_A", "strength",
                   "normal_x", "normal_y", "offset_mrad"]
    line_rows = [[i, *pattern.hkl[i], pattern.laue_zone[i], pattern.g_inv_A[i],
                  pattern.f_abs[i], pattern.strength[i], *pattern.normal[i],
                  pattern.offset_mrad[i]] for i in range(pattern.n_lines)]
    cross_header = ["line_a", "line_b", "h1", "k1", "l1", "h2", "k2", "l2",
                    "x_mrad", "y_mrad", "angle_deg"]
    cross_rows = []
    for k in range(pattern.n_crossings):
        a, b = pattern.crossing_lines[k]
        cross_rows.append([a, b, *pattern.hkl[a], *pattern.hkl[b],
                           *pattern.crossing_mrad[k], pattern.crossing_angle_deg[k]])
    return (line_header, line_rows), (cross_header, cross_rows)


def pattern_text(pattern, n_strongest=12):
    """Short readable summary of a predicted pattern."""
    cr = pattern.crystal
    cell = cr.cell
    beam = pattern.beam
    frame = pattern.frame
    out = []
    out.append(f"structure  {cr.name} ({cr.formula}), {cr.space_group_symbol} "
               f"(No. {cr.space_group_number}), a b c = {cell[0]:.5f} {cell[1]:.5f} "
               f"{cell[2]:.5f} A, angles {cell[3]:.3f} {cell[4]:.3f} {cell[5]:.3f} deg")
    if pattern.strain is not None:
        e = pattern.strain
        out.append("strain     exx eyy ezz eyz exz exy = " + " ".join(
            f"{v:.3e}" for v in (e[0, 0], e[1, 1], e[2, 2], e[1, 2], e[0, 2], e[0, 1])))
    line = (f"beam       {beam.kv:g} kV, wavelength {beam.wavelength_A:.6f} A, "
            f"K = {beam.wave_number:.4f} 1/A")
    if beam.inner_potential_V is not None:
        line += f" (inside the crystal, mean inner potential {beam.inner_potential_V:.2f} V)"
    out.append(line)
    how = "chosen: shortest visible zero-layer reflection" if frame.x_axis_chosen else "given"
    out.append(f"zone       [{format_hkl(frame.zone)}], x along ({format_hkl(frame.x_axis)}) "
               f"({how}), y = B cross x")
    out.append(f"disk       {pattern.disk_mrad:g} mrad semi-angle; zero-layer disks "
               f"overlap above {pattern.max_convergence_mrad:.2f} mrad "
               f"({format_hkl(pattern.overlap_hkl)})")
    if len(pattern.ring_layers):
        out.append("rings      " + ", ".join(
            f"n={n}: {r:.2f} mrad" for n, r in zip(pattern.ring_layers, pattern.ring_radius_mrad)))
    n_holz = int(np.sum(pattern.laue_zone >= 1))
    out.append(f"lines      {pattern.n_lines} ({n_holz} HOLZ, {pattern.n_lines - n_holz} "
               f"zero-layer) within gmax {pattern.gmax:g} 1/A; "
               f"{pattern.n_crossings} crossings")
    holz = np.flatnonzero(pattern.laue_zone >= 1)
    if len(holz):
        out.append("")
        out.append("  strongest HOLZ lines   n    |g| 1/A    |F| A   strength  offset mrad")
        for i in holz[np.argsort(-pattern.strength[holz], kind="stable")[:n_strongest]]:
            out.append(f"  {format_hkl(pattern.hkl[i]):>19} {pattern.laue_zone[i]:4d} "
                       f"{pattern.g_inv_A[i]:10.4f} {pattern.f_abs[i]:8.4f} "
                       f"{pattern.strength[i]:9.3f} {pattern.offset_mrad[i]:11.4f}")
    zolz = np.flatnonzero(pattern.laue_zone == 0)
    if len(zolz):
        out.append("")
        out.append(f"  zero-layer lines (strength up to {pattern.strength[zolz].max():.3g} on "
                   "the HOLZ scale): " + ", ".join(format_hkl(h) for h in pattern.hkl[zolz][:12])
                   + (" ..." if len(zolz) > 12 else ""))
    if pattern.warnings:
        out.append("")
        out.extend(f"note: {w}" for w in pattern.warnings)
    return "\n".join(out)


DYNAMICAL_CAUTION = (
    "Dynamical minima come from a Bloch-wave model with a proportional absorptive "
    "potential: they depend on the thickness and on the absorption ratio (halving or "
    "doubling it moves weak lines by up to about 0.01 mrad), and the foil is taken as "
    "perfect and flat.")


def dynamical_text(pattern, dynamical, n_strongest=12):
    """Readable summary of the dynamical minima of a pattern's lines."""
    d = dynamical
    conv = ("not checked" if d.convergence_mrad is None
            else f"minima move by at most {d.convergence_mrad:.4f} mrad with more beams")
    out = ["", f"dynamical  Bloch waves, {d.thickness_nm:g} nm, absorption ratio "
               f"{d.absorption_ratio:g}; up to {d.n_beams} exact beams ({d.n_zolz} zero-layer, "
               f"weaker ones through Bethe potentials); {conv}",
           "",
           "  HOLZ line (strongest)  points  shift mrad (mean, range)   depth   width mrad"]
    holz = np.flatnonzero(pattern.laue_zone >= 1)
    for i in holz[np.argsort(-pattern.strength[holz], kind="stable")[:n_strongest]]:
        shift = d.shift_mrad[i][np.isfinite(d.shift_mrad[i])]
        if not len(shift):
            out.append(f"  {format_hkl(pattern.hkl[i]):>21} {0:7d}  no minimum found")
            continue
        out.append(f"  {format_hkl(pattern.hkl[i]):>21} {len(shift):7d}  {shift.mean():+.4f} "
                   f"({shift.min():+.4f} .. {shift.max():+.4f})  {d.contrast[i]:6.3f} "
                   f"{d.width_mrad[i]:9.3f}")
    out.append("")
    out.append("note: " + DYNAMICAL_CAUTION)
    out.extend(f"note: {w}" for w in d.warnings)
    return "\n".join(out)


# ---------------------------------------------------------------------------
# fit
# ---------------------------------------------------------------------------

FIT_SCHEMA = "laueline.fit/2"


def _point_dict(row, frame):
    xy = frame.to_user([row.x_px, row.y_px])
    res = frame.to_user(row.residual_px)
    return {"x_px": xy[0], "y_px": xy[1], "hkl_a": row.hkl_a, "hkl_b": row.hkl_b,
            "residual_px": res, "used": row.used, "note": row.note}


def _pattern_dict(pat):
    frame = pat.pixel_frame
    det = pat.detector.as_dict()
    det["center_px"] = frame.to_user(pat.detector.center_px)
    det["y_up"] = frame.y_up
    det["sigma"] = pat.detector_sigma
    lines = None
    if pat.lines is not None:
        lines = [ln.to_dict() for ln in pat.lines]
    return {
        "zone": list(pat.zone), "x_axis": list(pat.x_axis),
        "tilt_deg": None if pat.tilt_deg is None else list(pat.tilt_deg),
        "kv": pat.kv, "kv_sigma": pat.kv_sigma, "wave_number_inv_A": pat.wave_number,
        "disk_mrad": pat.disk_mrad, "detector": det,
        "observations": pat.observations, "source": pat.source,
        "calibration": None if pat.calibration is None else pat.calibration.source or None,
        "rms_px": pat.rms_px, "n_points": pat.n_points, "n_used": pat.n_used,
        "points": [_point_dict(r, frame) for r in pat.points], "lines": lines,
        "line_residuals": [r.to_dict() for r in pat.line_table],
        "excluded_lines": [list(h) for h in pat.excluded],
        "image_shape": None if pat.image_shape is None else list(pat.image_shape),
    }


def fit_document(result, *, calibration_source=None, points_source=None):
    """The ``laueline.fit/2`` document of a :class:`~laueline.fit.FitResult`.

    Point coordinates, residuals and detector centres are given back in each
    pattern's own pixel convention (its ``y_up`` flag).  The top level
    repeats the first pattern's zone, detector, voltage and tables when the
    fit has one pattern (the keys of version 1), so that a reference fit
    serves directly as a calibration.  ``calibration_source`` and
    ``points_source`` name the files of a one-pattern fit.
    """
    from .fit import CAUTIONS, PARAMETER_UNITS
    from .fit.result import SYSTEMATIC_NOTE

    st = result.strain
    patterns = [_pattern_dict(p) for p in result.patterns]
    if calibration_source is not None:
        patterns[0]["calibration"] = str(calibration_source)
    if points_source is not None:
        patterns[0]["source"] = str(points_source)
    units = []
    for name in result.parameters:
        base = name.split("[")[0]
        units.append(PARAMETER_UNITS.get(base, ""))
    doc = {
        "schema": FIT_SCHEMA,
        "success": result.success, "message": result.message,
        "plausible": result.plausible,
        "model": result.model,
        "unique_axis": result.unique_axis,
        "structure": result.structure,
        "reference_cell": result.reference_cell, "cell": result.cell,
        "cell_sigma": result.cell_sigma,
        "inner_potential": result.inner_potential,
        "strain": {"frame": "reference-cartesian",
                   "green_lagrange": st.green_lagrange,
                   "green_lagrange_sigma": st.green_lagrange_sigma,
                   "voigt": result.strain_voigt,
                   "small": st.small, "small_sigma": st.small_sigma,
                   "principal": st.principal, "principal_sigma": st.principal_sigma,
                   "principal_directions": st.principal_directions.T,
                   "volumetric": st.volumetric, "volumetric_sigma": st.volumetric_sigma,
                   "covariance_voigt": result.strain_covariance,
                   "covariance_voigt_statistical": result.strain_covariance_statistical,
                   "covariance_voigt_systematic": result.strain_covariance_systematic,
                   "systematic_note": SYSTEMATIC_NOTE,
                   "fixed_components": result.fixed_components,
                   "poorly_separated": [{"components": [a, b], "correlation": c,
                                         "frame": f}
                                        for a, b, c, f in result.poorly_separated]},
        "stress_GPa": st.stress_GPa, "stress_sigma_GPa": st.stress_sigma_GPa,
        "stress_law": ("Hooke's law on the Green-Lagrange strain (second Piola-Kirchhoff "
                       "stress; Cauchy stress to first order)"),
        "constraints": result.constraints,
        "parameters": result.parameters,
        "values": result.values, "sigmas": result.sigmas,
        "units": units,
        "correlation": result.correlation,
        "condition_number": result.condition_number,
        "line_sigma_px": (result.line_sigma.to_dict() if result.line_sigma is not None
                          else None),
        "chi2": result.chi2, "dof": result.dof, "converged": result.success,
        "rms_px": result.rms_px, "n_points": result.n_points, "n_used": result.n_used,
        "patterns": patterns,
        "checks": [c.to_dict() for c in result.checks],
        "warnings": result.warnings,
        "cautions": list(CAUTIONS),
    }
    if len(patterns) == 1:
        one = patterns[0]
        doc.update({k: one[k] for k in ("zone", "x_axis", "kv", "kv_sigma", "disk_mrad",
                                        "detector", "points", "lines", "observations",
                                        "image_shape")})
        doc["wave_number_inv_A"] = one["wave_number_inv_A"]
        doc["calibration"] = one["calibration"]
        doc["points_file"] = one["source"] or None
    if st.sample_axes is not None:
        doc["strain_sample"] = {
            "axes_cartesian": st.sample_axes,
            "green_lagrange": st.sample_green_lagrange,
            "green_lagrange_sigma": st.sample_green_lagrange_sigma,
            "stress_GPa": st.sample_stress_GPa, "stress_sigma_GPa": st.sample_stress_sigma_GPa,
        }
    return _clean(doc)


_COMPONENTS = [("xx", 0, 0), ("yy", 1, 1), ("zz", 2, 2), ("yz", 1, 2), ("xz", 0, 2), ("xy", 0, 1)]


def _tensor_rows(label, tensor, sigma, scale=1.0, unit="", fixed=(), fixed_why="fixed"):
    out = []
    sig_values = [sigma[i, j] for _, i, j in _COMPONENTS]
    positive = [s for s in sig_values if s > 0]
    floor = min(positive) if positive else 0.0
    for (name, i, j), s in zip(_COMPONENTS, sig_values):
        if s == 0 or "e" + name in fixed:
            out.append(f"  {label}{name} {tensor[i, j] * scale:+12.3e}   {fixed_why}")
            continue
        note = ""
        if floor > 0 and s > 10 * floor:
            note = "  poorly determined by these patterns"
        out.append(f"  {label}{name} {tensor[i, j] * scale:+12.3e} +- {s * scale:9.2e} "
                   f"{unit}{note}")
    return out


def _hkl_text(hkl, hexagonal):
    from .fit.indices import format_plane

    return format_plane(hkl, hexagonal)


def fit_text(result):
    """Readable report of a fit: parameters, cell, strain, stress, line table, warnings."""
    from .fit import PARAMETER_UNITS
    from .fit.indices import format_direction

    out = []
    status = ""
    if not result.success:
        status = "   NOT CONVERGED" if any(c.name == "converged" and not c.passed
                                           for c in result.checks) else "   IMPLAUSIBLE"
    hexagonal = result.patterns[0].hexagonal
    zones = "; ".join(f"[{format_direction(p.zone, hexagonal)}]" for p in result.patterns)
    kinds = {p.observations for p in result.patterns}
    kind = "points" if kinds == {"crossings"} else "detected lines" if kinds == {"lines"} \
        else "observations"
    out.append(f"fit        {result.structure['name']} {zones}, model {result.model}"
               + (f" (unique axis {result.unique_axis})" if result.unique_axis else "")
               + f": {result.n_used} of {result.n_points} {kind} used, "
               f"rms {result.rms_px:.3g} px, {result.dof} degrees of freedom{status}")
    if not result.success:
        out.append(f"  {result.message}")
    out.append("")
    out.append(f"  {'parameter':12} {'value':>16} {'sigma':>11}  unit")
    for name, value, sigma in zip(result.parameters, result.values, result.sigmas):
        base = name.split("[")[0]
        if base == "center_y":
            j = int(name[name.index("[") + 1:-1]) - 1 if "[" in name else 0
            if result.patterns[j].pixel_frame.y_up:
                value = -value
        fmt = ".4e" if base.startswith("e") or base.startswith("mode") else ".5f"
        out.append(f"  {name:12} {value:16{fmt}} {sigma:11.2e}  {PARAMETER_UNITS.get(base, '')}")
    for p in result.patterns:
        det = p.detector
        tag = f"pattern {p.index + 1} [{format_direction(p.zone, hexagonal)}]: " \
            if len(result.patterns) > 1 else ""
        held = []
        if p.kv_sigma is None:
            held.append(f"kv {p.kv:.4f} kV")
        if p.detector_sigma["scale_px_per_mrad"] is None:
            held.append(f"scale {det.scale_px_per_mrad:.5f} px/mrad")
        if p.detector_sigma["rotation_deg"] is None:
            held.append(f"rotation {det.rotation_deg:.4f} deg")
        if any(det.distortion) and p.detector_sigma["distortion"] is None:
            held.append("distortion " + ", ".join(f"{v:+.2e}" for v in det.distortion))
        line = f"  {tag}mirror {'yes' if det.mirror else 'no'}"
        if held:
            line += "; held: " + ", ".join(held)
        if p.tilt_deg is not None:
            line += f"; tilts {p.tilt_deg[0]:g}, {p.tilt_deg[1]:g} deg"
        if len(result.patterns) > 1:
            line += f"; rms {p.rms_px:.3g} px, {p.n_used} of {p.n_points} used"
        out.append(line)
    out.append(f"  condition number {result.condition_number:.3g}")
    out.append("")
    names = ["a", "b", "c", "alpha", "beta", "gamma"]
    out.append("  cell       " + "  ".join(
        f"{n} {v:.6f}" + (f" +- {s:.1e}" if s > 0 else "")
        for n, v, s in zip(names, result.cell, result.cell_sigma)))
    out.append("  reference  " + "  ".join(f"{n} {v:.6f}"
                                           for n, v in zip(names, result.reference_cell)))
    st = result.strain
    if result.constraints:
        out.append("")
        out.append("  constraints (exact)")
        out.extend(f"    {c}" for c in result.constraints)
    out.append("")
    if result.model == "fixed":
        out.append("  strain     held at zero (model fixed: the reference cell)")
        return _fit_tail(out, result)
    why = "fixed by the constraints" if result.constraints else "fixed by the model"
    out.append("  strain (Green-Lagrange, reference Cartesian frame)")
    out += _tensor_rows("e", st.green_lagrange, st.green_lagrange_sigma,
                        fixed=result.fixed_components.get("crystal", ()), fixed_why=why)
    out.append("  principal  " + "  ".join(f"{v:+.3e} +- {s:.1e}"
                                           for v, s in zip(st.principal, st.principal_sigma)))
    out.append(f"  volume change {st.volumetric:+.3e} +- {st.volumetric_sigma:.1e}")
    free = [i for i in range(6) if result.strain_covariance[i, i] > 0]
    if len(free) > 1:
        s = np.sqrt(np.diag(result.strain_covariance))
        corr = result.strain_covariance / np.outer(np.where(s > 0, s, 1), np.where(s > 0, s, 1))
        comp = ("exx", "eyy", "ezz", "eyz", "exz", "exy")
        out.append("  correlations of the strain (crystal frame)")
        out.append("        " + " ".join(f"{comp[i]:>7}" for i in free))
        for i in free:
            out.append(f"    {comp[i]} " + " ".join(f"{corr[i, j]:+7.3f}" for j in free))
    if st.sample_axes is not None:
        out.append("")
        out.append("  strain in the sample frame (x', y', z')")
        out += _tensor_rows("e", st.sample_green_lagrange, st.sample_green_lagrange_sigma,
                            fixed=result.fixed_components.get("sample", ()), fixed_why=why)
    if st.stress_GPa is not None:
        out.append("")
        out.append("  stress (Hooke's law on the Green-Lagrange strain, reference Cartesian "
                   "frame)")
        out += _tensor_rows("s", st.stress_GPa, st.stress_sigma_GPa, 1.0, "GPa", fixed_why=why)
        if st.sample_stress_GPa is not None:
            out.append("  stress in the sample frame")
            out += _tensor_rows("s", st.sample_stress_GPa, st.sample_stress_sigma_GPa, 1.0,
                                "GPa", fixed_why=why)
    if result.poorly_separated:
        out.append("")
        out.append("  not separated by these data: " + "; ".join(
            f"{a} and {b} ({c:+.3f}, {f} frame)" for a, b, c, f in result.poorly_separated))
    return _fit_tail(out, result)


def _fit_tail(out, result):
    from .fit import CAUTIONS

    for p in result.patterns:
        frame = p.pixel_frame
        hexagonal = p.hexagonal
        tag = f" of pattern {p.index + 1}" if len(result.patterns) > 1 else ""
        if p.line_table:
            out.append("")
            out.append(f"  residuals by line{tag} (px; normalised by the observations' sigma)")
            out.append(f"    {'line':>14} {'n':>4} {'mean':>8} {'rms':>8} {'norm.':>7}")
            for r in p.line_table:
                out.append(f"    {_hkl_text(r.hkl, hexagonal):>14} {r.n:4d} {r.mean_px:+8.3f} "
                           f"{r.rms_px:8.3f} {r.normalised_rms:7.2f}")
        if p.excluded:
            out.append("    excluded lines: " + ", ".join(
                f"({_hkl_text(h, hexagonal)})" for h in p.excluded))
        if p.assigned and p.lines is None:
            out.append("")
            out.append(f"  assignments{tag} (points without labels, matched to predicted "
                       "crossings)")
            out.append("       #      x px      y px         line a         line b   residual px")
            for i, row in enumerate(p.points):
                if not row.used:
                    continue
                x, y = frame.to_user([row.x_px, row.y_px])
                dx, dy = row.residual_px
                out.append(f"    {i + 1:4d} {x:9.2f} {y:9.2f}   "
                           f"{_hkl_text(row.hkl_a, hexagonal):>12}   "
                           f"{_hkl_text(row.hkl_b, hexagonal):>12}"
                           f"   {math.hypot(dx, dy):11.3f}"
                           + (f"   {row.note}" if row.note else ""))
        if p.lines is not None:
            unused = [ln for ln in p.lines if not ln.used]
            out.append("")
            out.append(f"  lines fitted{tag}: {sum(ln.used for ln in p.lines)} of "
                       f"{len(p.lines)} detected")
            for ln in unused:
                out.append(f"    line #{ln.index} left out: {ln.note or 'not assigned'}")
        left = [i for i, row in enumerate(p.points) if not row.used]
        if left:
            out.append("")
            out.append(f"  points left out{tag}")
            for i in left:
                row = p.points[i]
                x, y = frame.to_user([row.x_px, row.y_px])
                out.append(f"    #{i + 1} ({x:.1f}, {y:.1f}) px: {row.note}")
    failed = [c for c in result.checks if not c.passed]
    if failed:
        out.append("")
        out.extend(f"check failed: {c.name}" + (f" ({c.value:.3g}, limit {c.limit:.3g})"
                                                 if c.value is not None else "")
                   + (f": {c.detail}" if c.detail else "") for c in failed)
    line = result.line_sigma
    if line is not None:
        out.append("")
        point = (f", point sigma {line.point_sigma_px:.3g} px estimated from the scatter "
                 "within lines" if line.point_sigma_px is not None else "")
        out.append(f"line sigma {line.value:.3g} px ({line.source}): an offset shared by all "
                   f"observations of a line{point}")
    if result.warnings:
        out.append("")
        out.extend(f"warning: {w}" for w in result.warnings)
    out.append("")
    if np.any(result.strain_covariance_systematic):
        out.append("note: strain sigmas are totals: statistical (point noise and per-line "
                   "errors) plus the systematic covariance given")
    else:
        out.append("note: strain sigmas are statistical (point noise and per-line errors); no "
                   "systematic part (dynamical line shifts) was given, so none is included")
    out.extend(f"caution: {c}" for c in CAUTIONS)
    return "\n".join(out)


# ---------------------------------------------------------------------------
# thickness
# ---------------------------------------------------------------------------

THICKNESS_SCHEMA = "laueline.thickness/1"
THICKNESS_FIT_SCHEMA = "laueline.thickness/2"


def thickness_document(result, structure=None):
    """The ``laueline.thickness/1`` document of a :class:`~laueline.thickness.ThicknessResult`."""
    doc = {
        "schema": THICKNESS_SCHEMA,
        "structure": structure,
        "hkl": list(result.hkl) if result.hkl else None,
        "d_spacing_A": result.d_spacing_A,
        "kv": result.kv, "wavelength_A": result.wavelength_A,
        "bragg_angle_mrad": result.bragg_angle_mrad,
        "thickness_nm": result.thickness_nm, "thickness_sigma_nm": result.thickness_sigma_nm,
        "extinction_distance_nm": result.extinction_distance_nm,
        "extinction_distance_sigma_nm": result.extinction_distance_sigma_nm,
        "first_fringe_index": result.first_fringe_index,
        "kinematic_extinction_distance_nm": result.kinematic_extinction_distance_nm,
        "candidates": [{"first_fringe_index": c.first_fringe_index, "residual": c.residual,
                        "thickness_nm": c.thickness_nm,
                        "extinction_distance_nm": c.extinction_distance_nm,
                        "physical": c.physical} for c in result.candidates],
        "separation": result.separation,
        "fringes": result.fringes,
        "fringe_indices": result.fringe_indices,
        "deviations_inv_nm": result.deviations_inv_nm,
        "deviations_sigma_inv_nm": result.deviations_sigma_inv_nm,
        "line": {"x_inv_n2": result.line_x, "y_s_over_n_squared_inv_nm2": result.line_y,
                 "intercept_inv_nm2": result.intercept, "slope_inv_nm2": result.slope},
        "profile": None,
        "warnings": result.warnings,
    }
    det = result.profile
    if det is not None:
        doc["profile"] = {"disk_edges": det.disk_edges, "disk_centres": det.disk_centres,
                          "disk_centre_sigma": det.disk_centre_sigma,
                          "bragg_position": det.bragg_position,
                          "minima": det.minima, "minima_sigma": det.minima_sigma,
                          "fringes_sigma": det.fringes_sigma,
                          "separation_sigma": det.separation_sigma}
    return _clean(doc)


def thickness_fit_document(result, structure=None):
    """The ``laueline.thickness/2`` document of a :class:`~laueline.thickness.ProfileFitResult`.

    ``thickness_nm`` and ``thickness_sigma_nm`` hold the many-beam profile
    fit; ``kelly_allen`` the two-beam construction on the same profile (a
    ``laueline.thickness/1`` document without its schema key, or null when
    the profile shows too few fringes); ``dynamical`` the fit's details.
    """
    ka = None
    if result.kelly_allen is not None:
        ka = thickness_document(result.kelly_allen, structure)
        del ka["schema"], ka["structure"]
    det = result.detection
    return _clean({
        "schema": THICKNESS_FIT_SCHEMA,
        "success": result.success,
        "failure": result.failure,
        "structure": structure,
        "hkl": list(result.hkl),
        "kv": result.kv,
        "thickness_nm": result.thickness_nm,
        "thickness_sigma_nm": result.thickness_sigma_nm,
        "thickness_statistical_sigma_nm": result.thickness_statistical_sigma_nm,
        "thickness_model_sigma_nm": result.thickness_model_sigma_nm,
        "method": "systematic-row Bloch-wave intensities fitted to the profile through both "
                  "disks",
        "dynamical": {
            "n_beams": result.n_beams, "absorption_ratio": result.absorption_ratio,
            "absorption_fitted": result.absorption_fitted,
            "model_variants": result.model_variants,
            "scale_per_mrad": result.scale_px_per_mrad,
            "scale_sigma_per_mrad": result.scale_sigma_px_per_mrad,
            "bragg_position": result.bragg_position,
            "bragg_position_sigma": result.bragg_position_sigma,
            "separation": result.separation,
            "blur_sigma": result.blur_px,
            "background": result.background, "diffuse": result.diffuse,
            "amplitude": result.amplitude,
            "potential_scale": result.potential_scale,
            "potential_scale_sigma": result.potential_scale_sigma,
            "reduced_chi2": result.reduced_chi2, "n_samples": result.n_samples,
        },
        "profile": None if det is None else {
            "disk_edges": det.disk_edges, "disk_centres": det.disk_centres,
            "disk_centre_sigma": det.disk_centre_sigma, "separation": det.separation,
            "separation_sigma": det.separation_sigma},
        "kelly_allen": ka,
        "warnings": result.warnings,
    })


def thickness_fit_text(result):
    """Readable summary of a many-beam profile fit, with the Kelly-Allen result beside it."""
    how = "fitted" if result.absorption_fitted else "held"
    out = [f"reflection ({format_hkl(result.hkl)}), {result.kv:g} kV; systematic row of "
           f"{result.n_beams} beams, absorption ratio {result.absorption_ratio:.3g} ({how})",
           f"profile    {result.n_samples} samples, reduced chi-square "
           f"{result.reduced_chi2:.2f}",
           "",
           f"  thickness (many-beam fit)  {result.thickness_nm:9.2f} +- "
           f"{result.thickness_sigma_nm:.2g} nm",
           f"      statistical            {result.thickness_statistical_sigma_nm:9.2g} nm",
           f"      model                  {result.thickness_model_sigma_nm:9.2g} nm"]
    for v in result.model_variants:
        out.append(f"        {v['variant']:<24s} {v['thickness_nm']:9.2f} nm   (reduced "
                   f"chi-square {v['reduced_chi2']:.2f})")
    ka = result.kelly_allen
    if ka is not None:
        out.append(f"  Kelly-Allen (two-beam)     {ka.thickness_nm:9.2f} +- "
                   f"{ka.thickness_sigma_nm:.2g} nm, first fringe index "
                   f"{ka.first_fringe_index}, {len(ka.fringes)} fringes")
    else:
        out.append("  Kelly-Allen (two-beam)     not available (too few fringes)")
    out.append(f"  scale {result.scale_px_per_mrad:.4g} per mrad, Bragg line at "
               f"{result.bragg_position:.4g} (direct disk), blur {result.blur_px:.3g}")
    if result.warnings:
        out.append("")
        out.extend(f"warning: {w}" for w in result.warnings)
    out.append("")
    out.append("caution: the fit includes the systematic row only; beams off the row "
               "(a two-beam condition set close to a zone axis) are not modelled")
    return "\n".join(out)


def thickness_text(result):
    """Readable summary of a thickness measurement."""
    out = []
    refl = f"({format_hkl(result.hkl)}), " if result.hkl else ""
    out.append(f"reflection {refl}d = {result.d_spacing_A:.5f} A; {result.kv:g} kV, "
               f"wavelength {result.wavelength_A:.6f} A, Bragg angle "
               f"{result.bragg_angle_mrad:.3f} mrad")
    out.append(f"fringes    {len(result.fringes)}, separation {result.separation:.4g}; "
               f"first fringe index {result.first_fringe_index}")
    out.append("")
    out.append(f"  thickness            {result.thickness_nm:9.2f} +- "
               f"{result.thickness_sigma_nm:.2g} nm")
    out.append(f"  extinction distance  {result.extinction_distance_nm:9.2f} +- "
               f"{result.extinction_distance_sigma_nm:.2g} nm")
    if result.kinematic_extinction_distance_nm is not None:
        out.append(f"  kinematic two-beam extinction distance "
                   f"{result.kinematic_extinction_distance_nm:.2f} nm")
    out.append("")
    out.append("  first index   1 - R^2     thickness nm   extinction nm   physical")
    for c in result.candidates:
        mark = "  <- chosen" if c.first_fringe_index == result.first_fringe_index else ""
        out.append(f"  {c.first_fringe_index:11d}   {c.residual:9.2e}   {c.thickness_nm:12.2f}"
                   f"   {c.extinction_distance_nm:13.2f}   {'yes' if c.physical else 'no':>8}"
                   f"{mark}")
    if result.warnings:
        out.append("")
        out.extend(f"warning: {w}" for w in result.warnings)
    return "\n".join(out)


# ---------------------------------------------------------------------------
# survey
# ---------------------------------------------------------------------------

SURVEY_SCHEMA = "laueline.survey/2"


def survey_document(result):
    """The ``laueline.survey/2`` document of a :class:`~laueline.survey.SurveyResult`.

    ``sigma_strain`` is the predicted total 1-sigma under the per-line error
    model; each axis carries ``member`` (the symmetry-equivalent axis shown),
    ``n_visible_lines`` and the ``thickness_nm``, ``disk_mrad`` and
    ``gmax_inv_A`` its figures are for.
    """
    return _clean({
        "schema": SURVEY_SCHEMA,
        "structure": result.structure,
        "kv": result.kv, "disk_mrad": result.disk_mrad, "sigma_mrad": result.sigma_mrad,
        "line_sigma_mrad": result.line_sigma_mrad, "thickness_nm": result.thickness_nm,
        "min_contrast": result.min_contrast, "contrast_model": result.contrast_model,
        "frame": result.frame,
        "sample_axes": None if result.sample_axes is None else result.sample_axes,
        "ranked_by": result.ranked_by,
        "point_group": result.point_group,
        "near": list(result.near) if result.near else None,
        "max_tilt_deg": result.max_tilt_deg,
        "axes": [{"zone": list(a.zone), "member": list(a.member), "n_members": a.n_members,
                  "x_axis": list(a.x_axis), "tilt_deg": a.tilt_deg,
                  "n_lines": a.n_lines, "n_visible_lines": a.n_visible_lines,
                  "n_crossings": a.n_crossings, "thickness_nm": a.thickness_nm,
                  "disk_mrad": a.disk_mrad, "gmax_inv_A": a.gmax,
                  "ring_radius_mrad": a.ring_radius_mrad,
                  "max_convergence_mrad": a.max_convergence_mrad, "overlap": a.overlap,
                  "sigma_strain": a.sigma_strain, "score": a.score} for a in result.axes],
        "warnings": result.warnings,
    })


def survey_text(result, top=15):
    """The best ``top`` axes as a table."""
    out = [f"survey     {result.structure['name']}, {result.kv:g} kV, disk "
           f"{result.disk_mrad:g} mrad, {len(result.axes)} candidate axes"
           + (f" within {result.max_tilt_deg:g} deg of [{' '.join(f'{v:g}' for v in result.near)}]"
              if result.near else f" (one per orbit of the Laue group {result.point_group})"),
           f"lines      seen when their {result.contrast_model} dip at "
           f"{result.thickness_nm:g} nm thickness is at least {result.min_contrast:g} "
           "(--thickness-nm, --min-contrast)",
           f"errors     crossing noise {result.sigma_mrad:g} mrad per coordinate, line offset "
           f"{result.line_sigma_mrad:g} mrad shared by the crossings of a line",
           f"ranked by  predicted total 1-sigma of {result.ranked_by} ({result.frame} frame); "
           "centre and rotation free, voltage and scale held", ""]
    tilt = result.near is not None
    members = not tilt and any(a.member != a.zone for a in result.axes[:top])
    head = f"  {'rank':>4} {'zone':>10} " + (f"{'shown as':>10} " if members else "") + \
        (f"{'tilt':>6} " if tilt else "") + \
        f"{'lines':>5} {'seen':>5} {'cross':>6} {'ring':>6} {'max conv':>8}  " + \
        "  ".join(f"{c:>8}" for c in ("exx", "eyy", "ezz", "eyz", "exz", "exy"))
    out.append(head)
    out.append(f"  {'':4} {'':10} " + (f"{'':10} " if members else "") +
               (f"{'deg':>6} " if tilt else "") +
               f"{'':5} {'':5} {'':6} {'mrad':>6} {'mrad':>8}  " +
               "  ".join(f"{'':>8}" for _ in range(6)))
    for k, a in enumerate(result.axes[:top], 1):
        zone = " ".join(str(v) for v in a.zone)
        shown = " ".join(str(v) for v in a.member)
        flag = "*" if a.overlap else " "
        row = f"  {k:4d} {zone:>10} " + (f"{shown:>10} " if members else "") + \
            (f"{a.tilt_deg:6.2f} " if tilt else "") + \
            f"{a.n_lines:5d} {a.n_visible_lines:5d} {a.n_crossings:6d} " \
            f"{a.ring_radius_mrad:6.1f} {a.max_convergence_mrad:7.2f}{flag}  " + \
            "  ".join(f"{s:8.1e}" for s in a.sigma_strain)
        out.append(row)
    out.append("")
    out.append("  lines: HOLZ lines above --min-strength; seen: those above --min-contrast; "
               "cross: crossings of two seen lines")
    if members:
        out.append("  shown as: the symmetry-equivalent axis with the best figures in this "
                   "frame (its figures are those printed)")
    if any(a.overlap for a in result.axes[:top]):
        out.append("  * zero-layer disks overlap at the requested disk size: figures are for "
                   "the largest convergence without overlap, 'max conv'")
    out.append("  The error model and the contrast estimate are kinematic: dynamical shifts "
               "enter only through the line offset, and strain in a thin foil relaxes at its "
               "surfaces.")
    if result.warnings:
        out.append("")
        out.extend(f"warning: {w}" for w in result.warnings)
    return "\n".join(out)


# ---------------------------------------------------------------------------
# detection
# ---------------------------------------------------------------------------

DETECTION_SCHEMA = "laueline.detection/1"


def detection_document(det):
    """The ``laueline.detection/1`` document of a :class:`~laueline.images.detect.Detection`."""
    return _clean({
        "schema": DETECTION_SCHEMA,
        "image": det.source,
        "shape": list(det.shape),
        "pixel_convention": "x = column, y = row (down), pixel centres at integers",
        "disk": {"center_px": list(det.disk.center_px), "radius_px": det.disk.radius_px,
                 "rms_px": det.disk.rms_px, "edge_points": det.disk.n_edge_points,
                 "given": det.disk.given, "distortion": list(det.disk.distortion),
                 "distortion_sigma": list(det.disk.distortion_sigma),
                 "distortion_significant": det.disk.distortion_significant},
        "noise": det.noise,
        "saturated_px": det.saturated_px,
        "lines": [{"normal_angle_deg": ln.normal_angle_deg, "offset_px": ln.offset_px,
                   "curvature_per_px": ln.curvature_per_px,
                   "position_sigma_px": ln.offset_sigma_px,
                   "angle_sigma_deg": ln.angle_sigma_deg,
                   "covariance": ln.covariance,
                   "depth": ln.depth, "width_px": ln.width_px, "snr": ln.snr,
                   "n_pixels": ln.n_pixels, "points_px": ln.points_px,
                   "flagged": bool(ln.flag), "flag": ln.flag,
                   "hkl": None if ln.hkl is None else list(ln.hkl),
                   "minima_px": ln.minima_px, "minima_sigma_px": ln.minima_sigma_px,
                   "minima_normal": ln.minima_normal} for ln in det.lines],
        "missing": [list(h) for h in det.missing],
        "crossings": [{"lines": det.crossing_lines[k], "xy_px": det.crossing_px[k],
                       "sigma_px": det.crossing_sigma_px[k],
                       "angle_deg": det.crossing_angle_deg[k]}
                      for k in range(len(det.crossing_lines))],
        "warnings": det.warnings,
    })


def detection_text(det):
    """Readable summary of a detection."""
    d = det.disk
    good = det.good_lines
    out = [f"disk       centre ({d.center_px[0]:.2f}, {d.center_px[1]:.2f}) px, radius "
           f"{d.radius_px:.2f} px" + (" (given)" if d.given else
                                       f", edge rms {d.rms_px:.2f} px from {d.n_edge_points} points"),
           *([f"           elliptical distortion e1 {d.distortion[0]:.5f} +- "
              f"{d.distortion_sigma[0]:.5f}, e2 {d.distortion[1]:.5f} +- "
              f"{d.distortion_sigma[1]:.5f}" + ("" if d.distortion_significant
                                                  else " (not significant: none applied)")]
             if not d.given else []),
           f"lines      {len(good)} found ({len(det.lines) - len(good)} flagged); "
           f"{len(det.crossing_lines)} crossings; noise {det.noise:.3g} of the background",
           "",
           "  #   angle deg   offset px   +-px     width px   depth    snr"]
    for i, ln in enumerate(det.lines):
        mark = "  flagged" if ln.flag else ""
        out.append(f"  {i:<3d} {ln.normal_angle_deg:9.3f} {ln.offset_px:11.3f} {ln.offset_sigma_px:6.3f}"
                   f" {ln.width_px:11.2f} {ln.depth:7.3f} {ln.snr:6.0f}{mark}")
    if det.warnings:
        out.append("")
        out.extend(f"warning: {w}" for w in det.warnings)
    return "\n".join(out)
