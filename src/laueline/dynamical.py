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
from dataclasses import dataclass, field

import numpy as np

from .errors import InputError
from .frame import incident_wavevectors
from .lines import (LineParameters, enumerate_reflections, line_parameters, locus_distances,
                    locus_samples)
from .optics import relativistic_factor

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
    "BeamSet",
    "select_beams",
    "DynamicalLines",
    "dynamical_lines",
    "disk_intensity",
    "disk_intensity_grid",
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


# ---------------------------------------------------------------------------
# beam sets for a disk
# ---------------------------------------------------------------------------

#: Zero-layer beams up to this |g| (1/angstrom) enter exactly by default.
DEFAULT_ZOLZ_GMAX = 2.0
#: HOLZ beams whose excitation error comes below this (1/angstrom) somewhere
#: in a group of directions enter that group's beam set exactly.
DEFAULT_HOLZ_EXCITATION = 0.005
#: Weaker beams enter through Bethe potentials: zero-layer beams up to this
#: multiple of the exact limit, HOLZ beams up to this excitation error.
_BETHE_ZOLZ_FACTOR = 1.6
_BETHE_EXCITATION = 0.05
_BETHE_RATIO = 0.01
#: The larger beam set of the convergence check: both limits scaled by these.
_CONVERGENCE_ZOLZ_FACTOR = 1.3
_CONVERGENCE_HOLZ_FACTOR = 2.5


@dataclass(frozen=True)
class BeamSet:
    """Beams available to a disk calculation.

    Attributes
    ----------
    zolz_hkl : ndarray (n_z, 3)
        The zero-layer beams up to ``zolz_gmax``, 0 0 0 first, by length;
        every direction takes them exactly.
    zolz_weak_hkl : ndarray (n_w, 3)
        Zero-layer beams beyond that, up to 1.6 ``zolz_gmax``, taken through
        Bethe potentials.
    holz_hkl : ndarray (n_h, 3)
        Candidate beams of the layers n >= 1 whose excitation error can come
        below 0.05 1/angstrom in the disk; a group of directions takes
        exactly those it excites below ``holz_excitation`` and the rest
        through Bethe potentials.
    zolz_gmax : float
        1/angstrom.
    holz_excitation : float
        Bound on |s_g| (1/angstrom) for a HOLZ beam to enter exactly.
    """

    zolz_hkl: np.ndarray
    zolz_weak_hkl: np.ndarray
    holz_hkl: np.ndarray
    zolz_gmax: float
    holz_excitation: float


def _centring_allowed(crystal, hkl):
    centring = crystal._absence_tables[0]
    if not len(centring) or not len(hkl):
        return np.ones(len(hkl), dtype=bool)
    phase = hkl @ centring.T
    return np.all(np.abs(phase - np.round(phase)) < 1e-6, axis=1)


def select_beams(crystal, frame, wave_number, disk_mrad, *, gmax=4.0,
                 zolz_gmax=DEFAULT_ZOLZ_GMAX, holz_excitation=DEFAULT_HOLZ_EXCITATION):
    """Zero-layer beams up to ``zolz_gmax`` and the HOLZ beams that can reach the disk.

    Reflections forbidden only by glides or screws are kept (multiple
    scattering excites them); reflections absent through lattice centring
    never couple to the direct beam and are left out.

    Parameters
    ----------
    crystal : Crystal
    frame : ZoneFrame
    wave_number : float
        K, 1/angstrom.
    disk_mrad : float
        Disk radius in mrad.
    gmax : float
        Largest |g| of HOLZ beams, 1/angstrom.
    zolz_gmax, holz_excitation : float
        See :class:`BeamSet`.

    Returns
    -------
    BeamSet
    """
    zolz_gmax = float(zolz_gmax)
    holz_excitation = float(holz_excitation)
    if not (math.isfinite(zolz_gmax) and zolz_gmax > 0):
        raise InputError(f"zolz_gmax must be a positive number of 1/A, got {zolz_gmax:g}")
    if not (math.isfinite(holz_excitation) and 0 < holz_excitation < _BETHE_EXCITATION):
        raise InputError(f"holz_excitation must lie in (0, {_BETHE_EXCITATION:g}) 1/A, got "
                         f"{holz_excitation:g}")
    zone = np.asarray(frame.zone, dtype=np.int64)
    hkl, g = enumerate_reflections(crystal.basis, frame.zone, zolz_gmax * _BETHE_ZOLZ_FACTOR)
    zero = (hkl @ zone == 0) & _centring_allowed(crystal, hkl)
    hkl, length = hkl[zero], np.linalg.norm(g[zero], axis=1)
    order = np.argsort(length, kind="stable")
    hkl, length = hkl[order], length[order]
    zolz = np.concatenate([np.zeros((1, 3), dtype=np.int64), hkl[length <= zolz_gmax]])
    weak = hkl[length > zolz_gmax]
    # at the disk centre s_g equals the gap the enumeration tests; across the disk
    # it changes by at most |g| times the radius
    hkl, g = enumerate_reflections(crystal.basis, frame.zone, gmax, near_disk=(
        wave_number, disk_mrad * 1e-3 + _BETHE_EXCITATION / float(gmax)))
    holz = hkl[(hkl @ zone >= 1) & _centring_allowed(crystal, hkl)]
    _check_beams(len(zolz) + 1)
    return BeamSet(zolz, weak, holz, zolz_gmax, holz_excitation)


