"""Relaxation through the foil: parametric families and user tables of u(z) or e(z).

See :mod:`laueline.relaxation` for the model and its sources.
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError

__all__ = ["MODELS", "PARAMETERS", "PARAMETER_UNITS", "STRAIN_COMPONENTS", "DisplacementTable",
           "read_displacement_table", "relaxation_displacement", "relaxed_strain_fraction",
           "relaxed_strain_phase_depth"]

MODELS = ("uniform", "cosh", "relaxed-strain", "table")
STRAIN_COMPONENTS = ("exx", "eyy", "ezz", "eyz", "exz", "exy")

PARAMETERS = {"uniform": (), "cosh": ("ux_nm", "uy_nm", "decay_length_nm"),
              "relaxed-strain": ("relaxed_fraction", "decay_length_nm"), "table": ("scale",)}
PARAMETER_UNITS = {"ux_nm": "nm", "uy_nm": "nm", "decay_length_nm": "nm", "scale": "",
                   "relaxed_fraction": "",
                   **{c: "" for c in STRAIN_COMPONENTS},
                   "center_x": "px", "center_y": "px", "rotation": "deg",
                   "instrument_sigma_px": "px"}



@dataclass
class DisplacementTable:
    """A relaxation displacement through the foil, disk frame (x, y, B), nm.

    ``u_nm`` holds the displacement with its value and slope at mid-foil
    removed (those belong to the mid-foil strain).
    """

    z_nm: np.ndarray
    u_nm: np.ndarray       # (m, 3)
    source: str = ""
    kind: str = "displacement"


_U_COLUMNS = ("ux_nm", "uy_nm", "uz_nm")
_E_COLUMNS = ("exz", "eyz", "ezz")


def read_displacement_table(path, thickness_nm):
    """Read a CSV table of the relaxation through the foil.

    Columns (header row; ``#`` lines are comments): ``z_nm``, the depth below
    the entrance surface, strictly monotonic and within [0, t]; then either
    displacements ``ux_nm``, ``uy_nm``, ``uz_nm`` (any of them, disk frame:
    x, y in the disk, z along the zone axis toward the source) or strains
    ``exz``, ``eyz``, ``ezz`` (tensor components, disk frame), integrated to
    displacements as du_x/dz = 2 e_xz, du_y/dz = 2 e_yz, du_z/dz = e_zz.
    The value and slope at mid-foil are removed: they are the mid-foil strain.

    Raises
    ------
    InputError
        For a missing thickness, unreadable file, missing or mixed columns,
        non-numeric values, depths that are not monotonic or lie outside the
        foil, or a table that does not span the foil.
    """
    thickness_nm = _check_thickness(thickness_nm)
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror}") from None
    rows = [r for r in csv.reader(line for line in text.splitlines()
                                  if line.strip() and not line.lstrip().startswith("#"))]
    if len(rows) < 3:
        raise InputError(f"{path}: a displacement table needs a header and at least two rows")
    header = [h.strip() for h in rows[0]]
    if "z_nm" not in header:
        raise InputError(f"{path}: no z_nm column (columns: {', '.join(header)})")
    has_u = [c for c in _U_COLUMNS if c in header]
    has_e = [c for c in _E_COLUMNS if c in header]
    if bool(has_u) == bool(has_e):
        raise InputError(f"{path}: give displacements ({', '.join(_U_COLUMNS)}) or strains "
                         f"({', '.join(_E_COLUMNS)}), not both and not neither")
    try:
        data = np.array([[float(r[header.index(c)]) for c in ["z_nm"] + has_u + has_e]
                         for r in rows[1:]])
    except (ValueError, IndexError):
        raise InputError(f"{path}: every row needs a number in each named column") from None
    if not np.all(np.isfinite(data)):
        raise InputError(f"{path}: non-finite values in the table")
    z = data[:, 0]
    step = np.diff(z)
    if not (np.all(step > 0) or np.all(step < 0)):
        raise InputError(f"{path}: z_nm is not strictly monotonic (the depth must increase "
                         "or decrease throughout)")
    order = np.argsort(z)
    z, data = z[order], data[order]
    tol = 1e-6 * thickness_nm
    if z[0] < -tol or z[-1] > thickness_nm + tol:
        raise InputError(f"{path}: depths from {z[0]:g} to {z[-1]:g} nm lie outside the foil "
                         f"(0 to {thickness_nm:g} nm)")
    if z[0] > 0.05 * thickness_nm or z[-1] < 0.95 * thickness_nm:
        raise InputError(f"{path}: depths from {z[0]:g} to {z[-1]:g} nm do not span the foil "
                         f"(0 to {thickness_nm:g} nm)")
    values = np.zeros((len(z), 3))
    names = has_u or has_e
    for k, name in enumerate(names):
        col = (_U_COLUMNS if has_u else _E_COLUMNS).index(name)
        values[:, col] = data[:, 1 + k]
    if has_e:
        from scipy.integrate import cumulative_trapezoid

        factor = np.array([2.0, 2.0, 1.0])
        values = cumulative_trapezoid(values * factor, z, axis=0, initial=0.0)
    u = _remove_mid_value_and_slope(z, values, thickness_nm)
    return DisplacementTable(z, u, str(path), "displacement" if has_u else "strain")


def _remove_mid_value_and_slope(z, u, thickness_nm):
    mid = 0.5 * thickness_nm
    value = np.array([np.interp(mid, z, u[:, k]) for k in range(3)])
    h = 0.01 * thickness_nm
    slope = np.array([(np.interp(mid + h, z, u[:, k]) - np.interp(mid - h, z, u[:, k]))
                      / (2 * h) for k in range(3)])
    return u - value - (z[:, None] - mid) * slope


def _check_thickness(thickness_nm):
    if thickness_nm is None:
        raise InputError("the foil thickness is missing: give thickness_nm (--thickness-nm)")
    t = float(thickness_nm)
    if not math.isfinite(t) or t <= 0:
        raise InputError(f"thickness_nm must be positive, got {t:g}")
    if t > 2000:
        raise InputError(f"thickness_nm {t:g} is beyond a TEM lamella; give it in nm")
    return t


def relaxation_displacement(model, values, z_nm, thickness_nm, table=None):
    """Relaxation displacement w(z) in the disk frame, nm, shape (m, 3).

    Parameters
    ----------
    model : {'uniform', 'cosh', 'table'}
    values : sequence of float
        The model's parameters (:data:`PARAMETERS`), nm or dimensionless.
    z_nm : ndarray (m,)
        Depths below the entrance surface.
    thickness_nm : float
    table : DisplacementTable, for ``model='table'``
    """
    z = np.asarray(z_nm, dtype=float)
    out = np.zeros(z.shape + (3,))
    if model == "uniform":
        return out
    if model == "cosh":
        ux, uy, length = (float(v) for v in values)
        half = 0.5 * thickness_nm / length
        # cosh(x) - 1 = 2 sinh^2(x / 2), without cancellation near the mid-plane
        shape = (np.sinh(0.5 * (z - 0.5 * thickness_nm) / length) / math.sinh(0.5 * half)) ** 2
        out[..., 0] = ux * shape
        out[..., 1] = uy * shape
        return out
    if model == "table":
        if table is None:
            raise InputError("the table model needs a displacement table")
        scale = float(values[0])
        for k in range(3):
            out[..., k] = scale * np.interp(z, table.z_nm, table.u_nm[:, k])
        return out
    raise InputError(f"unknown relaxation model '{model}'; choose one of {', '.join(MODELS)}")


def relaxed_strain_fraction(fraction, decay_length_nm, z_nm, thickness_nm):
    """f(z) of the ``relaxed-strain`` family: the strain at depth z over the mid-foil strain.

    f = 1 - r [cosh((z - t/2)/L) - 1] / [cosh(t/(2L)) - 1]: 1 at mid-foil,
    1 - r at both surfaces.
    """
    half = 0.5 * thickness_nm / decay_length_nm
    x = 0.5 * (np.asarray(z_nm, dtype=float) - 0.5 * thickness_nm) / decay_length_nm
    return 1.0 - fraction * (np.sinh(x) / math.sinh(0.5 * half)) ** 2


def relaxed_strain_phase_depth(fraction, decay_length_nm, z_nm, thickness_nm):
    """integral from t/2 to z of (f - 1) dz', nm, for :func:`relaxed_strain_fraction`.

    Closed form -r [L sinh((z - t/2)/L) - (z - t/2)] / [cosh(t/(2L)) - 1]; the
    phase of reflection g is then its mid-foil shift of the excitation error
    times this depth.
    """
    length = float(decay_length_nm)
    zc = np.asarray(z_nm, dtype=float) - 0.5 * thickness_nm
    denom = 2.0 * math.sinh(0.25 * thickness_nm / length) ** 2      # cosh(t/2L) - 1
    return -fraction * (length * np.sinh(zc / length) - zc) / denom
