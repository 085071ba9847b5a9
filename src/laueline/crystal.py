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
    "MAX_STRUCTURE_FACTOR_TERMS",
]

#: Largest number of (h, k, l) grid points an enumeration may allocate.
#: 2e7 points use about 0.5 GB per float64 vector triple.
MAX_REFLECTIONS = 20_000_000

#: Largest number of (reflection, atom) terms a structure-factor sum may take
#: (a few seconds of work); larger jobs are refused before they start.
MAX_STRUCTURE_FACTOR_TERMS = 50_000_000
#: Terms evaluated at once, bounding the memory to a few hundred MB.
_STRUCTURE_FACTOR_CHUNK = 2_000_000

_CLOSE_ATOMS_A = 0.5

#: Largest CIF file read (a 100,000-atom cell takes about 10 MB).
_MAX_CIF_BYTES = 100_000_000

#: Above this many atoms in the cell the spglib cross-check (seconds per
#: thousand atoms) is skipped.
_SPGLIB_MAX_SITES = 2000


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
        terms = len(hkl) * self.n_sites
        if terms > MAX_STRUCTURE_FACTOR_TERMS:
            raise InputError(
                f"structure factors of {len(hkl)} reflections over {self.n_sites} atoms "
                f"({terms:.2g} terms) exceed the limit of {MAX_STRUCTURE_FACTOR_TERMS:.0g}; "
                "use a smaller --gmax (gmax=) or a smaller cell")
        g2 = np.sum(self.g_vectors(hkl) ** 2, axis=1)
        out = np.empty(len(hkl), dtype=complex)
        chunk = max(1, _STRUCTURE_FACTOR_CHUNK // max(self.n_sites, 1))
        for start in range(0, len(hkl), chunk):  # memory bounded by the chunk, not n x sites
            part = slice(start, start + chunk)
            f = self.scattering_factors(g2[part] / 4.0)
            phase = np.exp(2j * np.pi * (hkl[part] @ self.fractional.T))
            out[part] = np.sum(f * phase, axis=1)
        return out

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


def read_crystal(source, *, name=None, block=None):
    """Read a crystal from a CIF file or a bundled structure name.

    Parameters
    ----------
    source : str or path
        Path to a CIF file, or the name of a bundled structure (``'Si'``,
        ``'rutile'``...; see :func:`bundled_structures`).
    name : str, optional
        Name to give the crystal; defaults to the bundled name or block name.
    block : str, optional
        Name of the data block to read (``data_NAME``); required when the
        file holds several blocks with a unit cell.

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
    try:
        is_file = path.is_file()
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror}") from None
    if not is_file:
        bundled = _resolve_bundled(str(source))
        if bundled is None:
            raise InputError(
                f"unknown structure '{source}': not a file and not a bundled structure "
                f"(bundled: {', '.join(bundled_structures())})")
        text = _structure_dir().joinpath(bundled + ".cif").read_text(encoding="utf-8")
        name = name or bundled
        label = f"bundled:{bundled}"
    else:
        if path.stat().st_size > _MAX_CIF_BYTES:
            raise InputError(f"{path}: {path.stat().st_size / 1e6:.0f} MB is beyond any CIF of "
                             f"a crystal structure (limit {_MAX_CIF_BYTES / 1e6:.0f} MB)")
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
    names = [b.name for b in blocks]
    if block is not None:
        chosen = [b for b in blocks if b.name.lower() == str(block).lower()]
        if not chosen:
            raise InputError(f"{label}: no data block named '{block}' with a unit cell "
                             f"(blocks: {', '.join(names)})")
        cif_block = chosen[0]
    elif len(blocks) > 1:
        raise InputError(f"{label} holds {len(blocks)} structures (data blocks "
                         f"{', '.join(names)}); choose one with --block NAME (block=)")
    else:
        cif_block = blocks[0]
    _check_cif_values(cif_block, label)
    try:
        small = gemmi.make_small_structure_from_block(cif_block)
    except (RuntimeError, ValueError) as exc:
        raise InputError(f"{label}: cannot interpret the CIF ({exc})") from None
    return _crystal_from_small(small, name or small.name or path.stem, label)


_UNKNOWN = ("?", ".")

#: Largest B (angstrom^2) accepted from a CIF; beyond it no HOLZ line survives.
_MAX_B = 100.0


def _cif_column(block, tag):
    """Raw strings of ``tag`` (a loop column or a single value); [] when absent."""
    return list(block.find_values(tag))


def _cif_number(raw, what, label, unknown_ok=False):
    """A finite number from a CIF value (standard uncertainty in brackets allowed)."""
    import gemmi

    if raw in _UNKNOWN:
        if unknown_ok:
            return None
        raise InputError(f"{label}: {what} is '{raw}' (unknown); a number is needed")
    value = gemmi.cif.as_number(raw)
    if not math.isfinite(value):
        raise InputError(f"{label}: {what} is '{raw}', not a finite number")
    return value


def _check_cif_values(block, label):
    """Check the numbers of a CIF block before gemmi or spglib compute with them.

    Cell lengths positive, angles forming a cell (positive metric determinant
    1 - cos^2 alpha - cos^2 beta - cos^2 gamma + 2 cos alpha cos beta cos gamma,
    International Tables Vol. B, 1.1.2), coordinates that are numbers,
    occupancies in [0, 1], displacement parameters U, B >= 0.
    """
    cell = []
    for tag in ("_cell_length_a", "_cell_length_b", "_cell_length_c",
                "_cell_angle_alpha", "_cell_angle_beta", "_cell_angle_gamma"):
        raw = block.find_value(tag)
        if raw is None and "angle" in tag:
            raw = "90"  # CIF default for a missing angle
        if raw is None:
            raise InputError(f"{label}: {tag} is missing")
        cell.append(_cif_number(raw, tag, label))
    lengths, angles = np.array(cell[:3]), np.array(cell[3:])
    if np.any(lengths < 1) or np.any(lengths > 1e4):  # no crystal has an edge below 1 A
        raise InputError(f"{label}: cell lengths must lie between 1 and 1e4 A, got "
                         f"{' '.join(f'{v:g}' for v in lengths)}")
    if np.any(angles <= 0) or np.any(angles >= 180):
        raise InputError(f"{label}: cell angles must lie between 0 and 180 deg, got "
                         f"{' '.join(f'{v:g}' for v in angles)}")
    ca, cb, cg = np.cos(np.radians(angles))
    metric = 1 - ca * ca - cb * cb - cg * cg + 2 * ca * cb * cg
    if metric <= 1e-6:  # V = abc sqrt(metric); below this the cell is flat
        raise InputError(f"{label}: cell angles {' '.join(f'{v:g}' for v in angles)} deg do "
                         "not form a cell (their metric determinant is not positive)")
    labels = _cif_column(block, "_atom_site_label")
    for axis in "xyz":
        for i, raw in enumerate(_cif_column(block, f"_atom_site_fract_{axis}")):
            site = labels[i] if i < len(labels) else f"#{i + 1}"
            value = _cif_number(raw, f"site {site} coordinate {axis}", label)
            if abs(value) > 1e3:
                raise InputError(f"{label}: site {site} coordinate {axis} = {value:g} is not a "
                                 "fractional coordinate")
    for i, raw in enumerate(_cif_column(block, "_atom_site_occupancy")):
        value = _cif_number(raw, "an occupancy", label, unknown_ok=True)
        if value is not None and not 0 <= value <= 1:
            site = labels[i] if i < len(labels) else f"#{i + 1}"
            raise InputError(f"{label}: site {site} has occupancy {value:g}; occupancies "
                             "lie between 0 and 1")
    b_per_u = 8 * math.pi ** 2
    for tag, scale in (("_atom_site_U_iso_or_equiv", b_per_u), ("_atom_site_B_iso_or_equiv", 1),
                       ("_atom_site_aniso_U_11", b_per_u), ("_atom_site_aniso_U_22", b_per_u),
                       ("_atom_site_aniso_U_33", b_per_u), ("_atom_site_aniso_B_11", 1),
                       ("_atom_site_aniso_B_22", 1), ("_atom_site_aniso_B_33", 1)):
        for raw in _cif_column(block, tag):
            value = _cif_number(raw, tag, label, unknown_ok=True)
            if value is not None and not 0 <= value * scale <= _MAX_B:
                raise InputError(f"{label}: {tag} = {value:g}; displacement parameters are "
                                 f"non-negative (and B below {_MAX_B:g} A^2)")


#: Symmetry images closer than this (angstrom) are one position: a special
#: position whose coordinates are rounded in the CIF.
_SAME_POSITION_A = 0.02
#: Occupancy sums may exceed 1 by rounding (three sites of 0.334).
_OCCUPANCY_TOLERANCE = 0.01


def _periodic_distances(frac_a, frac_b, orth):
    """Shortest distances (angstrom) between fractional points, last axes broadcast."""
    diff = frac_a - frac_b
    diff -= np.round(diff)
    return np.linalg.norm(diff @ orth.T, axis=-1)


def _expand_sites(frac, occ, rotations, translations, orth):
    """Symmetry images of every site, keeping the total occupancy of split sites.

    Images closer than ``_SAME_POSITION_A`` are one special position (the
    occupancy given applies to it, as CIF defines).  Images further apart but
    within ``_CLOSE_ATOMS_A`` are alternative positions of a disordered atom
    when occupancy x number of such images <= 1: all are kept, so the site
    keeps its total occupancy.  Otherwise they are a special position given
    imprecisely and are merged.

    Returns
    -------
    keep : ndarray of bool, shape (n_sites, n_ops)
        Which image (site i, operation k) is kept.
    images : ndarray, shape (n_sites, n_ops, 3)
        Fractional coordinates of all images, in [0, 1).
    split, merged : ndarray of bool, shape (n_sites,)
        Sites kept as split positions / merged as imprecise special positions.
    """
    images = np.mod(np.einsum("kij,nj->nki", rotations, frac) + translations, 1.0)
    n, m = images.shape[:2]
    keep = np.ones((n, m), dtype=bool)
    split = np.zeros(n, dtype=bool)
    merged = np.zeros(n, dtype=bool)
    earlier = np.tri(m, k=-1, dtype=bool)  # [j, k]: image k comes before image j
    chunk = max(1, 2_000_000 // (m * m))
    for start in range(0, n, chunk):  # bounded memory: chunk x m x m distances
        sl = slice(start, start + chunk)
        img = images[sl]
        d = _periodic_distances(img[:, :, None, :], img[:, None, :, :], orth)
        first = ~np.any((d < _SAME_POSITION_A) & earlier, axis=2)
        near = (d < _CLOSE_ATOMS_A) & first[:, None, :] & first[:, :, None]
        cluster = np.where(first, near.sum(axis=2), 0).max(axis=1)
        crowded = (cluster > 1) & (occ[sl] * cluster > 1 + _OCCUPANCY_TOLERANCE)
        wide = ~np.any((d < _CLOSE_ATOMS_A) & earlier & first[:, None, :], axis=2) & first
        keep[sl] = np.where(crowded[:, None], wide, first)
        split[sl] = (cluster > 1) & ~crowded
        merged[sl] = crowded
    return keep, images, split, merged


_DIRECT_PAIRS_LIMIT = 1500  # points: up to this many, all distances (18 MB) beat a k-d tree


def _close_pairs(frac, orth, radius):
    """Pairs (i, j, distance) of sites closer than ``radius`` angstrom, periodic.

    A k-d tree holds the sites and those periodic copies that lie within
    ``radius`` of the cell, so the memory and work grow linearly with the
    number of sites.  Small cells (the usual case) are compared directly,
    which spares every command the import of the spatial index.
    """
    n = len(frac)
    if n < 2:
        return np.zeros(0, int), np.zeros(0, int), np.zeros(0)
    frac = np.mod(frac, 1.0)
    # margin in fractional units: radius over the spacing of each family of cell faces
    margin = radius * np.linalg.norm(np.linalg.inv(orth), axis=1)
    shifts = np.array([(i, j, k) for i in (-1, 0, 1) for j in (-1, 0, 1) for k in (-1, 0, 1)])
    shifts = shifts[np.argsort(np.abs(shifts).sum(axis=1), kind="stable")]  # (0, 0, 0) first
    copies = frac[None, :, :] + shifts[:, None, :]
    near = np.all((copies > -margin) & (copies < 1 + margin), axis=2)
    near[0] = True
    shift_index, site = np.nonzero(near)
    points = copies[shift_index, site] @ orth.T
    if len(points) <= _DIRECT_PAIRS_LIMIT:
        d2 = np.sum((points[:, None, :] - points[None, :, :]) ** 2, axis=2)
        p, q = np.nonzero(np.triu(d2 <= radius * radius, k=1))
    else:
        from scipy.spatial import cKDTree

        pairs = cKDTree(points).query_pairs(radius, output_type="ndarray")
        p, q = pairs[:, 0], pairs[:, 1]
    keep = ((shift_index[p] == 0) | (shift_index[q] == 0)) & (site[p] != site[q])
    p, q = p[keep], q[keep]
    dist = np.linalg.norm(points[p] - points[q], axis=1)
    i, j = np.minimum(site[p], site[q]), np.maximum(site[p], site[q])
    if len(i):  # one pair may be found through several copies: keep the shortest
        order = np.lexsort((dist, j, i))
        i, j, dist = i[order], j[order], dist[order]
        first = np.ones(len(i), dtype=bool)
        first[1:] = (i[1:] != i[:-1]) | (j[1:] != j[:-1])
        i, j, dist = i[first], j[first], dist[first]
    return i, j, dist


@dataclass(frozen=True)
class _Expansion:
    """The unit-cell content of one symmetry choice, with its overlap diagnosis."""

    site_index: np.ndarray   # CIF site of each atom
    fractional: np.ndarray
    occupancy: np.ndarray
    overlaps: int            # pairs of atoms closer than _CLOSE_ATOMS_A that cannot coexist
    overfull: list           # (labels, total occupancy) of positions holding more than 1
    shared: list             # element pairs sharing one position (substitutional disorder)
    split: tuple             # labels of sites split over nearby positions
    merged: tuple            # labels of sites merged onto a special position


def _expand(small, sg, orth):
    sites = small.sites
    frac = np.array([[s.fract.x, s.fract.y, s.fract.z] for s in sites], dtype=float)
    occ = np.array([s.occ for s in sites], dtype=float)
    ops = list(sg.operations())
    rotations = np.array([np.array(op.rot) / op.DEN for op in ops])
    translations = np.array([np.array(op.tran) / op.DEN for op in ops])
    keep, images, split, merged = _expand_sites(frac, occ, rotations, translations, orth)
    site_index, op_index = np.nonzero(keep)
    fractional = images[site_index, op_index]
    occupancy = occ[site_index]
    i, j, dist = _close_pairs(fractional, orth, _CLOSE_ATOMS_A)
    pair_occ = occupancy[i] + occupancy[j]
    same = dist < _SAME_POSITION_A
    coexist = pair_occ <= 1 + _OCCUPANCY_TOLERANCE
    overlaps = int(np.sum(~same & ~coexist))
    # total occupancy of every position shared by several sites
    total = occupancy.copy()
    np.add.at(total, i[same], occupancy[j[same]])
    np.add.at(total, j[same], occupancy[i[same]])
    labels = [s.label for s in sites]
    overfull = []
    for a in np.flatnonzero(total > 1 + _OCCUPANCY_TOLERANCE)[:1]:
        partners = j[same & (i == a)].tolist() + i[same & (j == a)].tolist()
        names = sorted({labels[site_index[k]] for k in [a, *partners]})
        overfull.append((names, float(total[a])))
    elements = [s.element.name for s in sites]
    shared = sorted({tuple(sorted((elements[site_index[a]], elements[site_index[b]])))
                     for a, b in zip(i[same], j[same])
                     if elements[site_index[a]] != elements[site_index[b]]})
    return _Expansion(site_index, fractional, occupancy, overlaps, overfull, shared,
                      tuple(labels[k] for k in np.flatnonzero(split)),
                      tuple(labels[k] for k in np.flatnonzero(merged)))


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

    orth = np.array(cell.orth.mat, dtype=float)
    trials = []
    for order in orders:
        try:
            small.determine_and_set_spacegroup(order)
        except (RuntimeError, ValueError) as exc:
            raise InputError(f"{label}: cannot determine the space group ({exc})") from None
        if small.spacegroup is None or small.spacegroup.xhm() in {t[2] for t in trials}:
            continue  # unknown, or the same group again (both origin choices of P 1)
        expansion = _expand(small, small.spacegroup, orth)
        trials.append((expansion.overlaps + len(expansion.overfull),
                       len(expansion.site_index), small.spacegroup.xhm(), order, expansion))
    if not trials:
        raise InputError(f"{label}: the space group given in the CIF is not recognised")
    distinct = {t[2] for t in trials}
    trials.sort(key=lambda t: (t[0], t[1]))
    _, _, xhm, order, expansion = trials[0]
    small.determine_and_set_spacegroup(order)
    sg = small.spacegroup
    if len(distinct) > 1:
        notes.append(f"the Hermann-Mauguin symbol leaves the origin choice open; "
                     f"{xhm} chosen because it places the atoms without overlaps")
    if expansion.overfull:
        names, total = expansion.overfull[0]
        raise InputError(f"{label}: sites {', '.join(names)} share one position with a total "
                         f"occupancy of {total:.3g}; at most 1 fits on a site")
    if expansion.overlaps:
        notes.append(f"{expansion.overlaps} pairs of atoms closer than {_CLOSE_ATOMS_A} A "
                     "after symmetry expansion: check the space-group setting")
    for a, b in expansion.shared:
        notes.append(f"{a} and {b} share sites (substitutional disorder): each keeps its "
                     "occupancy")
    if expansion.split:
        notes.append(f"site{'s' if len(expansion.split) > 1 else ''} "
                     f"{', '.join(expansion.split)}: symmetry images closer than "
                     f"{_CLOSE_ATOMS_A} A kept as alternative positions (disorder); the total "
                     "occupancy is preserved")
    if expansion.merged:
        notes.append(f"site{'s' if len(expansion.merged) > 1 else ''} "
                     f"{', '.join(expansion.merged)} lie within {_CLOSE_ATOMS_A} A of a special "
                     "position: their symmetry images are merged")

    site_elements, site_b = [], []
    aniso_reduced = False
    for site in small.sites:
        site_elements.append(site.element.name)
        u = site.u_iso
        if site.aniso.nonzero():
            u = cell.calculate_u_eq(site.aniso)
            aniso_reduced = True
        site_b.append(8 * math.pi ** 2 * u)
    if aniso_reduced:
        notes.append("anisotropic displacements reduced to the isotropic equivalent U_eq")
    if min(site_b) < 0:
        raise InputError(f"{label}: the anisotropic displacements give a negative U_eq; "
                         "displacement parameters are non-negative")
    if not np.any(expansion.occupancy > 0):
        raise InputError(f"{label}: every site has occupancy 0; the cell scatters nothing")
    elements = [site_elements[k] for k in expansion.site_index]
    frac = expansion.fractional
    occ = expansion.occupancy
    b_iso = np.array(site_b)[expansion.site_index]
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
    if crystal.n_sites > _SPGLIB_MAX_SITES:
        return dataclasses.replace(crystal, notes=crystal.notes + (
            f"{crystal.n_sites} atoms in the cell: the spglib cross-check of the space group "
            f"is skipped above {_SPGLIB_MAX_SITES}",))
    check = _spglib_number(crystal)
    if check is not None and check != crystal.space_group_number:
        crystal = dataclasses.replace(crystal, notes=crystal.notes + (
            f"spglib finds space group {check} on the expanded cell, the CIF gives "
            f"{crystal.space_group_number}; selection rules follow the CIF",))
    return crystal


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