def _coupling_block(crystal, rows_hkl, cols_hkl, kv, absorption_ratio):
    """(1 + i a) U_{g-h} for g in rows, h in cols."""
    diff = (rows_hkl[:, None, :] - cols_hkl[None, :, :]).reshape(-1, 3)
    unique, inverse = np.unique(diff, axis=0, return_inverse=True)
    u = potential_coefficients(crystal, unique, kv, absorption_ratio)
    return u[np.ravel(inverse)].reshape(len(rows_hkl), len(cols_hkl))


class _Engine:
    """Every beam of a disk calculation with the couplings between all of them.

    The potentials are computed once; groups of directions take index
    subsets (exact beams, Bethe beams) of this table.
    """

    def __init__(self, crystal, beams, frame, wave_number, kv, absorption_ratio, thickness_A,
                 extra_hkl=()):
        hkl = np.concatenate([beams.zolz_hkl, beams.zolz_weak_hkl, beams.holz_hkl,
                              np.asarray(extra_hkl, dtype=np.int64).reshape(-1, 3)])
        _, first = np.unique(hkl, axis=0, return_index=True)
        self.hkl = hkl[np.sort(first)]
        self.n_zolz = len(beams.zolz_hkl)
        self.zolz_weak = np.arange(self.n_zolz, self.n_zolz + len(beams.zolz_weak_hkl))
        self.holz = np.arange(self.n_zolz + len(beams.zolz_weak_hkl), len(self.hkl))
        self.g = crystal.g_vectors(self.hkl)
        self.coupling = _coupling_block(crystal, self.hkl, self.hkl, kv, absorption_ratio)
        u0 = potential_coefficients(crystal, np.zeros((1, 3)), kv, 0.0)[0].real
        self.coupling[np.diag_indices(len(self.hkl))] -= u0
        self.bound = beams.holz_excitation
        self.frame, self.K, self.thickness_A = frame, wave_number, thickness_A
        self._index = {tuple(h): i for i, h in enumerate(self.hkl.tolist())}

    def index(self, hkl):
        return np.array([self._index[tuple(int(v) for v in h)]
                         for h in np.asarray(hkl).reshape(-1, 3)], dtype=int)

    def excitation(self, idx, t_mrad):
        """|s_g| (1/angstrom) of beams idx at points (p, 2): shape (p, len(idx))."""
        k = incident_wavevectors(np.asarray(t_mrad, dtype=float).reshape(-1, 2), self.frame,
                                 self.K)
        return np.abs(excitation_matrices(self.g[idx], k)) / (2.0 * self.K)

    def group(self, t_mrad, include=(), exclude=()):
        """Group for points t_mrad: the zero layer, ``include`` and the HOLZ beams
        excited below the bound somewhere on the points exactly; the other HOLZ
        candidates and the far zero layer through Bethe potentials."""
        s = self.excitation(self.holz, t_mrad).min(axis=0)
        # exact: excited below the bound, or coupled so strongly to the direct beam
        # that the Bethe ratio |U_g| / (2 K s_g) exceeds 1 %
        strength = np.abs(self.coupling[self.holz, 0]) / (2.0 * self.K)
        near = (s <= self.bound) | (strength >= _BETHE_RATIO * s)
        strong, weak = self.holz[near], self.holz[~near]
        exact = np.concatenate([np.arange(self.n_zolz), np.asarray(include, dtype=int),
                                strong])
        exact = exact[np.sort(np.unique(exact, return_index=True)[1])]
        exact = exact[~np.isin(exact, np.asarray(exclude, dtype=int))]
        weak = np.concatenate([self.zolz_weak, weak])
        return _Group(self, exact, weak[~np.isin(weak, exact)])


