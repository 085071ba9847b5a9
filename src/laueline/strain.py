"""Strain tensors, frames, principal values and stress.

Conventions (DESIGN.md):

* Tensors are in the Cartesian frame of the reference cell (x along a, y in
  the a-b plane) unless a sample frame is given.
* Six-component vectors list exx eyy ezz eyz exz exy, tensor components.
* The Green-Lagrange tensor of a fitted basis A relative to a reference A0,
  with deformation gradient F = A A0^-1, is E = (F^T F - I) / 2.  It depends
  on the metric only: rigid rotations drop out.
* The small-strain tensor reported beside it is the Biot strain U - I with
  U = sqrt(F^T F), the stretch of the polar decomposition; it is rotation
  free too, equals e exactly for a basis (I + e) A0 with symmetric e, and
  E = eps + eps^2 / 2.
* Stress follows Hooke's law in Voigt form, sigma = C (exx, eyy, ezz,
  2 eyz, 2 exz, 2 exy), with C (GPa) in the same Cartesian frame.  Fit
  reports apply it to the Green-Lagrange tensor (the St Venant-Kirchhoff
  law, whose stress is the second Piola-Kirchhoff stress; it equals the
  Cauchy stress of linear elasticity to first order in the strain), so
  that a constraint on the stress holds exactly in the report.

References
----------
Nye, J. F. (1985). *Physical Properties of Crystals*. Oxford: Clarendon.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import InputError

__all__ = [
    "deformation_gradient", "basis_from_green_lagrange", "green_lagrange", "small_strain",
    "voigt", "from_voigt",
    "principal", "volumetric", "sample_axes", "rotate_tensor", "cubic_stiffness",
    "read_stiffness", "stress", "propagate", "StrainReport", "strain_report",
    "voigt_rotation", "green_lagrange_report",
]


def deformation_gradient(reference_basis, basis):
    """F = A A0^-1, mapping reference vectors onto fitted ones."""
    return np.asarray(basis, float) @ np.linalg.inv(np.asarray(reference_basis, float))


def basis_from_green_lagrange(reference_basis, green_lagrange_strain):
    """The strained basis sqrt(I + 2 E) A0: the symmetric stretch with Green-Lagrange E.

    The one formula of a strained basis: for symmetric e, (I + e) A0 is the
    same basis with E = e + e^2 / 2.  ``green_lagrange_strain`` may be a
    stack (..., 3, 3); the result then has the same leading shape.
    """
    E = np.asarray(green_lagrange_strain, float)
    w, v = np.linalg.eigh(np.eye(3) + 2.0 * E)
    if np.any(w <= 0):
        raise InputError("the strain makes the basis singular or inverts it")
    stretch = (v * np.sqrt(w)[..., None, :]) @ np.swapaxes(v, -1, -2)
    return stretch @ np.asarray(reference_basis, float)


def green_lagrange(reference_basis, basis):
    """E = (F^T F - I) / 2 (equivalently A0^-T A^T A A0^-1 - I, halved)."""
    F = deformation_gradient(reference_basis, basis)
    return 0.5 * (F.T @ F - np.eye(3))


def small_strain(reference_basis, basis):
    """Biot strain U - I, U = sqrt(F^T F)."""
    F = deformation_gradient(reference_basis, basis)
    w, v = np.linalg.eigh(F.T @ F)
    return (v * np.sqrt(w)) @ v.T - np.eye(3)


def voigt(tensor):
    """Six components exx eyy ezz eyz exz exy of a symmetric 3x3 tensor."""
    t = np.asarray(tensor, float)
    return np.array([t[0, 0], t[1, 1], t[2, 2], t[1, 2], t[0, 2], t[0, 1]])


def from_voigt(v):
    """Symmetric 3x3 tensor from exx eyy ezz eyz exz exy."""
    xx, yy, zz, yz, xz, xy = np.asarray(v, float)
    return np.array([[xx, xy, xz], [xy, yy, yz], [xz, yz, zz]])


def principal(tensor):
    """Principal values (descending) and unit directions (columns)."""
    w, v = np.linalg.eigh(np.asarray(tensor, float))
    order = np.argsort(w)[::-1]
    return w[order], v[:, order]


def volumetric(reference_basis, basis):
    """Relative volume change det(F) - 1."""
    return float(np.linalg.det(deformation_gradient(reference_basis, basis)) - 1.0)


def sample_axes(reference_basis, x_dir, z_dir):
    """Rows x', y', z' of a sample frame from crystal directions.

    Parameters
    ----------
    reference_basis : ndarray (3, 3)
    x_dir, z_dir : sequence of 3 numbers
        Lattice directions [u v w] of the sample x axis (for example a
        channel direction) and z axis (for example the growth direction or
        interface normal).  They must be normal to each other in the
        crystal: a frame is never made orthogonal silently; y = z cross x.

    Raises
    ------
    InputError
        Zero, parallel or non-normal directions.
    """
    A = np.asarray(reference_basis, float)
    z = A @ np.asarray(z_dir, float)
    x = A @ np.asarray(x_dir, float)
    if np.linalg.norm(z) == 0 or np.linalg.norm(x) == 0:
        raise InputError("x_dir, z_dir: sample directions must be non-zero")
    z /= np.linalg.norm(z)
    x /= np.linalg.norm(x)
    cos = float(x @ z)
    if abs(cos) > 1e-6:  # direction indices are exact; this only absorbs rounding
        raise InputError(f"x_dir: the sample x axis {list(x_dir)} is not normal to the sample "
                         f"z axis {list(z_dir)} (angle "
                         f"{np.degrees(np.arccos(np.clip(cos, -1, 1))):.2f} deg); give "
                         "normal directions")
    x = x - cos * z
    x /= np.linalg.norm(x)
    return np.array([x, np.cross(z, x), z])


def rotate_tensor(tensor, axes):
    """Components in the frame whose axes are the rows of ``axes``."""
    return axes @ np.asarray(tensor, float) @ axes.T


def cubic_stiffness(c11, c12, c44):
    """6x6 Voigt stiffness (GPa) of a cubic crystal in its cube axes."""
    c = np.zeros((6, 6))
    c[:3, :3] = c12
    c[[0, 1, 2], [0, 1, 2]] = c11
    c[[3, 4, 5], [3, 4, 5]] = c44
    _check_stiffness(c)
    return c


def _check_stiffness(c):
    if c.shape != (6, 6) or not np.all(np.isfinite(c)):
        raise InputError("a stiffness matrix is 6x6 finite numbers (GPa)")
    if not np.allclose(c, c.T, rtol=1e-6, atol=1e-9):
        raise InputError("the stiffness matrix must be symmetric")
    if np.linalg.eigvalsh(c).min() <= 0:
        raise InputError("the stiffness matrix must be positive definite (a stable crystal)")


def read_stiffness(path):
    """6x6 Voigt stiffness in GPa from a text file (whitespace or commas, # comments)."""
    try:
        text = open(path, encoding="utf-8").read()
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror}") from None
    rows = []
    for line in text.splitlines():
        line = line.split("#")[0].replace(",", " ").strip()
        if line:
            try:
                rows.append([float(v) for v in line.split()])
            except ValueError:
                raise InputError(f"{path}: non-numeric entry in the stiffness matrix") from None
    try:
        c = np.array(rows, dtype=float)
    except ValueError:
        raise InputError(f"{path}: the stiffness matrix rows have unequal lengths") from None
    _check_stiffness(c)
    return c


