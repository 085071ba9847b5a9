"""Exact linear constraints on the strain tensor, in the crystal or a sample frame.

The fit's strain parameters are the six Green-Lagrange components E of the
reference Cartesian frame (DESIGN.md).  Every constraint offered here is a
linear equation ``K v = d`` on v = (Exx, Eyy, Ezz, Eyz, Exz, Exy):

* a component held at a value, in the crystal frame or in a sample frame
  (rows of ``sample_axes``), S = Q E Q^T;
* biaxial: equal in-plane normal strains of the sample frame, S_xx = S_yy;
* zero normal stress along the foil normal n: n . (C : E) . n = 0, with the
  stiffness C of the crystal frame (Voigt, GPa).  Linear elasticity with the
  Green-Lagrange strain (the St Venant-Kirchhoff law: the stress is the
  second Piola-Kirchhoff stress, equal to the Cauchy stress to first order
  in the strain); the reported stress uses the same law, so it honours the
  constraint exactly.

The constraints are imposed exactly by reduced parameters, not penalties:
v = v0 + N p with v0 a particular solution and the columns of N an
orthonormal basis of the null space of K; the fit refines p.

References
----------
Nye, J. F. (1985). *Physical Properties of Crystals*. Oxford: Clarendon.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError
from ..strain import voigt_rotation

__all__ = ["STRAIN_COMPONENTS", "StrainConstraints", "strain_constraints"]

STRAIN_COMPONENTS = ("exx", "eyy", "ezz", "eyz", "exz", "exy")
_PAIRS = ((0, 0), (1, 1), (2, 2), (1, 2), (0, 2), (0, 1))  # Voigt order
_ENGINEERING = np.array([1.0, 1.0, 1.0, 2.0, 2.0, 2.0])


@dataclass(frozen=True)
class StrainConstraints:
    """Reduced parameterisation v = offset + basis @ p of the six strain components.

    Attributes
    ----------
    offset : ndarray (6,)
        Particular solution v0 (crystal frame).
    basis : ndarray (6, k)
        Orthonormal null-space basis N; k free strain parameters.
    names : tuple of str
        Names of the k parameters: component names when the constraints
        only hold crystal-frame components, else ``mode1`` ...
    descriptions : tuple of str
        One sentence per constraint, for reports.
    frame : str
        ``crystal`` or ``sample``: where the held components were stated.
    rows, values : ndarray (r, 6), ndarray (r,)
        The constraint equations K v = d themselves.
    """

    offset: np.ndarray
    basis: np.ndarray
    names: tuple
    descriptions: tuple = ()
    frame: str = "crystal"
    rows: np.ndarray = field(default_factory=lambda: np.zeros((0, 6)))
    values: np.ndarray = field(default_factory=lambda: np.zeros(0))

    @property
    def constrained(self):
        return len(self.descriptions) > 0

    def expand(self, p):
        """Six components (..., 6) of reduced parameters p (..., k)."""
        return self.offset + np.asarray(p, float) @ self.basis.T

    def contains_dilatation(self):
        """True when a uniform dilatation is among the allowed strains."""
        h = np.array([1.0, 1.0, 1.0, 0, 0, 0]) / np.sqrt(3)
        if self.basis.shape[1] == 0:
            return False
        proj = self.basis @ (self.basis.T @ h)
        return bool(np.linalg.norm(h - proj) < 1e-6)


def _component_index(name, parameter):
    if name not in STRAIN_COMPONENTS:
        raise InputError(f"{parameter}: unknown strain component '{name}'; choose from "
                         f"{', '.join(STRAIN_COMPONENTS)}")
    return STRAIN_COMPONENTS.index(name)


def strain_constraints(reference_basis=None, *, hold=None, hold_crystal=(), sample_axes=None,
                       biaxial=False, zero_normal_stress=False, foil_normal=None,
                       stiffness=None):
    """Build the reduced strain parameterisation of a set of constraints.

    Parameters
    ----------
    reference_basis : ndarray (3, 3), optional
        Reference direct basis; needed to turn ``foil_normal`` into a vector.
    hold : dict of str to float, optional
        Components held at a value, in the sample frame when ``sample_axes``
        is given, else in the crystal frame.
    hold_crystal : sequence of str
        Crystal-frame components held at zero.
    sample_axes : ndarray (3, 3), optional
        Rows x', y', z' of the sample frame (see :func:`laueline.strain.sample_axes`).
    biaxial : bool
        Equal in-plane normal strains of the sample frame (S_xx = S_yy).
    zero_normal_stress : bool
        No normal stress along the foil normal (needs ``stiffness``).
    foil_normal : sequence of 3 numbers, optional
        Crystal direction [u v w] of the foil normal; by default the sample z axis.
    stiffness : ndarray (6, 6), optional
        Voigt stiffness in GPa in the crystal Cartesian frame.

    Returns
    -------
    StrainConstraints
    """
    rows, values, text = [], [], []
    frame = "sample" if sample_axes is not None else "crystal"
    for name in hold_crystal:
        row = np.zeros(6)
        row[_component_index(name, "hold")] = 1.0
        rows.append(row)
        values.append(0.0)
        text.append(f"{name} = 0 (crystal frame)")
    for name, value in (hold or {}).items():
        k = _component_index(name, "hold_strain")
        value = float(value)
        if not np.isfinite(value):
            raise InputError(f"hold_strain: the value of {name} must be finite")
        frame_rows = voigt_rotation(sample_axes if sample_axes is not None else np.eye(3))
        rows.append(frame_rows[k])
        values.append(value)
        text.append(f"{name} = {value:g} ({frame} frame)")
    if biaxial:
        if sample_axes is None:
            raise InputError("biaxial: equal in-plane strains need a sample frame "
                             "(sample_axes)")
        frame_rows = voigt_rotation(sample_axes)
        rows.append(frame_rows[0] - frame_rows[1])
        values.append(0.0)
        text.append("exx = eyy (biaxial, sample frame)")
    if zero_normal_stress:
        if stiffness is None:
            raise InputError("zero_normal_stress: the stress needs elastic constants "
                             "(stiffness)")
        if foil_normal is not None:
            if reference_basis is None:
                raise InputError("foil_normal: a crystal direction needs the reference basis")
            n = np.asarray(reference_basis, float) @ np.asarray(foil_normal, float)
            label = f"[{' '.join(f'{v:g}' for v in foil_normal)}]"
        elif sample_axes is not None:
            n = np.asarray(sample_axes, float)[2]
            label = "the sample z axis"
        else:
            raise InputError("zero_normal_stress: give the foil normal (foil_normal) or a "
                             "sample frame whose z axis is the normal (sample_axes)")
        if not np.linalg.norm(n) > 0:
            raise InputError("foil_normal: the direction must be non-zero")
        n = n / np.linalg.norm(n)
        weights = np.array([n[i] * n[j] * (1.0 if i == j else 2.0) for i, j in _PAIRS])
        row = weights @ np.asarray(stiffness, float) @ np.diag(_ENGINEERING)
        rows.append(row / np.max(np.abs(row)))
        values.append(0.0)
        text.append(f"zero normal stress along the foil normal ({label}; Hooke's law)")
    if not rows:
        return StrainConstraints(np.zeros(6), np.eye(6), STRAIN_COMPONENTS)
    K, d = np.array(rows), np.array(values)
    v0, *_ = np.linalg.lstsq(K, d, rcond=None)
    if np.linalg.norm(K @ v0 - d) > 1e-9 * (1.0 + np.linalg.norm(d)):
        raise InputError("the strain constraints contradict each other: "
                         + "; ".join(text))
    from scipy.linalg import null_space

    N = null_space(K, rcond=1e-10)
    if N.shape[1] == 0:
        raise InputError("the strain constraints leave nothing to fit: " + "; ".join(text))
    N[np.abs(N) < 1e-14] = 0.0
    v0[np.abs(v0) < 1e-15] = 0.0
    only_crystal_holds = not hold and not biaxial and not zero_normal_stress
    if only_crystal_holds:
        keep = [i for i, nm in enumerate(STRAIN_COMPONENTS) if nm not in hold_crystal]
        N = np.eye(6)[:, keep]
        names = tuple(STRAIN_COMPONENTS[i] for i in keep)
    else:
        names = tuple(f"mode{k + 1}" for k in range(N.shape[1]))
    return StrainConstraints(v0, N, names, tuple(text), frame, K, d)
