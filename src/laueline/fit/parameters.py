"""The parameters of a fit: one crystal, one detector and voltage per pattern.

All quantities the forward model needs form one "full" vector:

* six crystal values: the Green-Lagrange strain (exx eyy ezz eyz exz exy,
  crystal frame) for the ``strain`` and ``fixed`` models, or the cell
  (a b c alpha beta gamma, angstrom and degrees) for the cell models;
* per pattern: kv, centre x and y (px), scale (px/mrad), rotation (deg) and
  the two distortion terms e1, e2.

The refined parameters x enter linearly, ``full = full0 + L (units * x)``,
so that constraints (a reduced strain basis, a cell symmetry, a rotation
shared by patterns whose tilts are known) are exact and one code path
serves all of them.  x is dimensionless: ``units`` are typical steps.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from ..crystal import basis_from_cell
from ..detector import Detector
from ..errors import InputError
from ..optics import make_beam
from ..strain import basis_from_green_lagrange, from_voigt
from .constraints import STRAIN_COMPONENTS

__all__ = ["MODELS", "CELL_NAMES", "PATTERN_FIELDS", "PARAMETER_UNITS", "ParameterModel",
           "cell_model"]

MODELS = ("strain", "fixed", "cubic", "tetragonal", "hexagonal", "orthorhombic",
          "monoclinic", "triclinic")
CELL_NAMES = ("a", "b", "c", "alpha", "beta", "gamma")
PATTERN_FIELDS = ("kv", "center_x", "center_y", "scale", "rotation", "e1", "e2")
PARAMETER_UNITS = {**{n: "" for n in STRAIN_COMPONENTS}, "a": "A", "b": "A", "c": "A",
                   "alpha": "deg", "beta": "deg", "gamma": "deg", "kv": "kV",
                   "center_x": "px", "center_y": "px", "scale": "px/mrad", "rotation": "deg",
                   "e1": "", "e2": ""}
_STEP = {"strain": 1e-3, "angle": 0.05, "kv": 1.0, "center_x": 1.0, "center_y": 1.0,
         "rotation": 0.05, "e1": 1e-3, "e2": 1e-3}


def cell_model(model, unique_axis):
    """Independent cell parameters of a model: {name: cell slots it sets}."""
    u = unique_axis
    if model == "cubic":
        return {"a": (0, 1, 2)}
    if model == "tetragonal":
        u = u or "c"
        return {"c": {"a": (0, 1), "c": (2,)}, "b": {"a": (0, 2), "b": (1,)},
                "a": {"a": (0,), "b": (1, 2)}}[u]
    if model == "hexagonal":
        if u not in (None, "c"):
            raise InputError("unique_axis: a hexagonal cell has its unique axis along c")
        return {"a": (0, 1), "c": (2,)}
    if model == "orthorhombic":
        return {"a": (0,), "b": (1,), "c": (2,)}
    if model == "monoclinic":
        angle = {"a": "alpha", "b": "beta", "c": "gamma"}[u or "b"]
        return {"a": (0,), "b": (1,), "c": (2,), angle: (CELL_NAMES.index(angle),)}
    if model == "triclinic":
        return {n: (i,) for i, n in enumerate(CELL_NAMES)}
    raise InputError(f"model: unknown model '{model}'; choose one of {', '.join(MODELS)}")


def _symmetric_start(model, cell, slots):
    """The reference cell forced into the model's symmetry (tied values averaged)."""
    cell = np.asarray(cell, float)
    out = np.array(cell)
    if model != "triclinic":
        out[3:] = 90.0
    if model == "hexagonal":
        out[5] = 120.0
    for tied in slots.values():
        out[list(tied)] = np.mean(cell[list(tied)])
    return out


@dataclass
class FreeParameter:
    """One refined parameter: its name, its column of L and its step."""

    name: str
    column: np.ndarray
    unit: float


