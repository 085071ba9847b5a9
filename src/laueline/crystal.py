"""Crystals: CIF reading, basis matrices, symmetry and electron structure factors.

Conventions (see DESIGN.md):

* The direct basis matrix ``A`` has the cell vectors a, b, c as columns in a
  Cartesian frame with x along a and y in the a-b plane (the orthogonalisation
  used by gemmi and the PDB).  Lengths are in angstrom.
* The reciprocal basis is ``A* = inv(A).T``; a reflection (h k l) has the
  Cartesian reciprocal vector ``g = A* @ (h, k, l)`` in 1/angstrom without a
  factor 2*pi, so ``|g| = 1/d``.
* A strain ``e`` (symmetric 3x3, or its six components in the order
  exx eyy ezz eyz exz exy, tensor not engineering shears) maps the basis to
  ``(I + e) A`` in the same Cartesian frame.  Strained crystals keep the
  fractional sites and the space-group operations of the reference, which is
  what kinematic selection rules depend on.

Structure factors are kinematic electron structure factors

    F(g) = sum_j occ_j f_j(s) exp(-B_j s^2) exp(2 pi i h.x_j),   s = |g| / 2,

in angstrom, with f_j the elastic electron scattering factors of neutral
atoms of International Tables for Crystallography Vol. C, Table 4.3.2.2
(the five-Gaussian fits of Peng, Ren, Dudarev and Whelan, Acta Cryst. A52
(1996) 257), as tabulated in gemmi.  They are non-relativistic: multiply by
the relativistic factor gamma of :mod:`laueline.optics` to obtain the
scattering of a fast electron.  The sum runs over all sites of the unit cell.
"""

from __future__ import annotations

import dataclasses
import math
import warnings as _warnings
from dataclasses import dataclass, field
from functools import cached_property
from importlib import resources
from pathlib import Path

import numpy as np

from .errors import InputError

__all__ = [
    "Crystal",
    "read_crystal",
    "bundled_structures",
    "basis_from_cell",
    "cell_from_basis",
    "strain_tensor",
    "MAX_REFLECTIONS",
]

#: Largest number of (h, k, l) grid points an enumeration may allocate.
#: 2e7 points use about 0.5 GB per float64 vector triple.
MAX_REFLECTIONS = 20_000_000

_CLOSE_ATOMS_A = 0.5


def basis_from_cell(a, b, c, alpha, beta, gamma):
    """Direct basis matrix (columns a, b, c) from cell parameters.

    Parameters
    ----------
    a, b, c : float
        Cell lengths in angstrom.
    alpha, beta, gamma : float
        Cell angles in degrees.

    Returns
    -------
    ndarray, shape (3, 3)
        Columns are the cell vectors, x along a, y in the a-b plane.
    """
    values = np.array([a, b, c, alpha, beta, gamma], dtype=float)
    if not np.all(np.isfinite(values)):
        raise InputError("cell parameters must be finite numbers")
    if min(a, b, c) <= 0:
        raise InputError(f"cell lengths must be positive, got {a:g} {b:g} {c:g}")
    al, be, ga = np.radians([alpha, beta, gamma])
    cos_al, cos_be, cos_ga = np.cos([al, be, ga])
    sin_ga = np.sin(ga)
    cx = c * cos_be
    cy = c * (cos_al - cos_be * cos_ga) / sin_ga
    cz2 = c * c - cx * cx - cy * cy
    if cz2 <= 0 or sin_ga <= 1e-12:
        raise InputError(
            f"cell angles {alpha:g} {beta:g} {gamma:g} deg do not form a cell")
    return np.array([[a, b * cos_ga, cx],
                     [0.0, b * sin_ga, cy],
                     [0.0, 0.0, math.sqrt(cz2)]])


def cell_from_basis(basis):
    """Cell parameters (a, b, c in angstrom; alpha, beta, gamma in degrees)."""
    basis = np.asarray(basis, dtype=float)
    a, b, c = np.linalg.norm(basis, axis=0)
    va, vb, vc = basis.T
    alpha = math.degrees(math.acos(np.clip(vb @ vc / (b * c), -1, 1)))
    beta = math.degrees(math.acos(np.clip(va @ vc / (a * c), -1, 1)))
    gamma = math.degrees(math.acos(np.clip(va @ vb / (a * b), -1, 1)))
    return np.array([a, b, c, alpha, beta, gamma])