class _Group:
    """Exact beams and Bethe beams of an engine, solved for stacks of disk points.

    Weak beams w enter through second-order Bethe potentials (Bethe 1928;
    Spence and Zuo 1992, ch. 3): U_gh -> U_gh - sum_w U_gw U_wh / (2 K s_w),
    the eigenvalue in the denominator neglected beside 2 K s_w.
    """

    def __init__(self, engine, exact, weak):
        _check_beams(len(exact))
        self.engine, self.exact, self.weak = engine, exact, weak
        self.hkl = engine.hkl[exact]
        self.coupling = engine.coupling[np.ix_(exact, exact)]
        self.to_weak = engine.coupling[np.ix_(exact, weak)]
        self.from_weak = engine.coupling[np.ix_(weak, exact)]

    def __len__(self):
        return len(self.exact)

    def without(self, idx):
        keep = ~np.isin(self.exact, np.asarray(idx, dtype=int))
        return _Group(self.engine, self.exact[keep], self.weak)

    def direct(self, t_mrad):
        """Direct-beam intensity at disk points (..., 2) in mrad."""
        eng = self.engine
        t = np.asarray(t_mrad, dtype=float)
        k = incident_wavevectors(t.reshape(-1, 2), eng.frame, eng.K)
        kn = -k @ eng.frame.beam_direction
        diagonal = excitation_matrices(eng.g[self.exact], k)
        m, n = diagonal.shape
        amp = np.empty(m, dtype=complex)
        step = max(1, int(_CHUNK_BYTES // (16.0 * n * max(n, len(self.weak)) * 4)))
        for start in range(0, m, step):
            sl = slice(start, min(m, start + step))
            coupling = self.coupling
            if len(self.weak):
                inv = 1.0 / excitation_matrices(eng.g[self.weak], k[sl])
                coupling = coupling - (self.to_weak[None] * inv[:, None, :]) @ self.from_weak
            amp[sl] = _solve_stack(diagonal[sl], coupling, kn[sl], eng.thickness_A,
                                   np.array([0]))[:, 0]
        return (amp.real ** 2 + amp.imag ** 2).reshape(t.shape[:-1])


# ---------------------------------------------------------------------------
# dynamical line minima
# ---------------------------------------------------------------------------

_SAMPLE_FRACTIONS = np.linspace(-0.94, 0.94, 95)
_MIN_SEPARATION_MRAD = 0.2
_COARSE = 17


@dataclass
class DynamicalLines:
    """Deficit minima of the direct beam along each line of a pattern.

    Per-line arrays follow the order of the pattern's lines.  Per-point
    lists hold one array per line (possibly empty).

    Attributes
    ----------
    hkl : ndarray (L, 3)
    minima_mrad : list of ndarray (k_i, 2)
        Positions of the deficit minimum in the disk frame, mrad.
    shift_mrad : list of ndarray (k_i,)
        Signed distance of each minimum from the exact kinematic locus along
        its normal (positive along ``normal_points``), mrad.
    locus_mrad, normal_points : list of ndarray (k_i, 2)
        The kinematic locus point each minimum was sought from and the unit
        normal there.
    contrast_points, width_points_mrad : list of ndarray (k_i,)
        Depth relative to the local disk intensity (the intensity without
        this line's beam) and full width at half depth at each point.
    contrast, width_mrad : ndarray (L,)
        Medians over the points of each line (NaN where none was found).
    thickness_nm, absorption_ratio : float
    n_beams : int
        Largest beam count of any group of directions.
    n_zolz : int
        Zero-layer beams in every group.
    convergence_mrad : float or None
        Largest change of a minimum when the beam set grows (both limits
        enlarged); None when not checked.
    zolz_gmax, holz_excitation : float
        Limits of the beam set used.
    """

    hkl: np.ndarray
    minima_mrad: list
    shift_mrad: list
    locus_mrad: list
    normal_points: list
    contrast_points: list
    width_points_mrad: list
    contrast: np.ndarray
    width_mrad: np.ndarray
    thickness_nm: float
    absorption_ratio: float
    n_beams: int
    n_zolz: int
    convergence_mrad: float | None
    zolz_gmax: float
    holz_excitation: float
    warnings: list = field(default_factory=list)

    @property
    def mean_shift_mrad(self):
        """Mean shift of each line (NaN where no minimum was found)."""
        return np.array([np.nanmean(s) if np.any(np.isfinite(s)) else np.nan
                         for s in self.shift_mrad])

    def summary(self):
        """Top-level description for documents."""
        return {"thickness_nm": self.thickness_nm, "absorption_ratio": self.absorption_ratio,
                "n_beams": self.n_beams, "n_zero_layer_beams": self.n_zolz,
                "zero_layer_gmax_inv_A": self.zolz_gmax,
                "holz_excitation_inv_A": self.holz_excitation,
                "convergence_mrad": self.convergence_mrad,
                "method": "Bloch-wave eigen-solution, high-energy forward-scattering "
                          "approximation, proportional absorption (exact complex "
                          "eigenvectors)"}


def _sample_points(pattern, index, n_points):
    """Locus points (rad) and normals of line ``index`` away from the other lines."""
    lp = line_parameters(pattern.crystal.g_vectors(pattern.hkl), pattern.frame,
                         pattern.beam.wave_number)
    one = LineParameters(lp.g_perp[index:index + 1], lp.g_perp_norm[index:index + 1],
                         lp.gz[index:index + 1], lp.c[index:index + 1])
    points, normals, half = locus_samples(one, pattern.disk_mrad * 1e-3, _SAMPLE_FRACTIONS)
    points, normals = points[0], normals[0]
    others = np.delete(np.arange(pattern.n_lines), index)
    if len(others):
        sub = LineParameters(lp.g_perp[others], lp.g_perp_norm[others], lp.gz[others],
                             lp.c[others])
        dist = np.abs(locus_distances(np.broadcast_to(points, (len(others),) + points.shape),
                                      sub)) * 1e3
        nearest = dist.min(axis=0)
    else:
        nearest = np.full(len(points), np.inf)
    keep = np.flatnonzero(nearest >= _MIN_SEPARATION_MRAD)
    if len(keep) > n_points:
        keep = keep[np.unique(np.round(np.linspace(0, len(keep) - 1, n_points)).astype(int))]
    return points[keep], normals[keep], nearest[keep], float(2 * half[0])


def _window_mrad(pattern, index, thickness_A, nearest_mrad):
    """Half-width of the scan across the line at each point, mrad."""
    g = pattern.crystal.g_vectors(pattern.hkl[index:index + 1])
    g_perp = np.linalg.norm(pattern.frame.components(g)[0, :2])
    # the kinematic profile sinc^2(pi t s) has its first zeros at s = +-1/t, i.e.
    # 1/(t G) rad from the locus; 2.5 of those hold the profile and its shift
    w = min(max(2.5e3 / (thickness_A * g_perp), 0.15), 1.0)
    return np.minimum(w, 0.5 * nearest_mrad)


def _refine_minimum(ratio, u_best, step, n_stage=(7, 5), divide=3.0):
    """Sharpen minima of ``ratio(u)`` (u (k, c) -> (k, c)) around u_best (k,).

    Two finer scans (seven points at step/3, five at step/9) and a
    parabola through the lowest point of the last one and its neighbours.
    Returns (u, value).
    """
    u = np.array(u_best, dtype=float)
    h = np.array(step, dtype=float)
    rows = np.arange(len(u))
    for n in n_stage:
        h = h / divide
        uu = u[:, None] + (np.arange(n) - (n - 1) / 2)[None, :] * h[:, None]
        vals = ratio(uu)
        k = np.clip(np.argmin(vals, axis=1), 1, n - 2)
        y0, y1, y2 = vals[rows, k - 1], vals[rows, k], vals[rows, k + 1]
        curv = y0 - 2 * y1 + y2
        with np.errstate(divide="ignore", invalid="ignore"):
            vertex = np.clip(np.where(curv > 0, 0.5 * (y0 - y2) / curv, 0.0), -1, 1)
        u = uu[rows, k] + vertex * h
        value = y1 - 0.25 * (y0 - y2) * vertex
    return u, value


def dynamical_lines(pattern, thickness_nm, *, absorption_ratio=DEFAULT_ABSORPTION_RATIO,
                    zolz_gmax=DEFAULT_ZOLZ_GMAX, holz_excitation=DEFAULT_HOLZ_EXCITATION,
                    n_points=5, check_convergence=True, lines=None):
    """Dynamical deficit minima, contrast and width of the lines of a pattern.

    For each line, points on its exact kinematic locus (at most ``n_points``,
    spread along the chord, none within 0.2 mrad of another line) are the
    starts of scans of the direct-beam intensity across the line, along the
    locus normal.  The minimum of each scan is located by a coarse scan, two
    finer ones and a parabola.  The beam set of a line's scans is the zero
    layer up to ``zolz_gmax`` plus every HOLZ beam whose excitation error
    comes below ``holz_excitation`` somewhere on them (the line's own beam
    always); weaker beams enter through Bethe potentials.  The scans follow
    the direct-beam intensity divided by the local disk intensity (what the
    zero-layer beams alone give there, smooth across a line), so a sloping
    disk does not pull the minimum; the depth is 1 minus that ratio at the
    minimum and the width the full width at half that depth.

    Parameters
    ----------
    pattern : laueline.lines.Pattern
        The lines (and the crystal, frame, beam and disk) to compute; its
        wave number is that of the excitation errors.
    thickness_nm : float
        (0, 2000] nm.
    absorption_ratio : float
        a in U'_g = a U_g, [0, 1).
    zolz_gmax, holz_excitation : float
        Beam-set limits (see :func:`select_beams`).
    n_points : int
        Largest number of points per line (at least 5 are kept on a line
        longer than 1 mrad unless other lines cover it).
    check_convergence : bool
        Recompute the minima at the two middle points of each line with both
        limits enlarged (zero layer 1.3 times, HOLZ excitation 2.5 times)
        and report the largest change.
    lines : sequence of int, optional
        Indices of the pattern's lines to compute (all by default); the
        others get empty entries.

    Returns
    -------
    DynamicalLines
    """
    t = check_thickness(thickness_nm)
    a = check_absorption_ratio(absorption_ratio)
    if int(n_points) < 5:
        raise InputError(f"n_points must be at least 5, got {n_points}")
    thickness_A = t * 10.0
    crystal, frame = pattern.crystal, pattern.frame
    K, kv = pattern.beam.wave_number, pattern.beam.kv
    beams = select_beams(crystal, frame, K, pattern.disk_mrad, gmax=pattern.gmax,
                         zolz_gmax=zolz_gmax, holz_excitation=holz_excitation)
    bigger = None
    if check_convergence:
        bigger = select_beams(crystal, frame, K, pattern.disk_mrad, gmax=pattern.gmax,
                              zolz_gmax=zolz_gmax * _CONVERGENCE_ZOLZ_FACTOR,
                              holz_excitation=holz_excitation * _CONVERGENCE_HOLZ_FACTOR)
    engine = _Engine(crystal, beams, frame, K, kv, a, thickness_A, extra_hkl=pattern.hkl)
    big_engine = None if bigger is None else _Engine(crystal, bigger, frame, K, kv, a,
                                                     thickness_A, extra_hkl=pattern.hkl)
    wanted = range(pattern.n_lines) if lines is None else [int(i) for i in lines]
    L = pattern.n_lines
    empty2, empty1 = np.zeros((0, 2)), np.zeros(0)
    out = {k: [empty2] * L for k in ("minima", "locus", "normal")}
    out.update({k: [empty1] * L for k in ("shift", "contrast", "width")})
    n_beams, change, warnings = len(beams.zolz_hkl), [], []
    for i in wanted:
        base, normal, nearest, length = _sample_points(pattern, i, n_points)
        if length > 1.0 and len(base) < 5:
            warnings.append(f"line {' '.join(map(str, pattern.hkl[i]))}: only {len(base)} "
                            "points lie 0.2 mrad or more from other lines")
        if not len(base):
            continue
        base = base * 1e3
        w = _window_mrad(pattern, i, thickness_A, nearest)
        grid = np.linspace(-1.0, 1.0, _COARSE)[None, :] * w[:, None]
        scan = base[:, None, :] + grid[..., None] * normal[:, None, :]
        own = engine.index(pattern.hkl[i])
        group = engine.group(scan, include=own)
        n_beams = max(n_beams, len(group))
        rows = np.arange(len(base))
        # local disk intensity: the same beams without the line's own, smooth
        # across the scan (three points and a parabola)
        without = group.without(own)
        ends = np.stack([grid[:, 0], np.zeros(len(base)), grid[:, -1]], axis=1)
        bg3 = without.direct(base[:, None, :] + ends[..., None] * normal[:, None, :])
        coef = np.array([np.polyfit(ends[r], bg3[r], 2) for r in rows])  # (k, 3), tiny

        def ratio(uu, sub, solver=group):
            bg = coef[sub, :1] * uu ** 2 + coef[sub, 1:2] * uu + coef[sub, 2:]
            return solver.direct(base[sub, None, :] + uu[..., None] * normal[sub, None, :]) / bg

        relative = ratio(grid, rows)
        k0 = np.argmin(relative, axis=1)
        found = (k0 > 0) & (k0 < _COARSE - 1)
        step = grid[:, 1] - grid[:, 0]
        u_min, r_min = _refine_minimum(lambda uu: ratio(uu, rows), grid[rows, k0], step)
        depth = 1.0 - r_min
        width = _half_depth_width(grid, relative - 1.0, k0, depth)
        u_min = np.where(found, u_min, np.nan)
        if bigger is not None and np.any(found):
            big = big_engine.group(scan, include=big_engine.index(pattern.hkl[i]))
            # the check runs on the two points nearest the middle of the line
            sub = rows[found][np.argsort(np.abs(np.flatnonzero(found) - len(rows) / 2))[:2]]
            u_big, _ = _refine_minimum(lambda uu: ratio(uu, sub, big), u_min[sub], step[sub])
            change.append(np.max(np.abs(u_big - u_min[sub])))
        out["minima"][i] = base + u_min[:, None] * normal
        out["locus"][i], out["normal"][i] = base, normal
        out["shift"][i] = u_min
        out["contrast"][i] = np.where(found, depth, np.nan)
        out["width"][i] = np.where(found, width, np.nan)

    def median(values):
        return np.array([np.nanmedian(v) if np.any(np.isfinite(v)) else np.nan
                         for v in values])

    return DynamicalLines(
        hkl=pattern.hkl.copy(), minima_mrad=out["minima"], shift_mrad=out["shift"],
        locus_mrad=out["locus"], normal_points=out["normal"],
        contrast_points=out["contrast"], width_points_mrad=out["width"],
        contrast=median(out["contrast"]), width_mrad=median(out["width"]),
        thickness_nm=t, absorption_ratio=a, n_beams=int(n_beams),
        n_zolz=len(beams.zolz_hkl),
        convergence_mrad=(float(max(change)) if change else None) if check_convergence
        else None,
        zolz_gmax=beams.zolz_gmax, holz_excitation=beams.holz_excitation, warnings=warnings)


def _half_depth_width(grid, relative, k0, depth):
    """Full width at half depth of profiles ``relative`` (k, c) with minima at k0."""
    c = grid.shape[1]
    idx = np.arange(c)[None, :]
    above = relative > -0.5 * depth[:, None]
    left_mask = above & (idx < k0[:, None])
    right_mask = above & (idx > k0[:, None])
    has_left, has_right = left_mask.any(axis=1), right_mask.any(axis=1)
    li = np.where(has_left, c - 1 - np.argmax(left_mask[:, ::-1], axis=1), 0)
    ri = np.where(has_right, np.argmax(right_mask, axis=1), c - 1)
    rows = np.arange(len(grid))

    def cross(i_out, i_in):
        y_out, y_in = relative[rows, i_out], relative[rows, i_in]
        x_out, x_in = grid[rows, i_out], grid[rows, i_in]
        level = -0.5 * depth
        with np.errstate(divide="ignore", invalid="ignore"):
            return x_out + (level - y_out) * (x_in - x_out) / (y_in - y_out)

    left = cross(li, np.minimum(li + 1, c - 1))
    right = cross(ri, np.maximum(ri - 1, 0))
    return np.where(has_left & has_right & (depth > 0), right - left, np.nan)


# ---------------------------------------------------------------------------
# the whole disk
# ---------------------------------------------------------------------------

#: Zero-layer beams taken exactly for disk images (a smaller set than for the
#: line minima: an image needs the look of the lines, not 1e-3 mrad).
IMAGE_ZOLZ_GMAX = 1.5
_IMAGE_CELL_MRAD = 0.5


def disk_intensity(pattern, t_mrad, thickness_nm, *, absorption_ratio=DEFAULT_ABSORPTION_RATIO,
                   zolz_gmax=IMAGE_ZOLZ_GMAX, holz_excitation=DEFAULT_HOLZ_EXCITATION):
    """Direct-beam (bright-field) intensity at points of the central disk.

    Every point is solved with the zero-layer beams up to ``zolz_gmax`` and
    the HOLZ beams whose excitation error there is below ``holz_excitation``
    somewhere in its 0.5 mrad square cell of the disk taken exactly, the
    others (up to 0.05 1/angstrom, and the zero layer up to 1.6
    ``zolz_gmax``) through Bethe potentials.  The points of a cell are solved
    together as one stack.

    Parameters
    ----------
    pattern : laueline.lines.Pattern
        Crystal, frame, wave number and disk.
    t_mrad : array_like, shape (..., 2)
        Disk points in mrad.
    thickness_nm, absorption_ratio, zolz_gmax, holz_excitation :
        As for :func:`dynamical_lines`.

    Returns
    -------
    intensity : ndarray, shape (...)
        |phi_0|^2 for unit incident intensity.
    n_beams : int
        Largest number of exact beams of any group of points.
    """
    t = check_thickness(thickness_nm)
    a = check_absorption_ratio(absorption_ratio)
    points = np.asarray(t_mrad, dtype=float)
    flat = points.reshape(-1, 2)
    crystal, frame = pattern.crystal, pattern.frame
    K, kv = pattern.beam.wave_number, pattern.beam.kv
    beams = select_beams(crystal, frame, K, pattern.disk_mrad, gmax=pattern.gmax,
                         zolz_gmax=zolz_gmax, holz_excitation=holz_excitation)
    engine = _Engine(crystal, beams, frame, K, kv, a, t * 10.0)
    cand = engine.holz
    # points are solved in square cells of the disk; each cell takes exactly the
    # HOLZ beams excited below the bound at any of its points
    cell = np.floor(flat / _IMAGE_CELL_MRAD).astype(np.int64)
    _, inverse = np.unique(cell, axis=0, return_inverse=True)
    inverse = np.ravel(inverse)
    order = np.argsort(inverse, kind="stable")
    bounds = np.flatnonzero(np.diff(inverse[order])) + 1
    out = np.empty(len(flat))
    n_beams = len(beams.zolz_hkl)
    for members in np.split(order, bounds):
        group = engine.group(flat[members])
        n_beams = max(n_beams, len(group))
        out[members] = group.direct(flat[members])
    return out.reshape(points.shape[:-1]), int(n_beams)


def disk_intensity_grid(pattern, thickness_nm, *, absorption_ratio=DEFAULT_ABSORPTION_RATIO,
                        n=81):
    """Disk intensity on an n x n grid over the disk, for figures.

    Returns
    -------
    image : ndarray (n, n)
        Rows run along t_y upward, columns along t_x; NaN outside the disk.
    half_width_mrad : float
        The grid spans [-half, half] mrad on both axes.
    """
    half = float(pattern.disk_mrad)
    axis = np.linspace(-half, half, int(n))
    tx, ty = np.meshgrid(axis, axis)
    points = np.stack([tx, ty], axis=-1)
    inside = np.hypot(tx, ty) <= half * (1 + 1e-9)
    image = np.full(tx.shape, np.nan)
    image[inside] = disk_intensity(pattern, points[inside], thickness_nm,
                                   absorption_ratio=absorption_ratio)[0]
    return image, half