def stress(strain, stiffness):
    """Stress tensor (GPa) from a strain tensor by Hooke's law (Voigt form)."""
    e = voigt(strain) * np.array([1, 1, 1, 2, 2, 2])
    return from_voigt(np.asarray(stiffness) @ e)


def propagate(function, x, covariance, steps):
    """Covariance of function(x) by a central-difference Jacobian.

    Parameters
    ----------
    function : callable
        Maps a parameter vector to a flat array.
    x : ndarray (p,)
    covariance : ndarray (p, p)
    steps : ndarray (p,)
        Finite-difference steps, small against the parameter uncertainties.
    """
    x = np.asarray(x, float)
    f0 = np.asarray(function(x), float).ravel()
    jac = np.empty((f0.size, x.size))
    for j, h in enumerate(steps):
        dx = np.zeros_like(x)
        dx[j] = h
        jac[:, j] = (np.ravel(function(x + dx)) - np.ravel(function(x - dx))) / (2 * h)
    return jac @ covariance @ jac.T


@dataclass
class StrainReport:
    """Strain (and stress) of a fitted basis with propagated uncertainties.

    Tensors are 3x3 arrays in the reference Cartesian frame; the ``sample_*``
    fields hold the same in the sample frame when one was given.
    """

    green_lagrange: np.ndarray
    green_lagrange_sigma: np.ndarray
    small: np.ndarray
    small_sigma: np.ndarray
    principal: np.ndarray
    principal_sigma: np.ndarray
    principal_directions: np.ndarray
    volumetric: float
    volumetric_sigma: float
    covariance_voigt: np.ndarray
    stress_GPa: np.ndarray | None = None
    stress_sigma_GPa: np.ndarray | None = None
    sample_axes: np.ndarray | None = None
    sample_green_lagrange: np.ndarray | None = None
    sample_green_lagrange_sigma: np.ndarray | None = None
    sample_stress_GPa: np.ndarray | None = None
    sample_stress_sigma_GPa: np.ndarray | None = None


