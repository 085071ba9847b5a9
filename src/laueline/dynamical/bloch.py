"""Bloch-wave engine: many-beam intensities of the central disk.

The many-beam method in the high-energy forward-scattering approximation
(Bethe's eigenvalue formulation; Hirsch, Howie, Nicholson, Pashley and
Whelan, *Electron Microscopy of Thin Crystals*, 1965, ch. 12; Humphreys,
Rep. Prog. Phys. 42 (1979) 1825; Spence and Zuo, *Electron
Microdiffraction*, 1992, ch. 3).  For an incident wave vector k (vacuum
wave number K = |k|, 1/angstrom without 2 pi) and a set of beams g_i, the
amplitudes phi of the beams obey

    d phi / dz = (2 pi i / (2 K_n)) A phi,
    A_gg = 2 K s_g = K^2 - |k + g|^2 = -(2 k.g + |g|^2),
    A_gh = U_{g-h}  (g != h),

with z the depth below the entrance surface and K_n = -k.n the component
of k along the inward foil normal (n is the outward normal, pointing toward
the source like the zone axis).  With A = C diag(lambda) C^-1 the exit
amplitudes of a foil of thickness t are

    phi(t) = C diag(exp(2 pi i lambda t / (2 K_n))) C^-1 e_0.

The excitation error s_g = (K^2 - |k + g|^2) / (2K) vanishes exactly on the
deficit-line locus of :mod:`laueline.lines` (2 k.g + |g|^2 = 0), so a
kinematic limit puts the minima on the forward model's loci.  K is the wave
number of the forward model (the vacuum value, or the value inside the
crystal when the inner-potential correction is on); the real mean inner
potential U_0 then only adds a phase common to all beams and is left out.

Potential coefficients (DESIGN.md):

    U_g = gamma F_g / (pi Omega)   (1/angstrom^2, no 2 pi),

with F_g the electron structure factors of :meth:`Crystal.structure_factors`
(Debye-Waller included), gamma the relativistic factor and Omega the cell
volume.  Absorption is a proportional imaginary potential U'_g = a U_g for
every g including 0 (a = 0.1 by default, common practice), so the optical
potential coefficient is (1 + i a) U_g and the diagonal carries i a U_0.
The complex matrix is diagonalised exactly (``numpy.linalg.eig`` on stacks
of matrices), not through first-order absorption.  The two-beam extinction
distance is xi_g = K / |U_g|.

Thickness is in nm throughout the public functions.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import InputError
from ..optics import relativistic_factor

__all__ = [
    "MAX_BEAMS",
    "MAX_THICKNESS_NM",
    "DEFAULT_ABSORPTION_RATIO",
    "check_thickness",
    "check_absorption_ratio",
    "potential_coefficients",
    "coupling_matrix",
    "excitation_matrices",
    "bloch_amplitudes",
    "bloch_intensities",
]

#: Largest beam count accepted.  A dense complex eigen-problem of n beams
#: needs about 10 n^2 x 16 bytes of work space per matrix; 1500 beams take
#: about 0.4 GB per direction and minutes per solve on one core.
MAX_BEAMS = 1500
#: Thicker foils than 2 um are outside what CBED of HOLZ lines is used for.
MAX_THICKNESS_NM = 2000.0
DEFAULT_ABSORPTION_RATIO = 0.1
#: Bytes of matrix stacks handled at once (the stack is split into chunks).
_CHUNK_BYTES = 64e6


def check_thickness(thickness_nm, name="thickness_nm"):
    """Return the thickness as float after checking 0 < t <= 2000 nm."""
    try:
        t = float(thickness_nm)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a number of nm, got {thickness_nm!r}") from None
    if not math.isfinite(t) or t <= 0 or t > MAX_THICKNESS_NM:
        raise InputError(f"{name} must lie in (0, {MAX_THICKNESS_NM:g}] nm, got {t:g}")
    return t


def check_absorption_ratio(ratio, name="absorption_ratio"):
    """Return the absorption ratio as float after checking 0 <= a < 1."""
    try:
        a = float(ratio)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a number in [0, 1), got {ratio!r}") from None
    if not math.isfinite(a) or not 0.0 <= a < 1.0:
        raise InputError(f"{name} must lie in [0, 1), got {a:g}")
    return a


def _check_beams(n):
    if n > MAX_BEAMS:
        raise InputError(
            f"{n} beams exceed the limit of {MAX_BEAMS} (a dense eigen-solve of that size "
            f"needs about {10 * n * n * 16 / 1e9:.1f} GB per direction); lower the "
            "reciprocal-length limit of the beam set")


def potential_coefficients(crystal, hkl, kv, absorption_ratio=DEFAULT_ABSORPTION_RATIO):
    """Optical potential coefficients (1 + i a) U_g in 1/angstrom^2.

    Parameters
    ----------
    crystal : Crystal
    hkl : array_like of int, shape (n, 3)
    kv : float
        Accelerating voltage in kV (for the relativistic factor gamma).
    absorption_ratio : float
        a in U'_g = a U_g, in [0, 1); 0 gives the elastic U_g alone.

    Returns
    -------
    ndarray of complex, shape (n,)
        U_g + i U'_g with U_g = gamma F_g / (pi Omega) (no 2 pi), F_g the
        kinematic electron structure factor in angstrom with Debye-Waller
        factors.  U_g itself is complex for a non-centrosymmetric crystal.
    """
    a = check_absorption_ratio(absorption_ratio)
    hkl = np.atleast_2d(np.asarray(hkl, dtype=float))
    f = crystal.structure_factors(hkl)
    u = relativistic_factor(kv) * f / (math.pi * crystal.volume)
    return u * (1.0 + 1j * a)


def coupling_matrix(crystal, beams_hkl, kv, absorption_ratio=DEFAULT_ABSORPTION_RATIO):
    """Off-diagonal couplings (1 + i a) U_{g-h} and the absorption i a U_0 on the diagonal.

    Parameters
    ----------
    crystal : Crystal
    beams_hkl : array_like of int, shape (n, 3)
        The beams; 0 0 0 first by convention (not checked here).
    kv, absorption_ratio :
        As for :func:`potential_coefficients`.

    Returns
    -------
    ndarray of complex, shape (n, n)
        Element (g, h) is the coefficient of U at g - h; the real part of
        U_0 (a phase common to all beams) is removed from the diagonal.
    """
    beams = np.asarray(beams_hkl, dtype=np.int64)
    n = len(beams)
    _check_beams(n)
    diff = (beams[:, None, :] - beams[None, :, :]).reshape(-1, 3)
    unique, inverse = np.unique(diff, axis=0, return_inverse=True)
    u = potential_coefficients(crystal, unique, kv, absorption_ratio)
    mat = u[np.ravel(inverse)].reshape(n, n)
    u0 = potential_coefficients(crystal, np.zeros((1, 3)), kv, 0.0)[0].real
    mat[np.diag_indices(n)] -= u0
    return mat


def excitation_matrices(g_cartesian, k_incident):
    """Diagonal terms 2 K s_g = -(2 k.g + |g|^2) for every direction and beam.

    Parameters
    ----------
    g_cartesian : ndarray, shape (n, 3)
        Beam vectors, 1/angstrom.
    k_incident : ndarray, shape (m, 3)
        Incident wave vectors, 1/angstrom.

    Returns
    -------
    ndarray, shape (m, n)
        In 1/angstrom^2.
    """
    g = np.asarray(g_cartesian, dtype=float)
    k = np.asarray(k_incident, dtype=float)
    return -(2.0 * k @ g.T + np.sum(g * g, axis=1))


def _normal_components(k_incident, foil_normal):
    k = np.asarray(k_incident, dtype=float)
    if foil_normal is None:
        mean = k.sum(axis=0)
        normal = -mean / np.linalg.norm(mean)
    else:
        normal = np.asarray(foil_normal, dtype=float).ravel()
        if normal.size != 3 or not np.all(np.isfinite(normal)) or not np.any(normal):
            raise InputError("foil_normal must be a non-zero Cartesian 3-vector")
        normal = normal / np.linalg.norm(normal)
    kn = -k @ normal
    if np.any(kn <= 0):
        raise InputError("foil_normal must point toward the source (antiparallel to the "
                         "beam): some incident directions travel away from the foil")
    return kn


def _solve_stack(diagonal, coupling, kn, thickness_A, beams_out):
    """Exit amplitudes of the beams ``beams_out`` for a stack of directions.

    diagonal (m, n) real, coupling (n, n) complex, kn (m,), thickness in A.
    Returns (m, len(beams_out)) complex.  Chunked to bound memory.
    """
    m, n = diagonal.shape
    out = np.empty((m, len(beams_out)), dtype=complex)
    step = max(1, int(_CHUNK_BYTES // (16.0 * n * n * 4)))
    idx = np.arange(n)
    for start in range(0, m, step):
        stop = min(m, start + step)
        mats = np.broadcast_to(coupling, (stop - start, n, n)).copy()
        mats[:, idx, idx] += diagonal[start:stop]
        lam, vec = np.linalg.eig(mats)
        e0 = np.zeros((stop - start, n, 1), dtype=complex)
        e0[:, 0, 0] = 1.0
        alpha = np.linalg.solve(vec, e0)[..., 0]
        phase = np.exp((2j * math.pi * thickness_A) * lam / (2.0 * kn[start:stop, None]))
        out[start:stop] = np.einsum("mgj,mj->mg", vec[:, beams_out, :], alpha * phase)
    return out


def bloch_amplitudes(crystal, beams_hkl, k_incident, thickness_nm, *, kv,
                     absorption_ratio=DEFAULT_ABSORPTION_RATIO, foil_normal=None,
                     beams_out=None):
    """Complex exit amplitudes of every beam for a stack of incident directions.

    Parameters
    ----------
    crystal : Crystal
        Strained crystals are passed as ``crystal.strained(e)`` (basis (I + e) A).
    beams_hkl : array_like of int, shape (n, 3)
        The beam set, with 0 0 0 first.
    k_incident : array_like, shape (m, 3) or (3,)
        Incident wave vectors in the crystal's Cartesian frame, 1/angstrom;
        their length is the wave number K used for the excitation errors
        (for directions of a disk see :func:`laueline.frame.incident_wavevectors`).
    thickness_nm : float
        Foil thickness, (0, 2000] nm.
    kv : float
        Accelerating voltage (relativistic factor of U_g).
    absorption_ratio : float
        a in U'_g = a U_g, [0, 1).
    foil_normal : array_like (3,), optional
        Outward foil normal (toward the source, like the zone axis), Cartesian;
        by default antiparallel to the mean incident direction, which for a
        disk centred on the zone axis is the zone axis.
    beams_out : array_like of int, optional
        Indices of the beams returned; all by default.

    Returns
    -------
    ndarray of complex, shape (m, n_out)
    """
    t = check_thickness(thickness_nm)
    beams = np.atleast_2d(np.asarray(beams_hkl, dtype=np.int64))
    if beams.shape[1:] != (3,) or len(beams) == 0:
        raise InputError("beams_hkl must be an (n, 3) array of integers")
    if np.any(beams[0] != 0):
        raise InputError("beams_hkl must start with the direct beam 0 0 0")
    k = np.atleast_2d(np.asarray(k_incident, dtype=float))
    if k.shape[1:] != (3,) or not np.all(np.isfinite(k)):
        raise InputError("k_incident must be an (m, 3) array of finite wave vectors")
    coupling = coupling_matrix(crystal, beams, kv, absorption_ratio)
    diagonal = excitation_matrices(crystal.g_vectors(beams), k)
    kn = _normal_components(k, foil_normal)
    out = np.arange(len(beams)) if beams_out is None else np.asarray(beams_out, dtype=int)
    return _solve_stack(diagonal, coupling, kn, t * 10.0, out)


def bloch_intensities(crystal, beams_hkl, k_incident, thickness_nm, *, kv,
                      absorption_ratio=DEFAULT_ABSORPTION_RATIO, foil_normal=None,
                      beams_out=None):
    """Exit intensities |phi_g|^2 of every beam for a stack of incident directions.

    Parameters are those of :func:`bloch_amplitudes`; the incident intensity
    is 1, so without absorption the intensities of a complete beam set sum
    to 1.

    Returns
    -------
    ndarray, shape (m, n_out)
    """
    amp = bloch_amplitudes(crystal, beams_hkl, k_incident, thickness_nm, kv=kv,
                           absorption_ratio=absorption_ratio, foil_normal=foil_normal,
                           beams_out=beams_out)
    return amp.real ** 2 + amp.imag ** 2
