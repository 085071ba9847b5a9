"""Accepted ranges of numeric inputs: one table for the library and the command line.

Every number a user can give is finite and lies in a physical range; the
table says which and why.  Library functions call :func:`check_inputs` with
their own parameter names; the command line checks every parsed option
against the same table (keyed by the option's destination name) before any
command runs.  A value outside its range raises
:class:`~laueline.errors.InputError` naming the parameter (or the option).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .errors import InputError

__all__ = ["Range", "RANGES", "MAX_LINES", "check_inputs", "check_value"]

#: Most deficit lines one disk may hold: their crossings are searched over
#: all n (n - 1) / 2 pairs, about 1 GB of work arrays at this size.
MAX_LINES = 3000


@dataclass(frozen=True)
class Range:
    """A closed or half-open interval with the reason for its bounds.

    ``low_open`` / ``high_open`` exclude the bound itself; ``nonzero_vector``
    refuses a vector of zeros (a direction or a reflection).
    """

    low: float = -math.inf
    high: float = math.inf
    reason: str = ""
    low_open: bool = False
    high_open: bool = False
    nonzero_vector: bool = False

    def describe(self):
        lo = "(" if self.low_open else "["
        hi = ")" if self.high_open else "]"
        return f"{lo}{_number(self.low)}, {_number(self.high)}{hi}"

    def contains(self, v):
        above = v > self.low if self.low_open else v >= self.low
        below = v < self.high if self.high_open else v <= self.high
        return above and below


def _number(v):
    """Integers as integers (up to 2^63), the rest in %g."""
    if math.isfinite(v) and v == int(v) and abs(v) < 2 ** 63:
        return str(int(v))
    return f"{v:g}"


_INDEX = Range(-99, 99, "Miller indices and zone axes beyond 99 describe no usable "
               "reflection or axis", nonzero_vector=True)
_DIRECTION = Range(-1000, 1000, "a crystal direction needs no index beyond 1000",
                   nonzero_vector=True)

#: The accepted range of every numeric input, keyed by parameter name.
RANGES = {
    # beam
    "kv": Range(5.0, 3000.0, "transmission microscopes run between about 5 kV and 3 MV"),
    "disk_mrad": Range(0.0, 100.0, "convergence semi-angles of CBED lie well below 100 mrad",
                       low_open=True),
    "gmax": Range(0.0, 20.0, "scattering factors are negligible beyond |g| = 20 1/A",
                  low_open=True),
    "min_strength": Range(0.0, 100.0, "strengths are relative to the strongest HOLZ line "
                          "(zero-layer lines may exceed 1)"),
    "min_angle_deg": Range(0.0, 90.0, "two lines cross at 90 deg at most", high_open=True),
    "b_iso": Range(0.0, 50.0, "a Debye-Waller B above 50 A^2 leaves no HOLZ line; "
                              "B < 0 is unphysical"),
    "strain": Range(-0.5, 0.5, "strain beyond 50 % is not a strained lattice",
                    low_open=True, high_open=True),
    "cell": Range(0.0, 1000.0, "cell lengths in A and angles in deg are positive and "
                  "below 1000", low_open=True),
    "zone": _INDEX,
    "x_axis": _INDEX,
    "hkl": _INDEX,
    # detector
    "center_px": Range(-1e5, 1e5, "a pattern centre lies within 1e5 px of the image"),
    "scale_px_per_mrad": Range(0.0, 1e4, "a camera scale is positive and below 1e4 px/mrad",
                               low_open=True),
    "rotation_deg": Range(-360.0, 360.0, "a rotation lies within one turn"),
    "disk_px": Range(-1e5, 1e5, "disk centre and radius lie within 1e5 px"),
    # fitting
    "match_mrad": Range(0.0, 10.0, "a matching gate is positive and below 10 mrad",
                        low_open=True),
    "sigma_mrad": Range(0.0, 10.0, "a measurement noise is positive and below 10 mrad",
                        low_open=True),
    "cubic_elastic_gpa": Range(-2000.0, 2000.0, "elastic constants of solids lie within "
                               "2000 GPa in magnitude"),
    "sample_x": _DIRECTION,
    "sample_z": _DIRECTION,
    "near": _DIRECTION,
    "max_tilt_deg": Range(0.0, 90.0, "a holder tilt range is positive and at most 90 deg",
                          low_open=True),
    "max_index": Range(1, 30, "candidate axes beyond index 30 give no usable pattern"),
    "top": Range(1, 1e6, "at least one row is printed"),
    # two-beam thickness
    "d_spacing_A": Range(0.05, 100.0, "a two-beam reflection has 0.05 A <= d <= 100 A"),
    "separation_px": Range(0.0, 1e6, "a disk separation is positive", low_open=True),
    "fringes_px": Range(0.0, 1e6, "fringe distances are positive", low_open=True),
    "position_sigma_px": Range(0.0, 1e6, "an uncertainty is positive", low_open=True),
    "first_index": Range(1, 1000, "fringes are counted from 1"),
    # the same quantities under the library's parameter names
    "first_fringe_index": Range(1, 1000, "fringes are counted from 1"),
    "fringes_sigma": Range(0.0, 1e6, "an uncertainty is positive", low_open=True),
    "separation_sigma": Range(0.0, 1e6, "an uncertainty is positive", low_open=True),
    # rendering
    "size": Range(32, 4096, "rendered images are 32 to 4096 px a side"),
    "line_width_mrad": Range(0.0, 10.0, "a line width is positive and below 10 mrad",
                             low_open=True),
    "line_depth": Range(0.0, 1.0, "a line removes between none and all of the intensity"),
    "background_tilt": Range(0.0, 1.0, "a background change beyond 100 % leaves "
                             "negative intensity", high_open=True),
    "background_angle_deg": Range(-360.0, 360.0, "an angle lies within one turn"),
    "blur_px": Range(0.0, 100.0, "a detector blur is at most 100 px"),
    "dose": Range(0.0, 1e12, "counts per pixel from 0 (no noise) to 1e12"),
    "seed": Range(0, 2 ** 32 - 1, "a noise seed is a non-negative integer"),
}


def check_value(name, value, label=None):
    """Check one value (scalar or array) against ``RANGES[name]``.

    Parameters
    ----------
    name : str
        Key of :data:`RANGES` (a parameter name).
    value : number or array_like or None
        None passes (the parameter was not given).
    label : str, optional
        How to name the parameter in the message (default ``name``).

    Raises
    ------
    InputError
        A value is not a number, not finite, or outside the range.
    """
    if value is None or name not in RANGES:
        return
    limit = RANGES[name]
    label = label or name
    try:
        values = np.asarray(value, dtype=float).ravel()
    except (TypeError, ValueError):
        raise InputError(f"{label} must be numbers, got {value!r}") from None
    if not np.all(np.isfinite(values)):
        raise InputError(f"{label} must be finite, got "
                         f"{' '.join(f'{v:g}' for v in values)}")
    bad = [v for v in values if not limit.contains(v)]
    if bad:
        raise InputError(f"{label} = {_number(bad[0])} is outside {limit.describe()}: "
                         f"{limit.reason}")
    if limit.nonzero_vector and values.size > 1 and not np.any(values):
        raise InputError(f"{label} must not be all zeros")


def check_inputs(**values):
    """Check several parameters at once: ``check_inputs(kv=kv, disk_mrad=disk_mrad)``."""
    for name, value in values.items():
        check_value(name, value)