class ParameterModel:
    """Full parameter vector, free columns and the forward quantities they give."""

    def __init__(self, crystal, model, n_patterns, *, constraints=None, unique_axis=None,
                 inner_potential=False):
        if model not in MODELS:
            raise InputError(f"model: unknown model '{model}'; choose one of {', '.join(MODELS)}")
        self.crystal = crystal
        self.model = model
        self.n_patterns = n_patterns
        self.size = 6 + len(PATTERN_FIELDS) * n_patterns
        self.full0 = np.zeros(self.size)
        self.free: list[FreeParameter] = []
        self.constraints = constraints
        self.inner_potential = inner_potential
        self.unique_axis = unique_axis
        self.mirror = [False] * n_patterns
        self.cell_slots = None
        if model == "strain":
            self.full0[:6] = constraints.offset
            for k, name in enumerate(constraints.names):
                col = np.zeros(self.size)
                col[:6] = constraints.basis[:, k]
                self.free.append(FreeParameter(name, col, _STEP["strain"]))
        elif model != "fixed":
            self.cell_slots = cell_model(model, unique_axis)
            self.full0[:6] = _symmetric_start(model, crystal.cell, self.cell_slots)
            for name, slots in self.cell_slots.items():
                col = np.zeros(self.size)
                col[list(slots)] = 1.0
                unit = 1e-3 * self.full0[slots[0]] if name in "abc" else _STEP["angle"]
                self.free.append(FreeParameter(name, col, unit))
        self._wave_number = lru_cache(maxsize=64)(self._wave_number_uncached)

    # -- layout -------------------------------------------------------------------
    def slot(self, field, pattern):
        return 6 + len(PATTERN_FIELDS) * pattern + PATTERN_FIELDS.index(field)

    def set_start(self, field, pattern, value):
        self.full0[self.slot(field, pattern)] = float(value)

    def start(self, field, pattern):
        return float(self.full0[self.slot(field, pattern)])

    def add_free(self, field, patterns, label=None, coefficients=None):
        """Free ``field`` of the given patterns as one parameter (tied when several)."""
        col = np.zeros(self.size)
        for p, coef in zip(patterns, coefficients or [1.0] * len(patterns)):
            col[self.slot(field, p)] = coef
        if field == "scale":
            unit = 1e-3 * max(abs(self.start("scale", patterns[0])), 1e-9)
        else:
            unit = _STEP[field]
        self.free.append(FreeParameter(label or field, col, unit))

    @property
    def names(self):
        return [f.name for f in self.free]

    @property
    def matrix(self):
        """L (size, p)."""
        if not self.free:
            return np.zeros((self.size, 0))
        return np.stack([f.column for f in self.free], axis=1)

    @property
    def units(self):
        return np.array([f.unit for f in self.free])

    def crystal_columns(self):
        return [i for i, f in enumerate(self.free) if np.any(f.column[:6])]

    def columns_of_pattern(self, pattern):
        """Free parameters that move pattern ``pattern``: the crystal's and its own."""
        lo = 6 + len(PATTERN_FIELDS) * pattern
        hi = lo + len(PATTERN_FIELDS)
        return [i for i, f in enumerate(self.free)
                if np.any(f.column[:6]) or np.any(f.column[lo:hi])]

    def full(self, x):
        """Full vectors (..., size) of refined parameters x (..., p)."""
        x = np.asarray(x, float)
        if not self.free:
            return np.broadcast_to(self.full0, x.shape[:-1] + (self.size,)).copy()
        return self.full0 + (x * self.units) @ self.matrix.T

    # -- forward quantities ---------------------------------------------------------
    def bases(self, full):
        """Direct bases (m, 3, 3) of full vectors (m, size)."""
        full = np.atleast_2d(full)
        if self.cell_slots is None:
            E = np.stack([from_voigt(v) for v in full[:, :6]])
            return basis_from_green_lagrange(self.crystal.basis, E)
        return np.stack([basis_from_cell(*v) for v in full[:, :6]])

    def _wave_number_uncached(self, kv):
        return make_beam(kv, self.crystal, self.inner_potential).wave_number

    def wave_numbers(self, full, pattern):
        kv = np.atleast_2d(full)[:, self.slot("kv", pattern)]
        return np.array([self._wave_number(float(v)) for v in kv])

    def detector(self, full, pattern):
        f = np.asarray(full)
        s = 6 + len(PATTERN_FIELDS) * pattern
        kv, cx, cy, scale, rot, e1, e2 = f[s:s + len(PATTERN_FIELDS)]
        return Detector((float(cx), float(cy)), float(scale), float(rot),
                        bool(self.mirror[pattern]), (float(e1), float(e2)))

    def geometry(self, full, pattern):
        """Bases, wave numbers, detector matrices and centres of full vectors (m, size)."""
        full = np.atleast_2d(full)
        dets = [self.detector(f, pattern) for f in full]
        return Geometry(self.bases(full), self.wave_numbers(full, pattern),
                        np.stack([d.matrix for d in dets]),
                        np.array([d.center_px for d in dets], dtype=float),
                        np.array([d.scale_px_per_mrad for d in dets]))


@dataclass
class Geometry:
    """Stacked forward quantities of one pattern for m parameter sets."""

    bases: np.ndarray      # (m, 3, 3)
    wave_numbers: np.ndarray  # (m,)
    matrices: np.ndarray   # (m, 2, 2) mrad -> px
    centres: np.ndarray    # (m, 2) px
    scales: np.ndarray     # (m,) px/mrad