def strain_tensor(e):
    """Symmetric 3x3 strain tensor from six components or a 3x3 array.

    Six components are read in the order exx eyy ezz eyz exz exy (tensor
    components, not engineering shears).
    """
    e = np.asarray(e, dtype=float)
    if e.shape == (6,):
        exx, eyy, ezz, eyz, exz, exy = e
        e = np.array([[exx, exy, exz], [exy, eyy, eyz], [exz, eyz, ezz]])
    elif e.shape != (3, 3):
        raise InputError(f"a strain has six components or is 3x3, got shape {e.shape}")
    if not np.all(np.isfinite(e)):
        raise InputError("strain components must be finite numbers")
    if not np.allclose(e, e.T, atol=1e-12):
        raise InputError("a strain tensor must be symmetric")
    return e


@dataclass(frozen=True)
class _Ops:
    """Space-group operations as arrays, for vectorised selection rules."""

    rotations: np.ndarray     # (m, 3, 3) integer, acting on fractional coordinates
    translations: np.ndarray  # (m, 3) fractional


@dataclass(frozen=True, eq=False)
class Crystal:
    """A crystal structure with every site of the unit cell listed.

    Build one with :func:`read_crystal`; derive strained or re-celled copies
    with :meth:`strained`, :meth:`with_cell` and :meth:`with_b_iso`.

    Attributes
    ----------
    name : str
        Structure name (bundled name, CIF block name or file stem).
    basis : ndarray, shape (3, 3)
        Direct basis matrix A, columns a, b, c in angstrom.
    fractional : ndarray, shape (n, 3)
        Fractional coordinates of all sites in the unit cell.
    elements : tuple of str
        Element symbol of each site.
    occupancy : ndarray, shape (n,)
    b_iso : ndarray, shape (n,)
        Isotropic temperature factors B in angstrom^2.
    space_group_number : int
    space_group_symbol : str
        Extended Hermann-Mauguin symbol (with origin choice / axes).
    notes : tuple of str
        What was assumed or changed while reading, for the report.
    """

    name: str
    basis: np.ndarray
    fractional: np.ndarray
    elements: tuple
    occupancy: np.ndarray
    b_iso: np.ndarray
    space_group_number: int
    space_group_symbol: str
    ops: _Ops = field(repr=False)
    notes: tuple = ()
    source: str = ""

    # -- geometry -----------------------------------------------------------
    @property
    def cell(self):
        """Cell parameters a, b, c (angstrom), alpha, beta, gamma (degrees)."""
        return cell_from_basis(self.basis)

    @property
    def reciprocal_basis(self):
        """Reciprocal basis A* = inv(A).T; columns a*, b*, c* in 1/angstrom."""
        return np.linalg.inv(self.basis).T

    @property
    def volume(self):
        """Unit-cell volume in angstrom^3."""
        return abs(float(np.linalg.det(self.basis)))

    @property
    def n_sites(self):
        return len(self.elements)

    @property
    def formula(self):
        """Reduced chemical formula from the cell content, e.g. ``'Al2O3'``.

        Elements appear in the order of the CIF's site list.
        """
        counts = {}
        for el, occ in zip(self.elements, self.occupancy):
            counts[el] = counts.get(el, 0.0) + float(occ)
        rounded = {el: round(n) for el, n in counts.items()}
        if all(abs(n - rounded[el]) < 1e-3 and rounded[el] > 0 for el, n in counts.items()):
            div = math.gcd(*rounded.values())
            parts = [(el, rounded[el] // div) for el in rounded]
            return "".join(el + (str(n) if n != 1 else "") for el, n in parts)
        return "".join(f"{el}{counts[el]:.3g}" for el in counts)

    def g_vectors(self, hkl):
        """Cartesian reciprocal vectors (1/angstrom) of reflections ``hkl`` (n, 3)."""
        hkl = np.asarray(hkl, dtype=float)
        return hkl @ self.reciprocal_basis.T

    def d_spacing(self, hkl):
        """Interplanar spacings d = 1/|g| in angstrom."""
        return 1.0 / np.linalg.norm(self.g_vectors(hkl), axis=-1)

    def direction(self, uvw):
        """Cartesian direction (angstrom) of the lattice vector [u v w]."""
        return np.asarray(uvw, dtype=float) @ self.basis.T

    # -- symmetry -----------------------------------------------------------
    def is_absent(self, hkl):
        """Systematic absences of the space group, vectorised.

        A reflection h is absent when some operation (R, t) leaves it invariant,
        h R = h, while h.t is not an integer.  Pure translations (lattice
        centring) are tested first on all reflections; the remaining test runs
        over one operation per distinct rotation, which suffices because a
        reflection passing the centring test has the same phase h.t for every
        centring copy of an operation.

        Parameters
        ----------
        hkl : array_like of int, shape (n, 3)

        Returns
        -------
        ndarray of bool, shape (n,)
        """
        hkl = np.atleast_2d(np.asarray(hkl, dtype=np.int64))
        centring, rotations, translations = self._absence_tables
        absent = np.zeros(len(hkl), dtype=bool)
        if len(centring):
            phase = hkl @ centring.T
            absent |= np.any(np.abs(phase - np.round(phase)) > 1e-6, axis=1)
        for rot, tran in zip(rotations, translations):
            invariant = np.all(hkl @ rot == hkl, axis=1)
            phase = hkl @ tran
            absent |= invariant & (np.abs(phase - np.round(phase)) > 1e-6)
        return absent

    @cached_property
    def _absence_tables(self):
        rot, tran = self.ops.rotations, self.ops.translations
        identity = np.all(rot == np.eye(3, dtype=np.int64), axis=(1, 2))
        centring = tran[identity]
        centring = centring[np.any(np.abs(centring - np.round(centring)) > 1e-9, axis=1)]
        _, first = np.unique(rot.reshape(len(rot), 9), axis=0, return_index=True)
        first = np.sort(first)
        t = tran[first]
        screw_or_glide = np.any(np.abs(t - np.round(t)) > 1e-9, axis=1)
        keep = first[screw_or_glide]
        return centring, rot[keep], tran[keep]

    def point_group_rotations(self):
        """Distinct rotation parts of the space group, (m, 3, 3) in fractional form."""
        return np.unique(self.ops.rotations, axis=0)

    # -- scattering -----------------------------------------------------------
    @cached_property
    def _scattering(self):
        import gemmi

        unique = sorted(set(self.elements))
        coef_a = np.empty((len(unique), 5))
        coef_b = np.empty((len(unique), 5))
        for i, el in enumerate(unique):
            a_b = gemmi.Element(el).c4322.get_coefs()
            coef_a[i], coef_b[i] = a_b[:5], a_b[5:]
        index = np.array([unique.index(el) for el in self.elements])
        return coef_a, coef_b, index

    def scattering_factors(self, s2):
        """Electron scattering factor of every site at s^2 = (sin(theta)/lambda)^2.

        Parameters
        ----------
        s2 : array_like, shape (n,)
            (sin theta / lambda)^2 = |g|^2 / 4 in 1/angstrom^2.

        Returns
        -------
        ndarray, shape (n, n_sites)
            f_j(s) exp(-B_j s^2) occ_j in angstrom.
        """
        coef_a, coef_b, index = self._scattering
        s2 = np.asarray(s2, dtype=float)[:, None, None]
        per_element = np.sum(coef_a * np.exp(-coef_b * s2), axis=2)  # (n, n_el)
        return (per_element[:, index] * np.exp(-self.b_iso * s2[:, :, 0])
                * self.occupancy)

    def structure_factors(self, hkl):
        """Kinematic electron structure factors F(hkl) in angstrom (complex).

        Non-relativistic (see the module docstring); includes occupancies and
        the Debye-Waller factors exp(-B s^2).
        """
        hkl = np.atleast_2d(np.asarray(hkl, dtype=float))
        g2 = np.sum(self.g_vectors(hkl) ** 2, axis=1)
        f = self.scattering_factors(g2 / 4.0)
        phase = np.exp(2j * np.pi * (hkl @ self.fractional.T))
        return np.sum(f * phase, axis=1)

    def forward_scattering(self):
        """Sum of occ * f(0) over the cell in angstrom (F at g = 0)."""
        return float(np.sum(self.scattering_factors(np.zeros(1))))

    # -- derived crystals -----------------------------------------------------
    def strained(self, e):
        """The crystal with basis (I + e) A, same fractional sites.

        Parameters
        ----------
        e : array_like
            Symmetric strain, six components exx eyy ezz eyz exz exy or 3x3.
        """
        e = strain_tensor(e)
        basis = (np.eye(3) + e) @ self.basis
        if abs(np.linalg.det(basis)) < 1e-9 * abs(np.linalg.det(self.basis)) or \
                np.linalg.det(basis) * np.linalg.det(self.basis) <= 0:
            raise InputError("the strain makes the basis singular or inverts it")
        return dataclasses.replace(self, basis=basis)

    def with_basis(self, basis):
        """The crystal with another direct basis matrix, same fractional sites."""
        basis = np.asarray(basis, dtype=float)
        if basis.shape != (3, 3) or not np.all(np.isfinite(basis)) or \
                abs(np.linalg.det(basis)) < 1e-9:
            raise InputError("a basis matrix must be a finite, non-singular 3x3 array")
        return dataclasses.replace(self, basis=basis)

    def with_cell(self, a, b, c, alpha, beta, gamma):
        """The crystal with new cell parameters (standard orientation)."""
        return self.with_basis(basis_from_cell(a, b, c, alpha, beta, gamma))

    def with_b_iso(self, b_iso):
        """The crystal with one isotropic B (angstrom^2) for all atoms."""
        if not np.isfinite(b_iso) or b_iso < 0:
            raise InputError(f"B must be a non-negative number of angstrom^2, got {b_iso}")
        note = f"B set to {b_iso:g} A^2 for all atoms"
        return dataclasses.replace(self, b_iso=np.full(self.n_sites, float(b_iso)),
                                   notes=self.notes + (note,))

    def summary(self):
        """Dictionary for reports: name, cell, space group."""
        return {
            "name": self.name,
            "formula": self.formula,
            "cell": [float(v) for v in self.cell],
            "space_group": {"number": int(self.space_group_number),
                            "symbol": self.space_group_symbol},
        }


# ---------------------------------------------------------------------------
# reading
# ---------------------------------------------------------------------------

def _structure_dir():
    return resources.files("laueline").joinpath("structures")


def bundled_structures():
    """Names of the bundled structures, usable wherever a CIF path is."""
    return sorted(p.name[:-4] for p in _structure_dir().iterdir()
                  if p.name.endswith(".cif"))


def _resolve_bundled(name):
    names = bundled_structures()
    key = name.lower()
    exact = [n for n in names if n.lower() == key]
    if exact:
        return exact[0]
    partial = [n for n in names if key in (part.lower() for part in n.split("-"))]
    if len(partial) == 1:
        return partial[0]
    return None


def read_crystal(source, *, name=None):
    """Read a crystal from a CIF file or a bundled structure name.

    Parameters
    ----------
    source : str or path
        Path to a CIF file, or the name of a bundled structure (``'Si'``,
        ``'rutile'``...; see :func:`bundled_structures`).
    name : str, optional
        Name to give the crystal; defaults to the bundled name or block name.

    Returns
    -------
    Crystal

    Notes
    -----
    Symmetry is taken from the symmetry operators when the CIF lists them,
    else from the Hall symbol, else from the Hermann-Mauguin symbol.  When a
    Hermann-Mauguin symbol alone leaves the origin choice open, both choices
    are tried and the one that does not place atoms on top of each other
    (nor multiply them) is kept, with a note.  Anisotropic displacements are
    reduced to the isotropic equivalent U_eq (Fischer and Tillmanns, Acta
    Cryst. C44 (1988) 775).  Ionic charges in type symbols are ignored
    (neutral-atom scattering factors).  The space group is cross-checked with
    spglib on the expanded cell; a disagreement is noted.
    """
    import gemmi

    path = Path(str(source))
    label = str(source)
    if not path.is_file():
        bundled = _resolve_bundled(str(source))
        if bundled is None:
            raise InputError(
                f"unknown structure '{source}': not a file and not a bundled structure "
                f"(bundled: {', '.join(bundled_structures())})")
        text = _structure_dir().joinpath(bundled + ".cif").read_text(encoding="utf-8")
        name = name or bundled
        label = f"bundled:{bundled}"
    else:
        try:
            text = path.read_text(encoding="utf-8", errors="replace")
        except OSError as exc:
            raise InputError(f"cannot read {path}: {exc.strerror}") from None
    if not text.strip():
        raise InputError(f"{label}: the CIF file is empty")
    try:
        doc = gemmi.cif.read_string(text)
    except (RuntimeError, ValueError) as exc:
        first = str(exc).splitlines()[0] if str(exc) else "parse error"
        raise InputError(f"{label}: malformed CIF ({first})") from None
    blocks = [b for b in doc if b.find_value("_cell_length_a") is not None]
    if not blocks:
        raise InputError(f"{label}: no data block with a unit cell (_cell_length_a)")
    block = blocks[0]
    try:
        small = gemmi.make_small_structure_from_block(block)
    except (RuntimeError, ValueError) as exc:
        raise InputError(f"{label}: cannot interpret the CIF ({exc})") from None
    return _crystal_from_small(small, name or small.name or path.stem, label)


def _crystal_from_small(small, name, label):

    notes = []
    cell = small.cell
    if not (cell.a > 0 and cell.b > 0 and cell.c > 0) or not cell.is_crystal():
        raise InputError(f"{label}: the CIF has no usable unit cell")
    if len(small.sites) == 0:
        raise InputError(f"{label}: the CIF lists no atom sites")
    for site in small.sites:
        if site.element.atomic_number == 0:
            raise InputError(f"{label}: site {site.label} has an unknown element "
                             f"'{site.type_symbol or site.label}'")
        if site.charge:
            notes.append("ionic charges ignored: neutral-atom scattering factors used")
            break

    orders = []
    if small.symops:
        orders = ["S"]
    elif small.spacegroup_hall:
        orders = ["H"]
    elif small.spacegroup_hm or small.spacegroup_number:
        orders = ["1", "2"]
    if not orders:
        notes.append("no symmetry given: space group P 1 assumed")
        small.spacegroup_hm = "P 1"
        orders = ["1"]

    trials = []
    for order in orders:
        try:
            small.determine_and_set_spacegroup(order)
        except (RuntimeError, ValueError) as exc:
            raise InputError(f"{label}: cannot determine the space group ({exc})") from None
        if small.spacegroup is None:
            continue
        sites = small.get_all_unit_cell_sites()
        trials.append((_count_close_pairs(sites, cell), len(sites),
                       small.spacegroup.xhm(), order, sites))
    if not trials:
        raise InputError(f"{label}: the space group given in the CIF is not recognised")
    distinct = {t[2] for t in trials}
    trials.sort(key=lambda t: (t[0], t[1]))
    close, _, xhm, order, sites = trials[0]
    small.determine_and_set_spacegroup(order)
    sg = small.spacegroup
    if len(distinct) > 1:
        notes.append(f"the Hermann-Mauguin symbol leaves the origin choice open; "
                     f"{xhm} chosen because it places the atoms without overlaps")
    if close:
        notes.append(f"{close} pairs of atoms closer than {_CLOSE_ATOMS_A} A after "
                     "symmetry expansion: check the space-group setting")

    elements, frac, occ, b_iso = [], [], [], []
    aniso_reduced = False
    for site in sites:
        elements.append(site.element.name)
        frac.append([site.fract.x, site.fract.y, site.fract.z])
        occ.append(site.occ)
        u = site.u_iso
        if site.aniso.nonzero():
            u = cell.calculate_u_eq(site.aniso)
            aniso_reduced = True
        b_iso.append(8 * math.pi ** 2 * u)
    if aniso_reduced:
        notes.append("anisotropic displacements reduced to the isotropic equivalent U_eq")
    b_iso = np.array(b_iso)
    if np.all(b_iso == 0):
        notes.append("the CIF gives no displacement parameters: B = 0 (no Debye-Waller damping)")

    ops = list(sg.operations())
    rotations = np.array([np.array(op.rot) // op.DEN for op in ops], dtype=np.int64)
    translations = np.array([np.array(op.tran) / op.DEN for op in ops])
    basis = np.array(cell.orth.mat, dtype=float)
    crystal = Crystal(
        name=str(name),
        basis=basis,
        fractional=np.mod(np.array(frac, dtype=float), 1.0),
        elements=tuple(elements),
        occupancy=np.array(occ, dtype=float),
        b_iso=b_iso,
        space_group_number=int(sg.number),
        space_group_symbol=sg.xhm(),
        ops=_Ops(rotations, translations),
        notes=tuple(dict.fromkeys(notes)),
        source=label,
    )
    check = _spglib_number(crystal)
    if check is not None and check != crystal.space_group_number:
        crystal = dataclasses.replace(crystal, notes=crystal.notes + (
            f"spglib finds space group {check} on the expanded cell, the CIF gives "
            f"{crystal.space_group_number}; selection rules follow the CIF",))
    return crystal


def _count_close_pairs(sites, cell):
    if len(sites) < 2:
        return 0
    frac = np.array([[s.fract.x, s.fract.y, s.fract.z] for s in sites])
    diff = frac[:, None, :] - frac[None, :, :]
    diff -= np.round(diff)
    orth = np.array(cell.orth.mat)
    dist = np.linalg.norm(diff @ orth.T, axis=2)
    iu = np.triu_indices(len(sites), 1)
    return int(np.sum(dist[iu] < _CLOSE_ATOMS_A))


def _spglib_number(crystal):
    """Space-group number that spglib finds on the expanded cell (or None)."""
    import spglib

    kinds = {}
    numbers = [kinds.setdefault((el, round(float(o), 3)), len(kinds) + 1)
               for el, o in zip(crystal.elements, crystal.occupancy)]
    cell = (crystal.basis.T, crystal.fractional, numbers)
    with _warnings.catch_warnings():
        _warnings.simplefilter("ignore")
        dataset = spglib.get_symmetry_dataset(cell, symprec=1e-3)
    if dataset is None:
        return None
    return int(dataset.number)
