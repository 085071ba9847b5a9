"""Output: JSON documents with schema versions, CSV tables, readable text.

Every JSON document carries ``"schema"``, naming its kind and version
(``laueline.pattern/1`` ...); keys and meanings are fixed by the README.
Files are never overwritten unless the caller passes ``force=True``.
"""

from __future__ import annotations

import csv
import json
import math
import os
from pathlib import Path

import numpy as np

from .errors import InputError

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
FIGURE_SUFFIXES = (".png", ".svg", ".pdf")

F_UNIT = ("angstrom; kinematic electron structure factor sum_j occ_j f_j exp(-B_j s^2) "
          "exp(2 pi i h.x_j) with neutral-atom factors of International Tables C 4.3.2.2, "
          "non-relativistic (multiply by gamma for the fast electron)")


def format_hkl(hkl):
    """Compact Miller-index label: (2, -3, 10) -> '2 -3 10', (1, 1, 1) -> '111'."""
    values = [int(v) for v in hkl]
    if all(-9 <= v <= 9 for v in values) and all(v >= 0 for v in values):
        return "".join(str(v) for v in values)
    return " ".join(str(v) for v in values)


def check_outputs(paths, force=False, figure=None):
    """Refuse, before any work, to overwrite files or write into missing folders."""
    for path in [p for p in paths if p is not None] + ([figure] if figure else []):
        path = Path(path)
        if path.exists() and not force:
            raise InputError(f"{path} exists; pass --force to overwrite it")
        if not path.parent.exists() and str(path.parent) not in ("", "."):
            raise InputError(f"cannot write {path}: folder {path.parent} does not exist")
    if figure is not None and Path(figure).suffix.lower() not in FIGURE_SUFFIXES:
        raise InputError(f"figure {figure}: the suffix must be one of "
                         f"{', '.join(FIGURE_SUFFIXES)}")


def _clean(value):
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    if isinstance(value, np.ndarray):
        return _clean(value.tolist())
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating, float)):
        value = float(value)
        return value if math.isfinite(value) else None
    if isinstance(value, np.bool_):
        return bool(value)
    return value


def write_json(document, path, force=False):
    """Write a JSON document (numpy values converted, non-finite -> null)."""
    path = Path(path)
    check_outputs([path], force)
    text = json.dumps(_clean(document), indent=1)
    tmp = path.with_name(path.name + ".part")
    tmp.write_text(text + "\n", encoding="utf-8")
    os.replace(tmp, path)


def write_csv(path, header, rows, force=False):
    """Write a CSV table with a header row."""
    path = Path(path)
    check_outputs([path], force)
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh)
        writer.writerow(header)
        for row in rows:
            writer.writerow([_csv_cell(v) for v in row])


def _csv_cell(v):
    if isinstance(v, (float, np.floating)):
        return f"{float(v):.10g}"
    return v


