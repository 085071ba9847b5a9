"""Beam sets of a disk calculation: exact beams near each direction, Bethe beams.

The zero-layer beams up to a reciprocal-length limit enter every direction
exactly; HOLZ beams enter exactly where their excitation error is small
(or their Bethe ratio |U_g| / (2 K s_g) large) and through second-order
Bethe potentials elsewhere (Bethe 1928; Spence and Zuo, *Electron
Microdiffraction*, 1992, ch. 3).  Directions that need the same exact beams
are solved together as one stack of matrices.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from ..frame import incident_wavevectors
from ..lines import enumerate_reflections
from .bloch import _CHUNK_BYTES, _check_beams, _solve_stack, excitation_matrices, \
    potential_coefficients

__all__ = ["BeamSet", "select_beams", "DEFAULT_ZOLZ_GMAX", "DEFAULT_HOLZ_EXCITATION"]



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
_PRODUCTS_BYTES = 256e6
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
        return np.abs(self.signed_excitation(idx, t_mrad))

    def signed_excitation(self, idx, t_mrad):
        """s_g (1/angstrom) of beams idx at points (p, 2): shape (p, len(idx))."""
        k = incident_wavevectors(np.asarray(t_mrad, dtype=float).reshape(-1, 2), self.frame,
                                 self.K)
        return excitation_matrices(self.g[idx], k) / (2.0 * self.K)

    def group(self, t_mrad, include=(), exclude=()):
        """Group for points t_mrad: the zero layer, ``include`` and the HOLZ beams
        excited below the bound somewhere on the points exactly; the other HOLZ
        candidates and the far zero layer through Bethe potentials.

        A beam whose excitation error changes sign between the points (its
        line runs between them) counts as excited, so the corners of a cell
        of the disk define the group of every point inside it.  Beams
        ``exclude`` are left out altogether (neither exact nor Bethe)."""
        signed = self.signed_excitation(self.holz, t_mrad)
        s = np.where((signed.min(axis=0) < 0) & (signed.max(axis=0) > 0), 0.0,
                     np.abs(signed).min(axis=0))
        # exact: excited below the bound, or coupled so strongly to the direct beam
        # that the Bethe ratio |U_g| / (2 K s_g) exceeds 1 %
        strength = np.abs(self.coupling[self.holz, 0]) / (2.0 * self.K)
        near = (s <= self.bound) | (strength >= _BETHE_RATIO * s)
        strong, weak = self.holz[near], self.holz[~near]
        exact = np.concatenate([np.arange(self.n_zolz), np.asarray(include, dtype=int),
                                strong])
        exact = exact[np.sort(np.unique(exact, return_index=True)[1])]
        exclude = np.asarray(exclude, dtype=int)
        exact = exact[~np.isin(exact, exclude)]
        weak = np.concatenate([self.zolz_weak, weak])
        return _Group(self, exact, weak[~np.isin(weak, exact) & ~np.isin(weak, exclude)])


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
        # products U_gw U_wh of every weak beam, so that the Bethe terms of a stack
        # of directions are one matrix product (m, w) @ (w, n^2)
        n, w = len(exact), len(weak)
        self.products = None
        if w and 16.0 * w * n * n <= _PRODUCTS_BYTES:
            self.products = (self.to_weak.T[:, :, None] * self.from_weak[:, None, :]).reshape(
                w, n * n)

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
                if self.products is not None:
                    coupling = coupling - (inv @ self.products).reshape(-1, n, n)
                else:
                    coupling = coupling - (self.to_weak[None] * inv[:, None, :]) @ self.from_weak
            amp[sl] = _solve_stack(diagonal[sl], coupling, kn[sl], eng.thickness_A,
                                   np.array([0]))[:, 0]
        return (amp.real ** 2 + amp.imag ** 2).reshape(t.shape[:-1])