def _sigma_tensor(cov6):
    return from_voigt(np.sqrt(np.maximum(np.diag(cov6), 0)))


def strain_report(reference_basis, basis_of, x, covariance, steps, *, stiffness=None,
                  axes=None):
    """Strain, principal values, volume change and stress with uncertainties.

    Parameters
    ----------
    reference_basis : ndarray (3, 3)
    basis_of : callable
        Maps the refined parameter vector to the fitted basis.
    x, covariance, steps : ndarray
        Refined parameters, their covariance and finite-difference steps.
    stiffness : ndarray (6, 6), optional
        Voigt stiffness in GPa in the reference Cartesian frame.
    axes : ndarray (3, 3), optional
        Sample frame (rows), see :func:`sample_axes`.
    """
    A0 = np.asarray(reference_basis, float)

    def gl(p):
        return voigt(green_lagrange(A0, basis_of(p)))

    def eps(p):
        return voigt(small_strain(A0, basis_of(p)))

    A = basis_of(x)
    E = green_lagrange(A0, A)
    cov_gl = propagate(gl, x, covariance, steps)
    cov_eps = propagate(eps, x, covariance, steps)
    values, directions = principal(E)
    cov_pr = propagate(lambda p: principal(green_lagrange(A0, basis_of(p)))[0], x,
                       covariance, steps)
    vol_var = propagate(lambda p: [volumetric(A0, basis_of(p))], x, covariance, steps)
    out = StrainReport(
        green_lagrange=E, green_lagrange_sigma=_sigma_tensor(cov_gl),
        small=small_strain(A0, A), small_sigma=_sigma_tensor(cov_eps),
        principal=values, principal_sigma=np.sqrt(np.maximum(np.diag(cov_pr), 0)),
        principal_directions=directions, volumetric=volumetric(A0, A),
        volumetric_sigma=float(np.sqrt(max(vol_var[0, 0], 0))), covariance_voigt=cov_gl)
    if stiffness is not None:
        def sig(p):
            return voigt(stress(green_lagrange(A0, basis_of(p)), stiffness))

        out.stress_GPa = stress(E, stiffness)
        out.stress_sigma_GPa = _sigma_tensor(propagate(sig, x, covariance, steps))
    if axes is not None:
        out.sample_axes = axes
        out.sample_green_lagrange = rotate_tensor(E, axes)
        out.sample_green_lagrange_sigma = _sigma_tensor(propagate(
            lambda p: voigt(rotate_tensor(green_lagrange(A0, basis_of(p)), axes)),
            x, covariance, steps))
        if stiffness is not None:
            out.sample_stress_GPa = rotate_tensor(out.stress_GPa, axes)
            out.sample_stress_sigma_GPa = _sigma_tensor(propagate(
                lambda p: voigt(rotate_tensor(stress(green_lagrange(A0, basis_of(p)),
                                                     stiffness), axes)),
                x, covariance, steps))
    return out


