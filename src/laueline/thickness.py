"""Foil thickness from two-beam CBED (Kossel-Moellenstedt) fringes.

In a two-beam condition the diffracted disk shows dark fringes where the
two-beam rocking curve vanishes, t sqrt(s^2 + 1/xi_g^2) = n for integers n
(Hirsch, Howie, Nicholson, Pashley and Whelan, *Electron Microscopy of Thin
Crystals*, 1965).  With the deviation parameter s_i of fringe i and its
integer n_k = j + i - 1,

    (s_i / n_k)^2 = 1 / t^2 - (1 / xi_g^2) (1 / n_k^2),

a straight line in (1/n_k^2, (s_i/n_k)^2) with intercept 1/t^2 and slope
-1/xi_g^2 (Kelly, Jostsons, Blake and Napier, Phys. Status Solidi A 31
(1975) 771; Allen, Phil. Mag. A 43 (1981) 325).  The first index j is the
smallest integer above t / xi_g; it is found by trying successive integers
and keeping the straightest line with physical signs (positive intercept,
negative slope).

The deviation parameter of a fringe at distance x from the Bragg position
in the diffracted disk, with the disk separation L (the 2 theta_B distance),
is s = lambda x / (d^2 L) (small angles; Williams and Carter, *Transmission
Electron Microscopy*, 2009, ch. 20).  Distances x and L may be in any one
unit (pixels, mm on a print).

Units here: lengths of the foil in nm, s in 1/nm.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .errors import InputError
from .optics import relativistic_factor, wavelength_A

__all__ = ["ThicknessResult", "thickness_from_fringes", "kinematic_extinction_distance_nm",
           "ProfileDetection", "detect_profile", "read_profile", "two_beam_intensity"]

_MAX_FIRST_INDEX = 12


def kinematic_extinction_distance_nm(crystal, hkl, kv):
    """Two-beam extinction distance xi_g = pi V cos(theta_B) / (lambda gamma |F_g|), nm.

    F_g is the kinematic electron structure factor (angstrom, Debye-Waller
    included) and gamma the relativistic factor (Williams and Carter 2009,
    ch. 13; Hirsch et al. 1965).
    """
    hkl = np.asarray(hkl, dtype=int).reshape(1, 3)
    if crystal.is_absent(hkl)[0]:
        raise InputError(f"({' '.join(map(str, hkl[0]))}) is systematically absent in "
                         f"{crystal.space_group_symbol}: no two-beam condition")
    f = abs(crystal.structure_factors(hkl)[0])
    if f < 1e-9:
        raise InputError(f"({' '.join(map(str, hkl[0]))}) has a vanishing structure factor")
    lam = wavelength_A(kv)
    d = float(crystal.d_spacing(hkl)[0])
    theta = math.asin(lam / (2 * d))
    xi_A = math.pi * crystal.volume * math.cos(theta) / (lam * relativistic_factor(kv) * f)
    return xi_A / 10.0


def two_beam_intensity(s_inv_nm, thickness_nm, extinction_nm):
    """Diffracted two-beam intensity (Hirsch et al. 1965, no absorption).

    I_g = (pi t / xi)^2 sin^2(pi t s_eff) / (pi t s_eff)^2, s_eff = sqrt(s^2 + 1/xi^2).
    """
    s = np.asarray(s_inv_nm, dtype=float)
    s_eff = np.sqrt(s * s + 1.0 / extinction_nm ** 2)
    return np.sin(np.pi * thickness_nm * s_eff) ** 2 / (extinction_nm * s_eff) ** 2


@dataclass
class Candidate:
    first_fringe_index: int
    residual: float
    thickness_nm: float
    extinction_distance_nm: float
    physical: bool


@dataclass
class ThicknessResult:
    """Thickness and extinction distance from a two-beam fringe series.

    ``residual`` of a candidate is 1 - R^2 of its straight-line fit (0 for a
    perfect line, scale free so that numberings can be compared).
    """

    thickness_nm: float
    thickness_sigma_nm: float
    extinction_distance_nm: float
    extinction_distance_sigma_nm: float
    first_fringe_index: int
    fringe_indices: np.ndarray
    deviations_inv_nm: np.ndarray
    deviations_sigma_inv_nm: np.ndarray | None
    line_x: np.ndarray
    line_y: np.ndarray
    intercept: float
    slope: float
    candidates: list
    kinematic_extinction_distance_nm: float | None
    d_spacing_A: float
    kv: float
    wavelength_A: float
    bragg_angle_mrad: float
    separation: float
    fringes: np.ndarray
    hkl: tuple | None = None
    profile: object = None
    warnings: list = field(default_factory=list)


def _line_fit(x, y, sigma_y=None):
    """Straight line y = a + b x; returns (a, b, cov, 1 - R^2)."""
    w = np.ones_like(y) if sigma_y is None else 1.0 / sigma_y ** 2
    design = np.stack([np.ones_like(x), x], axis=1)
    normal = design.T @ (design * w[:, None])
    coef = np.linalg.solve(normal, design.T @ (w * y))
    resid = y - design @ coef
    dof = len(y) - 2
    cov = np.linalg.inv(normal)
    if sigma_y is None:
        cov = cov * (np.sum(resid ** 2) / dof if dof > 0 else 0.0)
    ss_tot = np.sum(w * (y - np.average(y, weights=w)) ** 2)
    non_linearity = float(np.sum(w * resid ** 2) / ss_tot) if ss_tot > 0 else 0.0
    return coef[0], coef[1], cov, non_linearity


def thickness_from_fringes(fringes, separation, *, kv=200.0, d_spacing_A=None, crystal=None,
                           hkl=None, fringes_sigma=None, separation_sigma=None,
                           first_fringe_index=None):
    """Thickness and extinction distance from dark-fringe positions.

    Parameters
    ----------
    fringes : sequence of float
        Distances from the Bragg position in the diffracted disk to each
        successive dark fringe, increasing (any length unit).
    separation : float
        Distance between the direct and diffracted disk centres (2 theta_B),
        same unit.
    kv : float
        Accelerating voltage.
    d_spacing_A : float, optional
        Interplanar spacing; else from ``crystal`` and ``hkl``.
    crystal, hkl : optional
        Structure and reflection; also give the kinematic extinction distance.
    fringes_sigma, separation_sigma : optional
        Standard uncertainties of the positions (same unit), propagated.
    first_fringe_index : int, optional
        Force the index of the first fringe instead of searching.

    Returns
    -------
    ThicknessResult
    """
    x = np.asarray(fringes, dtype=float).ravel()
    if len(x) < 2:
        raise InputError("at least two fringes are needed (three or more to choose the "
                         "numbering)")
    if not np.all(np.isfinite(x)) or np.any(x <= 0):
        raise InputError("fringe distances must be positive numbers")
    if np.any(np.diff(x) <= 0):
        raise InputError("fringe distances must increase from the Bragg position outward")
    separation = float(separation)
    if not math.isfinite(separation) or separation <= 0:
        raise InputError("the disk separation must be positive")
    kinematic = None
    if d_spacing_A is None:
        if crystal is None or hkl is None:
            raise InputError("give the reflection (structure and --hkl) or --d-spacing-A")
        hkl_arr = np.asarray(hkl, dtype=int)
        if not np.any(hkl_arr):
            raise InputError("the reflection 0 0 0 has no d-spacing")
        d_spacing_A = float(crystal.d_spacing(hkl_arr.reshape(1, 3))[0])
        kinematic = kinematic_extinction_distance_nm(crystal, hkl_arr, kv)
    d_spacing_A = float(d_spacing_A)
    if not math.isfinite(d_spacing_A) or d_spacing_A <= 0:
        raise InputError("the d-spacing must be positive")
    lam = wavelength_A(kv)
    theta = math.asin(lam / (2 * d_spacing_A))
    d_nm, lam_nm = d_spacing_A / 10, lam / 10
    s = lam_nm * x / (d_nm ** 2 * separation)
    s_sigma = None
    if fringes_sigma is not None or separation_sigma is not None:
        fs = np.broadcast_to(np.asarray(fringes_sigma if fringes_sigma is not None else 0.0,
                                        dtype=float), x.shape)
        ls = float(separation_sigma or 0.0)
        s_sigma = s * np.sqrt((fs / x) ** 2 + (ls / separation) ** 2)

    warnings = []
    candidates = []
    starts = [first_fringe_index] if first_fringe_index else range(1, _MAX_FIRST_INDEX + 1)
    for j in starts:
        n = j + np.arange(len(x))
        lx, ly = 1.0 / n ** 2, (s / n) ** 2
        sy = None if s_sigma is None else 2 * s * s_sigma / n ** 2
        a, b, _, nl = _line_fit(lx, ly, sy)
        physical = a > 0 and b < 0
        candidates.append(Candidate(int(j), nl, 1 / math.sqrt(a) if a > 0 else float("nan"),
                                    1 / math.sqrt(-b) if b < 0 else float("nan"), physical))
    physical = [c for c in candidates if c.physical]
    if not physical:
        raise InputError("no numbering of the fringes gives a straight line with positive "
                         "intercept and negative slope: check the fringe distances and the "
                         "separation")
    if len(x) == 2:
        # two points make a straight line for every numbering
        if kinematic is not None:
            best = min(physical, key=lambda c: abs(c.extinction_distance_nm - kinematic))
            warnings.append("only two fringes: every numbering fits a straight line; the one "
                            "whose extinction distance is nearest the kinematic value was "
                            "taken (measure a third fringe to decide)")
        else:
            best = physical[0]
            warnings.append("only two fringes: every numbering fits a straight line and none "
                            "can be preferred; the smallest first index was taken (measure a "
                            "third fringe)")
    else:
        best = min(physical, key=lambda c: c.residual)
        rivals = [c for c in physical if c is not best and c.residual <= 2 * best.residual
                  + 1e-12]
        if rivals:
            r = rivals[0]
            warnings.append(
                f"numberings starting at {best.first_fringe_index} and {r.first_fringe_index} "
                f"fit about equally well (residuals {best.residual:.2g}, {r.residual:.2g}): "
                f"thickness {best.thickness_nm:.1f} or {r.thickness_nm:.1f} nm")
    j = best.first_fringe_index
    n = j + np.arange(len(x))
    lx, ly = 1.0 / n ** 2, (s / n) ** 2
    sy = None if s_sigma is None else 2 * s * s_sigma / n ** 2
    a, b, cov, _ = _line_fit(lx, ly, sy)
    t = 1 / math.sqrt(a)
    xi = 1 / math.sqrt(-b)
    t_sigma = 0.5 * math.sqrt(cov[0, 0]) * a ** -1.5
    xi_sigma = 0.5 * math.sqrt(cov[1, 1]) * (-b) ** -1.5
    if s_sigma is not None and separation_sigma:
        # the separation scales every s alike: add its effect, which the line fit
        # of independent points does not see (t and xi both scale as L)
        rel = float(separation_sigma) / separation
        t_sigma = math.hypot(t_sigma, t * rel)
        xi_sigma = math.hypot(xi_sigma, xi * rel)
    if len(x) == 2 and s_sigma is None:
        warnings.append("two fringes leave no degrees of freedom: no uncertainty can be "
                        "estimated without position uncertainties")
        t_sigma = xi_sigma = float("nan")
    if kinematic is not None and abs(xi - kinematic) > 0.3 * kinematic:
        warnings.append(f"the measured extinction distance {xi:.1f} nm differs from the "
                        f"kinematic two-beam value {kinematic:.1f} nm by more than 30 %: "
                        "wrong reflection, or strong many-beam effects")
    if t / xi > 0 and j != math.floor(t / xi) + 1:
        warnings.append(f"the chosen first index {j} is not the integer just above "
                        f"t/xi = {t / xi:.2f}: the numbering is doubtful")
    return ThicknessResult(
        thickness_nm=t, thickness_sigma_nm=t_sigma, extinction_distance_nm=xi,
        extinction_distance_sigma_nm=xi_sigma, first_fringe_index=j, fringe_indices=n,
        deviations_inv_nm=s, deviations_sigma_inv_nm=s_sigma, line_x=lx, line_y=ly,
        intercept=a, slope=b, candidates=candidates, kinematic_extinction_distance_nm=kinematic,
        d_spacing_A=d_spacing_A, kv=float(kv), wavelength_A=lam, bragg_angle_mrad=theta * 1e3,
        separation=separation, fringes=x, hkl=None if hkl is None else tuple(int(v) for v in hkl),
        warnings=warnings)


# ---------------------------------------------------------------------------
# intensity profiles
# ---------------------------------------------------------------------------

def read_profile(path):
    """Two columns (position, intensity), optional header row, '#' comments."""
    import csv

    try:
        text = open(path, encoding="utf-8-sig").read()
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror}") from None
    rows = [r for r in csv.reader(ln for ln in text.splitlines()
                                  if ln.strip() and not ln.lstrip().startswith("#"))]
    if rows:
        try:
            float(rows[0][0])
        except (ValueError, IndexError):
            rows = rows[1:]
    if len(rows) < 10:
        raise InputError(f"{path}: a profile needs at least 10 rows of position, intensity")
    try:
        data = np.array([[float(r[0]), float(r[1])] for r in rows])
    except (ValueError, IndexError):
        raise InputError(f"{path}: every row needs two numbers, position and intensity") \
            from None
    if not np.all(np.isfinite(data)):
        raise InputError(f"{path}: the profile holds non-finite values")
    order = np.argsort(data[:, 0], kind="stable")
    data = data[order]
    if np.any(np.diff(data[:, 0]) <= 0):
        raise InputError(f"{path}: positions repeat")
    return data[:, 0], data[:, 1]


@dataclass
class ProfileDetection:
    """Disks and fringes found in a profile (positions in the profile's unit)."""

    position: np.ndarray
    intensity: np.ndarray
    disk_edges: np.ndarray          # (2, 2): [direct, diffracted] x [low, high]
    disk_centres: np.ndarray        # (2,)
    disk_centre_sigma: np.ndarray   # (2,)
    bragg_position: float
    minima: np.ndarray              # positions of the dark fringes used (both sides)
    minima_sigma: np.ndarray
    fringes: np.ndarray             # distances from the Bragg position, increasing
    fringes_sigma: np.ndarray
    separation: float
    separation_sigma: float
    warnings: list = field(default_factory=list)


def _uniform(x, y):
    """The profile on evenly spaced positions (interpolated when the spacing varies)."""
    steps = np.diff(x)
    step = float(np.median(steps))
    if np.ptp(steps) <= 0.01 * step:
        return x, y, step
    grid = np.linspace(x[0], x[-1], int(round((x[-1] - x[0]) / step)) + 1)
    return grid, np.interp(grid, x, y), float(grid[1] - grid[0])


def _jump_weights(window, gap):
    """Weights extrapolating a straight line fitted to ``window`` samples across ``gap``.

    The samples lie at distances gap + 0.5, gap + 1.5, ... from the point of
    extrapolation (in samples); the result applied to them gives the line's
    value there.
    """
    u = gap + 0.5 + np.arange(window)
    du = u - u.mean()
    return 1.0 / window - u.mean() * du / np.sum(du * du)


def step_response(intensity, window=8, gap=2):
    """Signed height of a step between every pair of neighbouring samples.

    Straight lines are fitted to ``window`` samples on each side, leaving
    ``gap`` samples out next to the step (where a blurred edge rises), and
    extrapolated to the mid-point; the response is the right value minus the
    left one.  Smooth curvature (fringes) cancels to first order, while a
    disk edge responds with its full height whatever its blur up to about
    ``gap`` samples.

    Returns
    -------
    jump : ndarray, shape (n - 1,)
        Element k is the step between samples k and k + 1 (zero where the
        windows do not fit in the profile).
    noise_factor : float
        Standard deviation of the response per unit standard deviation of
        independent noise in the samples.
    """
    y = np.asarray(intensity, dtype=float)
    n = len(y)
    c = _jump_weights(window, gap)
    reach = gap + window
    jump = np.zeros(n - 1)
    if n > 2 * reach:
        # right[k] = sum_i c_i y[k + 1 + gap + i]; left[k] = sum_i c_i y[k - gap - i]
        right = np.correlate(y, c, mode="valid")          # right[j] = sum c_i y[j + i]
        left = np.correlate(y, c[::-1], mode="valid")     # left[j] = sum c_i y[j + w - 1 - i]
        k = np.arange(reach - 1, n - 1 - reach + 1)
        jump[k] = right[k + 1 + gap] - left[k - gap - window + 1]
    return jump, float(math.sqrt(2 * np.sum(c * c)))


def _noise_level(y):
    """Robust standard deviation of independent sample noise (second differences)."""
    d2 = y[2:] - 2 * y[1:-1] + y[:-2]
    return float(1.4826 * np.median(np.abs(d2 - np.median(d2))) / math.sqrt(6))


def _strongest_steps(jump, reach):
    """The step response with its side lobes and lesser neighbours zeroed.

    A linear-extrapolation step filter answers a sharp edge with side lobes of
    the opposite sign, up to 0.7 of the main response for windows of 8 samples
    or more, one window away.  A sample is kept when it is the largest of its
    sign within ``reach`` and no response of the other sign nearby is more
    than 1.25 times larger (which a side lobe's parent always is).
    """
    from scipy.ndimage import maximum_filter1d

    size = 2 * reach + 1
    pos = np.clip(jump, 0, None)
    neg = np.clip(-jump, 0, None)
    max_pos, max_neg = maximum_filter1d(pos, size), maximum_filter1d(neg, size)
    keep_pos = (pos > 0) & (pos >= max_pos) & (1.25 * pos >= max_neg)
    keep_neg = (neg > 0) & (neg >= max_neg) & (1.25 * neg >= max_pos)
    return np.where(keep_pos | keep_neg, jump, 0.0)


def _find_disks(y, jump, noise, noise_jump, reach):
    """Sample indices (rise, fall) of the direct disk and the shift to the diffracted one.

    The direct disk is the strongest rise of the step response and the
    strongest fall after it.  The diffracted disk has the same width (both are
    images of the one condenser aperture) and must hold every sample that
    stands clear of the background beyond the direct disk; within the shifts
    that allow this, its edges are placed where rise and fall together step
    most.  Its outer fringes may be as dark as the background, so its own
    edges are not required to show.

    Returns
    -------
    rise, fall : int
        Steps (between sample k and k + 1) of the direct disk.
    shift : int
        Best shift in samples.
    shift_range : (int, int)
        The shifts that keep all of the diffracted signal inside the disk.
    """
    from scipy.ndimage import uniform_filter1d

    n = len(y)
    steps = _strongest_steps(jump, reach)
    min_width = max(5, n // 50)
    rise = int(np.argmax(steps))
    # the direct disk's edges are sharp steps of a tenth of the profile's range
    # or more, far above the noise
    floor = max(5 * noise_jump, 0.1 * float(np.ptp(y)))
    if steps[rise] < floor:
        raise InputError("the profile does not show two disks (direct and diffracted): no "
                         "sharp disk edge found")
    after = steps[rise + min_width:]
    if len(after) == 0 or after.min() > -floor:
        raise InputError("the profile does not show two disks (direct and diffracted): "
                         "check the profile runs through both")
    fall = rise + min_width + int(np.argmin(after))
    width = fall - rise
    outside = y[:max(rise - reach, 0)]
    size = 2 * reach + 1
    smooth = uniform_filter1d(y, size)
    start = fall + 2 * size              # clear of the direct disk's smoothed edge
    beyond = smooth[start:]
    if len(beyond) < width:
        raise InputError("the profile ends before a second disk as wide as the first: check "
                         "it runs through both disks along +g, direct disk first")
    background = float(np.median(outside)) if len(outside) >= 10 else \
        float(np.percentile(beyond, 5))
    signal = np.flatnonzero(beyond > background + 5 * noise / math.sqrt(size))
    if len(signal) == 0:
        raise InputError("no diffracted disk stands out from the background after the "
                         "direct disk")
    first, last = signal[0] + start, signal[-1] + start
    lo, hi = last - fall, first - rise      # shifts keeping [first, last] inside the box
    if lo > hi:                              # signal wider than the disk: centre it
        lo = hi = int(round((first + last - rise - fall) / 2))
    lo, hi = max(lo - reach, width), min(hi + reach, len(jump) - 1 - fall)
    if lo > hi:
        raise InputError("the profile does not show two separate disks of the same width "
                         "(direct and diffracted)")
    shifts = np.arange(lo, hi + 1)
    score = steps[rise + shifts] - steps[fall + shifts]
    return rise, fall, int(shifts[np.argmax(score)]), (int(lo), int(hi))


def _edge_crossing(x, light, k, window, gap):
    """Sub-sample position of a step found between samples k and k + 1.

    The step's mid-level is half-way between the straight lines extrapolated
    from both sides (as in :func:`step_response`); the edge is where the
    lightly smoothed profile crosses it nearest to the step.  Returns the
    position and the slope there (profile units per position unit).
    """
    n = len(light)
    c = _jump_weights(window, gap)
    left = float(c @ light[np.clip(k - gap - np.arange(window), 0, n - 1)])
    right = float(c @ light[np.clip(k + 1 + gap + np.arange(window), 0, n - 1)])
    level = 0.5 * (left + right)
    j_all = np.arange(max(k - gap - 1, 0), min(k + gap + 2, n - 1))
    a, b = light[j_all], light[j_all + 1]
    crossing = ((a - level) * (b - level) <= 0) & (a != b)
    if not np.any(crossing):
        return x[k] + 0.5 * (x[k + 1] - x[k]), 0.0
    j = j_all[crossing][np.argmin(np.abs(j_all[crossing] - k))]
    f = (level - light[j]) / (light[j + 1] - light[j])
    slope = abs(light[j + 1] - light[j]) / (x[j + 1] - x[j])
    return x[j] + f * (x[j + 1] - x[j]), slope


def detect_profile(position, intensity):
    """Find the two disks and the dark fringes of the diffracted disk.

    The profile runs along +g: the direct disk comes first, the diffracted
    disk second.  Disks are the two widest regions above a threshold between
    the background and the bright level, after bridging dark fringes by a
    closing that grows until exactly two similar disks remain.  Fringes are
    the prominent minima of the smoothed profile inside the diffracted disk,
    each located by a parabola through the raw samples around it; the Bragg
    position is the centre of symmetry of the fringes on both sides (or the
    disk centre when only one side shows fringes).
    """
    from scipy.ndimage import uniform_filter1d
    from scipy.signal import find_peaks

    x0 = np.asarray(position, dtype=float)
    y0 = np.asarray(intensity, dtype=float)
    x, y, step = _uniform(x0, y0)
    n = len(x)
    if np.ptp(y) <= 0:
        raise InputError("the profile is flat: no disks found")
    smooth = uniform_filter1d(y, size=max(3, n // 400 * 2 + 1))
    light = uniform_filter1d(y, size=3)
    window, gap = int(np.clip(n // 120, 8, 16)), 2
    jump, factor = step_response(y, window, gap)
    noise = _noise_level(y)
    noise_jump = max(noise * factor, 1e-3 * float(np.ptp(y)))
    r0, f0, shift, shift_range = _find_disks(y, jump, noise, noise_jump, window + gap)
    steps = _strongest_steps(jump, window + gap)
    warnings = []
    edges = np.empty((2, 2))
    edge_sigma = np.empty((2, 2))
    for side, k in enumerate((r0, f0)):
        pos, slope = _edge_crossing(x, light, k, window, gap)
        edges[0, side] = pos
        edge_sigma[0, side] = max(noise / slope if slope > 0 else step, step / math.sqrt(12))
    # the diffracted disk is the direct disk moved by the separation: each of
    # its edges that shows a clear step measures that separation once
    shifts, shift_sigma = [], []
    for side, k in enumerate((r0 + shift, f0 + shift)):
        if abs(steps[k]) < 5 * noise_jump:
            continue
        pos, slope = _edge_crossing(x, light, k, window, gap)
        sigma = max(noise / slope if slope > 0 else step, step / math.sqrt(12))
        shifts.append(pos - edges[0, side])
        shift_sigma.append(math.hypot(sigma, edge_sigma[0, side]))
    if shifts:
        w = 1.0 / np.square(shift_sigma)
        separation = float(np.sum(w * np.array(shifts)) / np.sum(w))
        separation_sigma = float(1.0 / math.sqrt(np.sum(w)))
        if len(shifts) == 2:
            separation_sigma = max(separation_sigma, abs(shifts[0] - shifts[1]) / 2)
    else:
        # no edge of its own: the disk lies somewhere in the range of shifts
        # that keeps all of its signal inside it
        separation = 0.5 * (shift_range[0] + shift_range[1]) * step
        separation_sigma = max((shift_range[1] - shift_range[0]) * step / math.sqrt(12), step)
        warnings.append("neither edge of the diffracted disk stands out from the "
                        "background: its position rests on the direct disk's width and the "
                        "best match of the step pattern")
    if len(shifts) == 1:
        warnings.append("one edge of the diffracted disk is as dark as the background: the "
                        "disk is placed from its other edge and the direct disk's width")
    edges[1] = edges[0] + separation
    edge_sigma[1] = np.hypot(edge_sigma[0], separation_sigma)
    centres = edges.mean(axis=1)
    centre_sigma = np.array([math.hypot(*edge_sigma[0]) / 2,
                             math.hypot(math.hypot(*edge_sigma[0]) / 2, separation_sigma)])
    i0, i1 = np.searchsorted(x, edges[1])
    direct_mean = float(np.mean(y[r0 + 1:f0 + 1]))
    if np.mean(y[i0:i1]) > 1.2 * direct_mean:
        warnings.append("the second disk is brighter than the first: is the profile taken "
                        "along +g (direct disk first)?")
    margin = max(2, n // 400 * 2 + 3, gap + 2)  # where the smoothed edges blur in
    lo, hi = i0 + margin, i1 - 1 - margin
    inner = smooth[lo:hi + 1]
    prominence = 0.08 * (inner.max() - inner.min())
    peaks, _ = find_peaks(-inner, prominence=prominence)
    peaks = peaks + lo
    minima, minima_sigma = [], []
    for p in peaks:
        neighbours = sorted(peaks, key=lambda q: abs(q - p))
        spacing = abs(neighbours[1] - p) if len(neighbours) > 1 else (hi - lo) // 4
        # a short window: the fringe is parabolic near its zero, but the
        # envelope and the chirp of the fringe series bias wider windows
        half = int(max(2, min(spacing // 8, (hi - lo) // 20)))
        sl = slice(max(p - half, 0), min(p + half + 1, n))
        xs, ys = x[sl] - x[p], y[sl]
        coef, cov = np.polyfit(xs, ys, 2, cov=True) if len(xs) > 3 else (None, None)
        if coef is None or coef[0] <= 0:
            minima.append(x[p])
            minima_sigma.append(step)
            continue
        vertex = -coef[1] / (2 * coef[0])
        if abs(vertex) > half * step:
            vertex = 0.0
        dv = np.array([coef[1] / (2 * coef[0] ** 2), -1 / (2 * coef[0]), 0.0])
        minima.append(x[p] + vertex)
        minima_sigma.append(max(math.sqrt(max(dv @ cov @ dv, 0.0)), step / 20))
    minima, minima_sigma = np.array(minima), np.array(minima_sigma)
    centre = centres[1]
    # a minimum at the Bragg position itself (t/xi just above a half-integer)
    # is not a dark fringe of the series: the first fringes sit symmetrically
    # at +-s_1, half their spacing from the centre
    if len(minima) > 1:
        gaps = np.abs(minima[:, None] - minima[None, :])
        gaps[np.diag_indices(len(minima))] = np.inf
        central = np.abs(minima - centre) < 0.25 * gaps.min(axis=1)
        minima, minima_sigma = minima[~central], minima_sigma[~central]
    left = minima[minima < centre][::-1]
    right = minima[minima > centre]
    ls = minima_sigma[minima < centre][::-1]
    rs = minima_sigma[minima > centre]
    if len(left) and len(right):
        m = min(len(left), len(right))
        bragg = float(np.mean((left[:m] + right[:m]) / 2))
        spread = np.std((left[:m] + right[:m]) / 2) if m > 1 else 0.0
        if abs(bragg - centre) > 3 * max(centre_sigma[1], spread, step):
            warnings.append(f"the fringes are centred {bragg - centre:+.3g} from the disk "
                            "centre: the two-beam condition was not exact; distances are "
                            "measured from the fringes' centre of symmetry")
        dist_l = bragg - left
        dist_r = right - bragg
        fr = 0.5 * (dist_l[:m] + dist_r[:m])
        fs = 0.5 * np.sqrt(ls[:m] ** 2 + rs[:m] ** 2)
        disagreement = 0.5 * np.abs(dist_l[:m] - dist_r[:m])
        fs = np.sqrt(fs ** 2 + disagreement ** 2 / 2)
        extra = dist_r[m:] if len(dist_r) > m else dist_l[m:]
        extra_s = rs[m:] if len(dist_r) > m else ls[m:]
        fr = np.concatenate([fr, extra])
        fs = np.concatenate([fs, extra_s])
    else:
        bragg = float(centre)
        side = right if len(right) else left
        sig = rs if len(right) else ls
        fr = np.abs(side - bragg)
        fs = np.sqrt(sig ** 2 + centre_sigma[1] ** 2)
        warnings.append("fringes found on one side of the diffracted disk only: the Bragg "
                        "position is taken as the disk centre")
    order = np.argsort(fr)
    fr, fs = fr[order], fs[order]
    keep = fr > 0
    return ProfileDetection(
        position=x0, intensity=y0, disk_edges=edges, disk_centres=centres,
        disk_centre_sigma=centre_sigma, bragg_position=bragg, minima=minima,
        minima_sigma=minima_sigma, fringes=fr[keep], fringes_sigma=fs[keep],
        separation=separation, separation_sigma=separation_sigma, warnings=warnings)