def read_json(path, schema_prefix):
    """Read a laueline JSON document and check its schema kind."""
    path = Path(path)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror}") from None
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

    With ``dynamical`` (a :class:`laueline.dynamical.DynamicalLines`) the
    document is ``laueline.pattern/2``: every line gains ``dynamical`` (the
    deficit minima in mrad, depth, width and the shifts from the kinematic
    locus) and the top level gains ``dynamical`` (thickness, absorption
    ratio, beam count, convergence).  Version 1 keys are unchanged.
    """
    lines = []
    for i in range(pattern.n_lines):
        lines.append({
            "hkl": pattern.hkl[i], "laue_zone": pattern.laue_zone[i],
            "g_inv_A": pattern.g_inv_A[i], "f_abs": pattern.f_abs[i],
            "strength": pattern.strength[i], "normal": pattern.normal[i],
            "offset_mrad": pattern.offset_mrad[i], "points_mrad": pattern.points_mrad[i],
        })
        if dynamical is not None:
            found = np.isfinite(dynamical.shift_mrad[i])
            lines[-1]["dynamical"] = {
                "minima_mrad": dynamical.minima_mrad[i][found],
                "contrast": dynamical.contrast[i], "width_mrad": dynamical.width_mrad[i],
                "shift_mrad": dynamical.shift_mrad[i][found],
                "normals": dynamical.normal_points[i][found],
                "contrast_points": dynamical.contrast_points[i][found],
                "width_points_mrad": dynamical.width_points_mrad[i][found],
            }
    crossings = [{"lines": pattern.crossing_lines[k], "xy_mrad": pattern.crossing_mrad[k],
                  "angle_deg": pattern.crossing_angle_deg[k]}
                 for k in range(pattern.n_crossings)]
    frame = pattern.frame
    doc = {
        "schema": PATTERN_SCHEMA,
        "structure": pattern.crystal.summary(),
        "beam": {"kv": pattern.beam.kv, "wavelength_A": pattern.beam.wavelength_A,
                 "disk_mrad": pattern.disk_mrad,
                 "inner_potential_V": pattern.beam.inner_potential_V,
                 "wave_number_inv_A": pattern.beam.wave_number},
        "zone": list(frame.zone),
        "x_axis": list(frame.x_axis),
        "x_axis_chosen": frame.x_axis_chosen,
        "frame_cartesian": {"x": frame.rotation[0], "y": frame.rotation[1],
                            "beam_direction": frame.rotation[2]},
        "strain": pattern.strain,
        "gmax_inv_A": pattern.gmax,
        "f_unit": F_UNIT,
        "lines": lines,
        "crossings": crossings,
        "rings": [{"laue_zone": int(n), "radius_mrad": r}
                  for n, r in zip(pattern.ring_layers, pattern.ring_radius_mrad)],
        "max_convergence_mrad": pattern.max_convergence_mrad,
        "overlap_hkl": list(pattern.overlap_hkl),
        "warnings": list(pattern.warnings) + (list(dynamical.warnings) if dynamical else []),
    }
    if dynamical is not None:
        doc["schema"] = PATTERN_SCHEMA_DYNAMICAL
        doc["dynamical"] = dict(dynamical.summary(), shift_sign=(
            "shift_mrad is the distance of each minimum from the exact kinematic locus along "
            "the unit normal given beside it (the side the reflection's g points to)"),
            caution=DYNAMICAL_CAUTION)
    return _clean(doc)


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

FIT_SCHEMA = "laueline.fit/1"



def fit_document(result, *, y_up=False, calibration_source=None, points_source=None):
    """The ``laueline.fit/1`` document of a :class:`~laueline.refine.FitResult`.

    With ``y_up`` the point coordinates and residuals are given back in the
    caller's y-up convention, as read.
    """
    from .refine import CAUTIONS, PARAMETER_UNITS

    flip = np.array([1.0, -1.0 if y_up else 1.0])
    st = result.strain
    det = result.detector
    centre = np.asarray(det.center_px) * flip
    points = []
    for row in result.points:
        points.append({"x_px": row["x_px"], "y_px": row["y_px"] * flip[1],
                       "hkl_a": row["hkl_a"], "hkl_b": row["hkl_b"],
                       "residual_px": list(np.asarray(row["residual_px"]) * flip),
                       "used": row["used"], "note": row["note"]})
    doc = {
        "schema": FIT_SCHEMA,
        "model": result.model,
        "unique_axis": result.unique_axis,
        "structure": result.structure,
        "zone": list(result.zone), "x_axis": list(result.x_axis),
        "reference_cell": result.reference_cell, "cell": result.cell,
        "cell_sigma": result.cell_sigma,
        "kv": result.kv, "kv_sigma": result.kv_sigma,
        "inner_potential": result.inner_potential,
        "wave_number_inv_A": result.wave_number,
        "disk_mrad": result.disk_mrad,
        "detector": {"center_px": centre, "scale_px_per_mrad": det.scale_px_per_mrad,
                     "rotation_deg": det.rotation_deg, "mirror": det.mirror,
                     "y_up": bool(y_up), "sigma": result.detector_sigma},
        "strain": {"frame": "reference-cartesian",
                   "green_lagrange": st.green_lagrange,
                   "green_lagrange_sigma": st.green_lagrange_sigma,
                   "small": st.small, "small_sigma": st.small_sigma,
                   "principal": st.principal, "principal_sigma": st.principal_sigma,
                   "principal_directions": st.principal_directions.T,
                   "volumetric": st.volumetric, "volumetric_sigma": st.volumetric_sigma,
                   "covariance_voigt": st.covariance_voigt},
        "stress_GPa": st.stress_GPa, "stress_sigma_GPa": st.stress_sigma_GPa,
        "parameters": result.parameters,
        "values": result.values, "sigmas": result.sigmas,
        "units": [PARAMETER_UNITS[n] for n in result.parameters],
        "correlation": result.correlation,
        "condition_number": result.condition_number,
        "points": points,
        "rms_px": result.rms_px, "n_points": result.n_points, "n_used": result.n_used,
        "chi2": result.chi2, "dof": result.dof, "converged": result.converged,
        "calibration": calibration_source, "points_file": points_source,
        "observations": "crossings" if result.lines is None else "lines",
        "lines": result.lines,
        "warnings": result.warnings,
        "cautions": list(CAUTIONS),
    }
    if st.sample_axes is not None:
        doc["strain_sample"] = {
            "axes_cartesian": st.sample_axes,
            "green_lagrange": st.sample_green_lagrange,
            "green_lagrange_sigma": st.sample_green_lagrange_sigma,
            "stress_GPa": st.sample_stress_GPa, "stress_sigma_GPa": st.sample_stress_sigma_GPa,
        }
    return _clean(doc)


_COMPONENTS = [("xx", 0, 0), ("yy", 1, 1), ("zz", 2, 2), ("yz", 1, 2), ("xz", 0, 2), ("xy", 0, 1)]


def _tensor_rows(label, tensor, sigma, scale=1.0, unit=""):
    out = []
    sig_values = [sigma[i, j] for _, i, j in _COMPONENTS]
    positive = [s for s in sig_values if s > 0]
    floor = min(positive) if positive else 0.0
    for (name, i, j), s in zip(_COMPONENTS, sig_values):
        note = ""
        if floor > 0 and s > 10 * floor:
            note = "  poorly determined from this zone axis"
        out.append(f"  {label}{name} {tensor[i, j] * scale:+12.3e} +- {s * scale:9.2e} "
                   f"{unit}{note}")
    return out


def fit_text(result, *, y_up=False):
    """Readable report of a fit: parameters, cell, strain, stress, warnings, cautions."""
    from .refine import PARAMETER_UNITS

    out = []
    zone = " ".join(str(v) for v in result.zone)
    status = "" if result.converged else "   NOT CONVERGED"
    kind = "points" if result.lines is None else "detected lines"
    out.append(f"fit        {result.structure['name']} [{zone}], model {result.model}"
               + (f" (unique axis {result.unique_axis})" if result.unique_axis else "")
               + f": {result.n_used} of {result.n_points} {kind} used, "
               f"rms {result.rms_px:.3g} px, {result.dof} degrees of freedom{status}")
    out.append("")
    out.append(f"  {'parameter':10} {'value':>16} {'sigma':>11}  unit")
    for name, value, sigma in zip(result.parameters, result.values, result.sigmas):
        if name == "center_y" and y_up:
            value = -value
        fmt = ".4e" if name.startswith("e") else ".5f"
        out.append(f"  {name:10} {value:16{fmt}} {sigma:11.2e}  {PARAMETER_UNITS[name]}")
    det = result.detector
    held = [n for n, present in (("kv", "kv" in result.parameters),
                                 ("scale", "scale" in result.parameters),
                                 ("rotation", "rotation" in result.parameters)) if not present]
    if held:
        values = {"kv": f"{result.kv:.4f} kV", "scale": f"{det.scale_px_per_mrad:.5f} px/mrad",
                  "rotation": f"{det.rotation_deg:.4f} deg"}
        out.append("  held: " + ", ".join(f"{n} {values[n]}" for n in held))
    out.append(f"  mirror: {'yes' if det.mirror else 'no'}; "
               f"condition number {result.condition_number:.3g}")
    out.append("")
    names = ["a", "b", "c", "alpha", "beta", "gamma"]
    out.append("  cell       " + "  ".join(
        f"{n} {v:.6f}" + (f" +- {s:.1e}" if s > 0 else "")
        for n, v, s in zip(names, result.cell, result.cell_sigma)))
    out.append("  reference  " + "  ".join(f"{n} {v:.6f}"
                                           for n, v in zip(names, result.reference_cell)))
    st = result.strain
    out.append("")
    if result.model == "fixed":
        out.append("  strain     held at zero (model fixed: the reference cell)")
        return _fit_tail(out, result, y_up)
    out.append("  strain (Green-Lagrange, reference Cartesian frame)")
    out += _tensor_rows("e", st.green_lagrange, st.green_lagrange_sigma)
    out.append("  principal  " + "  ".join(f"{v:+.3e} +- {s:.1e}"
                                           for v, s in zip(st.principal, st.principal_sigma)))
    out.append(f"  volume change {st.volumetric:+.3e} +- {st.volumetric_sigma:.1e}")
    if st.sample_axes is not None:
        out.append("")
        out.append("  strain in the sample frame (x', y', z')")
        out += _tensor_rows("e", st.sample_green_lagrange, st.sample_green_lagrange_sigma)
    if st.stress_GPa is not None:
        out.append("")
        out.append("  stress (Hooke's law, reference Cartesian frame)")
        out += _tensor_rows("s", st.stress_GPa, st.stress_sigma_GPa, 1.0, "GPa")
        if st.sample_stress_GPa is not None:
            out.append("  stress in the sample frame")
            out += _tensor_rows("s", st.sample_stress_GPa, st.sample_stress_sigma_GPa, 1.0,
                                "GPa")
    return _fit_tail(out, result, y_up)


def _fit_tail(out, result, y_up):
    from .refine import CAUTIONS

    if result.assigned and result.lines is None:
        out.append("")
        out.append("  assignments (points without labels, matched to predicted crossings)")
        out.append("       #      x px      y px         line a         line b   residual px")
        for i, row in enumerate(result.points):
            if not row["used"]:
                continue
            y = -row["y_px"] if y_up else row["y_px"]
            dx, dy = row["residual_px"]
            out.append(f"    {i + 1:4d} {row['x_px']:9.2f} {y:9.2f}   "
                       f"{format_hkl(row['hkl_a']):>12}   {format_hkl(row['hkl_b']):>12}"
                       f"   {math.hypot(dx, dy):11.3f}"
                       + (f"   {row['note']}" if row["note"] else ""))
    if result.lines is not None:
        unused = [ln for ln in result.lines if not ln["used"]]
        out.append("")
        out.append(f"  lines fitted: {sum(ln['used'] for ln in result.lines)} of "
                   f"{len(result.lines)} detected")
        for ln in unused:
            out.append(f"    line #{ln['index']} left out: {ln['note'] or 'not assigned'}")
    left = [i for i, row in enumerate(result.points) if not row["used"]]
    if left:
        out.append("")
        out.append("  points left out")
        for i in left:
            row = result.points[i]
            y = -row["y_px"] if y_up else row["y_px"]
            out.append(f"    #{i + 1} ({row['x_px']:.1f}, {y:.1f}) px: {row['note']}")
    if result.warnings:
        out.append("")
        out.extend(f"warning: {w}" for w in result.warnings)
    out.append("")
    out.extend(f"caution: {c}" for c in CAUTIONS)
    return "\n".join(out)


# ---------------------------------------------------------------------------
# thickness
# ---------------------------------------------------------------------------

THICKNESS_SCHEMA = "laueline.thickness/1"


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

SURVEY_SCHEMA = "laueline.survey/1"


def survey_document(result):
    """The ``laueline.survey/1`` document of a :class:`~laueline.survey.SurveyResult`."""
    return _clean({
        "schema": SURVEY_SCHEMA,
        "structure": result.structure,
        "kv": result.kv, "disk_mrad": result.disk_mrad, "sigma_mrad": result.sigma_mrad,
        "frame": result.frame,
        "ranked_by": result.ranked_by,
        "point_group": result.point_group,
        "near": list(result.near) if result.near else None,
        "max_tilt_deg": result.max_tilt_deg,
        "axes": [{"zone": list(a.zone), "x_axis": list(a.x_axis), "tilt_deg": a.tilt_deg,
                  "n_lines": a.n_lines, "n_crossings": a.n_crossings,
                  "ring_radius_mrad": a.ring_radius_mrad,
                  "max_convergence_mrad": a.max_convergence_mrad, "overlap": a.overlap,
                  "sigma_strain": a.sigma_strain, "score": a.score} for a in result.axes],
        "warnings": result.warnings,
    })


def survey_text(result, top=15):
    """The best ``top`` axes as a table."""
    out = [f"survey     {result.structure['name']}, {result.kv:g} kV, disk "
           f"{result.disk_mrad:g} mrad, crossing noise {result.sigma_mrad:g} mrad, "
           f"{len(result.axes)} candidate axes"
           + (f" within {result.max_tilt_deg:g} deg of [{' '.join(f'{v:g}' for v in result.near)}]"
              if result.near else f" (one per orbit of the Laue group {result.point_group})"),
           f"ranked by  predicted 1-sigma of {result.ranked_by} ({result.frame} frame); "
           "centre and rotation free, voltage and scale held", ""]
    tilt = result.near is not None
    head = f"  {'rank':>4} {'zone':>10} " + (f"{'tilt':>6} " if tilt else "") + \
        f"{'lines':>5} {'cross':>6} {'ring':>6} {'max conv':>8}  " + \
        "  ".join(f"{c:>8}" for c in ("exx", "eyy", "ezz", "eyz", "exz", "exy"))
    out.append(head)
    out.append(f"  {'':4} {'':10} " + (f"{'deg':>6} " if tilt else "") +
               f"{'':5} {'':6} {'mrad':>6} {'mrad':>8}  " + "  ".join(f"{'':>8}" for _ in range(6)))
    for k, a in enumerate(result.axes[:top], 1):
        zone = " ".join(str(v) for v in a.zone)
        flag = "*" if a.overlap else " "
        row = f"  {k:4d} {zone:>10} " + (f"{a.tilt_deg:6.2f} " if tilt else "") + \
            f"{a.n_lines:5d} {a.n_crossings:6d} {a.ring_radius_mrad:6.1f} " \
            f"{a.max_convergence_mrad:7.2f}{flag}  " + \
            "  ".join(f"{s:8.1e}" for s in a.sigma_strain)
        out.append(row)
    if any(a.overlap for a in result.axes[:top]):
        out.append("")
        out.append("  * zero-layer disks overlap at this disk size (reduce the convergence "
                   "angle below 'max conv')")
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
                 "given": det.disk.given},
        "noise": det.noise,
        "saturated_px": det.saturated_px,
        "lines": [{"normal_angle_deg": ln.normal_angle_deg, "offset_px": ln.offset_px,
                   "curvature_per_px": ln.curvature_per_px,
                   "position_sigma_px": ln.offset_sigma_px,
                   "angle_sigma_deg": ln.angle_sigma_deg,
                   "covariance": ln.covariance,
                   "depth": ln.depth, "width_px": ln.width_px, "snr": ln.snr,
                   "n_pixels": ln.n_pixels, "points_px": ln.points_px,
                   "flagged": bool(ln.flag), "flag": ln.flag} for ln in det.lines],
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