def voigt_rotation(axes):
    """6x6 matrix T with voigt(Q E Q^T) = T @ voigt(E) for the frame rows Q = ``axes``."""
    Q = np.asarray(axes, float)
    pairs = ((0, 0), (1, 1), (2, 2), (1, 2), (0, 2), (0, 1))
    T = np.empty((6, 6))
    for r, (a, b) in enumerate(pairs):
        for k, (i, j) in enumerate(pairs):
            T[r, k] = Q[a, i] * Q[b, j] + (Q[a, j] * Q[b, i] if i != j else 0.0)
    return T


_ENGINEERING = np.array([1.0, 1.0, 1.0, 2.0, 2.0, 2.0])


def green_lagrange_report(reference_basis, strain_voigt, covariance_voigt, *, stiffness=None,
                          axes=None):
    """Strain report of a Green-Lagrange strain given with its Voigt covariance.

    Everything linear in E (the tensor in the sample frame, the stress, the
    stress in the sample frame) is propagated exactly; the small strain,
    principal values and volume change by central differences.

    Parameters
    ----------
    reference_basis : ndarray (3, 3)
    strain_voigt : ndarray (6,)
        exx eyy ezz eyz exz exy of E, reference Cartesian frame.
    covariance_voigt : ndarray (6, 6)
    stiffness : ndarray (6, 6), optional
        Voigt stiffness in GPa, reference Cartesian frame.
    axes : ndarray (3, 3), optional
        Rows of a sample frame.
    """
    A0 = np.asarray(reference_basis, float)
    v = np.asarray(strain_voigt, float)
    cov = np.asarray(covariance_voigt, float)

    def basis_of(p):
        return basis_from_green_lagrange(A0, from_voigt(p))

    def sigma_of(linear):
        return _sigma_tensor(linear @ cov @ linear.T)

    E = from_voigt(v)
    steps = np.maximum(np.sqrt(np.maximum(np.diag(cov), 0)), 1e-9) * 1e-3
    cov_eps = propagate(lambda p: voigt(small_strain(A0, basis_of(p))), v, cov, steps)
    values, directions = principal(E)
    cov_pr = propagate(lambda p: principal(from_voigt(p))[0], v, cov, steps)
    vol_var = propagate(lambda p: [volumetric(A0, basis_of(p))], v, cov, steps)
    out = StrainReport(
        green_lagrange=E, green_lagrange_sigma=_sigma_tensor(cov),
        small=small_strain(A0, basis_of(v)), small_sigma=_sigma_tensor(cov_eps),
        principal=values, principal_sigma=np.sqrt(np.maximum(np.diag(cov_pr), 0)),
        principal_directions=directions, volumetric=volumetric(A0, basis_of(v)),
        volumetric_sigma=float(np.sqrt(max(vol_var[0, 0], 0))), covariance_voigt=cov)
    hooke = None if stiffness is None else np.asarray(stiffness, float) @ np.diag(_ENGINEERING)
    if hooke is not None:
        out.stress_GPa = from_voigt(hooke @ v)
        out.stress_sigma_GPa = sigma_of(hooke)
    if axes is not None:
        T = voigt_rotation(axes)
        out.sample_axes = np.asarray(axes, float)
        out.sample_green_lagrange = from_voigt(T @ v)
        out.sample_green_lagrange_sigma = sigma_of(T)
        if hooke is not None:
            out.sample_stress_GPa = from_voigt(T @ hooke @ v)
            out.sample_stress_sigma_GPa = sigma_of(T @ hooke)
    return out
