"""Reading measured crossing positions from a point CSV.

Format: a header row, then one row per crossing.  Columns:

* ``x``, ``y`` (or ``X``, ``Y``): pixel position, x to the right and y down
  as image rows (see :mod:`laueline.detector`), or y up when the caller
  says so;
* optional ``h1 k1 l1 h2 k2 l2``: the two reflections whose lines cross
  there (all six or none); for hexagonal crystals also ``i1`` and ``i2``
  (four-index Miller-Bravais labels, i = -(h + k) checked);
* optional ``sigma_px``: standard uncertainty of the position, pixels;
* optional identifiers, ignored: an unnamed first column, ``index``, ``id``,
  ``label``, ``name``.

Lines starting with ``#`` are comments.  Any other column is refused, so a
mistyped header cannot be silently ignored.
"""

from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .errors import InputError

__all__ = ["Points", "read_points", "write_points"]

_LABELS = ("h1", "k1", "l1", "h2", "k2", "l2")
_FOURTH = ("i1", "i2")
_IGNORED = {"", "index", "id", "label", "name", " "}


@dataclass
class Points:
    """Measured crossings.

    Attributes
    ----------
    xy_px : ndarray (n, 2)
        Positions in the y-down pixel convention.
    hkl_a, hkl_b : ndarray (n, 3) of int, or None
        The two lines of each crossing, when labelled.
    sigma_px : ndarray (n,) or None
    source : str
    """

    xy_px: np.ndarray
    hkl_a: np.ndarray | None = None
    hkl_b: np.ndarray | None = None
    sigma_px: np.ndarray | None = None
    source: str = ""

    @property
    def labelled(self):
        return self.hkl_a is not None

    def __len__(self):
        return len(self.xy_px)


def read_points(path, *, y_up=False):
    """Read a point CSV (see the module docstring).

    Parameters
    ----------
    path : str or Path
    y_up : bool
        The file's y grows upward; :class:`laueline.fit.PixelFrame` converts
        it to the internal y-down convention (the detector centre absorbs
        the offset).
    """
    from .fit.calibration import PixelFrame

    path = Path(path)
    try:
        raw = path.read_text(encoding="utf-8-sig")
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror}") from None
    lines = [ln for ln in raw.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        raise InputError(f"{path}: no header and no points")
    reader = csv.reader(io.StringIO("\n".join(lines)))
    rows = list(reader)
    header = [h.strip() for h in rows[0]]
    lower = [h.lower() for h in header]
    if "x" not in lower or "y" not in lower:
        raise InputError(f"{path}: the header needs columns x and y (or X and Y); "
                         f"found {', '.join(header) or 'nothing'}")
    if len(set(lower)) != len(lower):
        raise InputError(f"{path}: repeated column names in the header")
    known = {"x", "y", "sigma_px", *_LABELS, *_FOURTH}
    extra = [h for h in header
             if h.lower() not in known and h.lower() not in _IGNORED]
    if extra:
        raise InputError(f"{path}: unknown column(s) {', '.join(extra)}; allowed are x, y, "
                         "h1 k1 l1 h2 k2 l2 (with i1 i2 for four-index labels), sigma_px "
                         "and an identifier column")
    fourth = [c for c in _FOURTH if c in lower]
    if fourth and (len(fourth) != 2 or not all(c in lower for c in _LABELS)):
        raise InputError(f"{path}: four-index labels need h1 k1 i1 l1 h2 k2 i2 l2")
    present = [c for c in _LABELS if c in lower]
    if present and len(present) != 6:
        missing = [c for c in _LABELS if c not in lower]
        raise InputError(f"{path}: labels need all of h1 k1 l1 h2 k2 l2; missing "
                         f"{' '.join(missing)}")
    col = {name: lower.index(name) for name in known if name in lower}
    data = rows[1:]
    if not data:
        raise InputError(f"{path}: the file has a header but no points")
    xy, labels, sigma = [], [], []
    for n, row in enumerate(data, start=2):
        if len(row) != len(header):
            raise InputError(f"{path}: row {n} has {len(row)} fields, the header {len(header)}")

        def number(name):
            text = row[col[name]].strip()
            try:
                value = float(text)
            except ValueError:
                raise InputError(f"{path}: row {n}, column {name}: '{text}' is not a number") \
                    from None
            if not math.isfinite(value):
                raise InputError(f"{path}: row {n}, column {name}: '{text}' is not finite")
            return value

        xy.append([number("x"), number("y")])
        if present:
            ints = []
            for name in _LABELS:
                v = number(name)
                if v != round(v):
                    raise InputError(f"{path}: row {n}, column {name}: Miller indices are "
                                     "integers")
                ints.append(int(round(v)))
            for side, name in enumerate(fourth):
                i_value = number(name)
                h, k = ints[3 * side], ints[3 * side + 1]
                if i_value != -(h + k):
                    raise InputError(f"{path}: row {n}: label {h} {k} {i_value:g} "
                                     f"{ints[3 * side + 2]} breaks i = -(h + k) = {-(h + k)}")
            labels.append(ints)
        if "sigma_px" in col:
            s = number("sigma_px")
            if s <= 0:
                raise InputError(f"{path}: row {n}: sigma_px must be positive")
            sigma.append(s)
    xy = PixelFrame(y_up).to_internal(np.array(xy, dtype=float))
    hkl_a = hkl_b = None
    if present:
        lab = np.array(labels, dtype=np.int64)
        hkl_a, hkl_b = lab[:, :3], lab[:, 3:]
    return Points(xy, hkl_a, hkl_b, np.array(sigma) if sigma else None, str(path))


def write_points(path, xy_px, hkl_a=None, hkl_b=None, sigma_px=None, force=False):
    """Write a point CSV in the format :func:`read_points` reads (y down)."""
    from .report import write_csv

    header = ["x", "y"]
    if hkl_a is not None:
        header += list(_LABELS)
    if sigma_px is not None:
        header.append("sigma_px")
    rows = []
    for i, (x, y) in enumerate(np.asarray(xy_px, float)):
        row = [x, y]
        if hkl_a is not None:
            row += [int(v) for v in hkl_a[i]] + [int(v) for v in hkl_b[i]]
        if sigma_px is not None:
            row.append(float(np.broadcast_to(sigma_px, (len(xy_px),))[i]))
        rows.append(row)
    write_csv(path, header, rows, force=force)
