"""Dynamical deficit minima of HOLZ lines and the bright-field disk intensity.

Line positions come from the one forward model (:mod:`laueline.lines`):
each scan starts on the exact kinematic locus and runs along its normal, so
the shift of a minimum is measured from the locus the kinematic fit uses.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.interpolate import CubicSpline

from ..errors import InputError
from ..lines import LineParameters, line_parameters, locus_distances, locus_samples
from .beams import (DEFAULT_HOLZ_EXCITATION, DEFAULT_ZOLZ_GMAX, _CONVERGENCE_HOLZ_FACTOR,
                    _CONVERGENCE_ZOLZ_FACTOR, _Engine, select_beams)
from .bloch import DEFAULT_ABSORPTION_RATIO, check_absorption_ratio, check_thickness

__all__ = ["DynamicalLines", "dynamical_lines", "disk_intensity", "disk_intensity_grid",
           "IMAGE_ZOLZ_GMAX", "IMAGE_HOLZ_EXCITATION"]



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
    fractions : list of ndarray (k_i,)
        Positions of the points along each chord, as fractions of its
        half-length (0 nearest the disk centre).
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
    fractions: list = field(default_factory=list)

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


def _sample_points(pattern, index, n_points, fractions=None):
    """Locus points (rad) and normals of line ``index`` away from the other lines.

    With ``fractions`` (positions along the chord, as fractions of its
    half-length) those points are taken as they are.  Returns the points,
    normals, distances to the nearest other line (mrad), the chord length
    (mrad) and the fractions used.
    """
    lp = line_parameters(pattern.crystal.g_vectors(pattern.hkl), pattern.frame,
                         pattern.beam.wave_number)
    one = LineParameters(lp.g_perp[index:index + 1], lp.g_perp_norm[index:index + 1],
                         lp.gz[index:index + 1], lp.c[index:index + 1])
    candidates = _SAMPLE_FRACTIONS if fractions is None else np.asarray(fractions, dtype=float)
    points, normals, half = locus_samples(one, pattern.disk_mrad * 1e-3, candidates)
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
    if fractions is not None:
        keep = np.arange(len(candidates))
        return (points[keep], normals[keep], np.maximum(nearest[keep], 1e-3),
                float(2 * half[0]), candidates[keep])
    keep = np.flatnonzero(nearest >= _MIN_SEPARATION_MRAD)
    if len(keep) > n_points:
        # the kept candidate nearest each of n_points evenly spread fractions: when
        # the pattern changes a little, one point at most moves (a fit that
        # recomputes the shifts at every state would otherwise see every point
        # jump whenever one candidate comes within 0.2 mrad of another line)
        target = np.linspace(_SAMPLE_FRACTIONS[0], _SAMPLE_FRACTIONS[-1], n_points)
        gap = np.abs(_SAMPLE_FRACTIONS[keep][None, :] - target[:, None])
        chosen = []
        for row in gap:                       # n_points targets, each its own point
            row[chosen] = np.inf
            chosen.append(int(np.argmin(row)))
        keep = keep[np.sort(chosen)]
    return (points[keep], normals[keep], nearest[keep], float(2 * half[0]),
            candidates[keep])


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
                    n_points=5, check_convergence=True, lines=None, fractions=None):
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
    same beams without the line's own give there), so a sloping disk or the
    tail of a neighbouring line does not pull the minimum; the depth is 1 minus that ratio at the
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
    fractions : dict, optional
        Line index -> positions along its chord (fractions of the
        half-length, as in ``DynamicalLines.fractions``) to take as they are,
        instead of choosing points away from the other lines: a fit that
        recomputes the minima at a slightly changed state keeps its points.

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
    out.update({k: [empty1] * L for k in ("shift", "contrast", "width", "fractions")})
    n_beams, change, warnings = len(beams.zolz_hkl), [], []
    for i in wanted:
        given = None if fractions is None else fractions.get(i)
        base, normal, nearest, length, used = _sample_points(pattern, i, n_points, given)
        out["fractions"][i] = used
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
        # local disk intensity: the same beams without the line's own, on the coarse
        # scan and by cubic interpolation between (it carries the tails of
        # neighbouring lines, which a low-order polynomial would not follow)
        background = CubicSpline(np.linspace(-1.0, 1.0, _COARSE),
                                 group.without(own).direct(scan), axis=1)

        def ratio(uu, sub, solver=group):
            v = uu / w[sub, None]
            bg = background(v)[sub, np.arange(len(sub))]  # row sub[j] at the points of j
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
        zolz_gmax=beams.zolz_gmax, holz_excitation=beams.holz_excitation, warnings=warnings,
        fractions=out["fractions"])


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

#: Zero-layer beams taken exactly for disk images, and the excitation error
#: below which HOLZ beams are: smaller sets than for the line minima (they
#: leave the minima within about 1.2e-3 mrad of :func:`dynamical_lines`'
#: on Si [2 3 0], 200 kV, 200 nm; tests/test_dynamical_images.py).
IMAGE_ZOLZ_GMAX = 1.5
IMAGE_HOLZ_EXCITATION = 0.002
_IMAGE_CELL_MRAD = 0.5
_CORNERS = np.array([[0, 0], [1, 0], [0, 1], [1, 1]], dtype=float)


def disk_intensity(pattern, t_mrad, thickness_nm, *, absorption_ratio=DEFAULT_ABSORPTION_RATIO,
                   zolz_gmax=IMAGE_ZOLZ_GMAX, holz_excitation=IMAGE_HOLZ_EXCITATION,
                   exclude=(), cell_mrad=_IMAGE_CELL_MRAD, workers=1):
    """Direct-beam (bright-field) intensity at points of the central disk.

    The disk is cut into square cells ``cell_mrad`` wide.  Every point of a
    cell is solved with the zero-layer beams up to ``zolz_gmax`` and the
    HOLZ beams whose excitation error comes below ``holz_excitation``
    somewhere in the cell (or whose Bethe ratio |U_g| / (2 K s_g) exceeds
    1 %) taken exactly, the others (up to 0.05 1/angstrom, and the zero
    layer up to 1.6 ``zolz_gmax``) through second-order Bethe potentials.
    The beam set of a point thus depends on its position alone, not on the
    other points asked for.  The points of a cell are solved together as
    one stack of matrices.

    Parameters
    ----------
    pattern : laueline.lines.Pattern
        Crystal, frame, wave number and disk.
    t_mrad : array_like, shape (..., 2)
        Disk points in mrad.
    thickness_nm, absorption_ratio :
        As for :func:`dynamical_lines`.
    zolz_gmax, holz_excitation : float
        Beam-set limits (1/angstrom); by default smaller than those of
        :func:`dynamical_lines` (``IMAGE_ZOLZ_GMAX``, ``IMAGE_HOLZ_EXCITATION``).
    exclude : array_like of int, shape (k, 3), optional
        Reflections left out of the calculation altogether (neither exact
        nor Bethe beams): with a line's own reflection, the local disk
        intensity beneath that line.
    cell_mrad : float
        Side of the cells, mrad.
    workers : int
        Processes the cells are spread over (1: this process alone).

    Returns
    -------
    intensity : ndarray, shape (...)
        |phi_0|^2 for unit incident intensity.
    n_beams : int
        Largest number of exact beams of any cell.
    """
    t = check_thickness(thickness_nm)
    a = check_absorption_ratio(absorption_ratio)
    workers = int(workers)
    if workers < 1:
        raise InputError(f"workers must be at least 1, got {workers}")
    cell_mrad = float(cell_mrad)
    if not 0.0 < cell_mrad <= 2.0 * float(pattern.disk_mrad):
        raise InputError(f"cell_mrad must lie in (0, the disk diameter], got {cell_mrad:g}")
    points = np.asarray(t_mrad, dtype=float)
    if points.shape[-1:] != (2,) or not np.all(np.isfinite(points)):
        raise InputError("t_mrad must be an array of finite (tx, ty) points in mrad")
    flat = points.reshape(-1, 2)
    crystal, frame = pattern.crystal, pattern.frame
    K, kv = pattern.beam.wave_number, pattern.beam.kv
    beams = select_beams(crystal, frame, K, pattern.disk_mrad, gmax=pattern.gmax,
                         zolz_gmax=zolz_gmax, holz_excitation=holz_excitation)
    exclude = np.asarray(exclude, dtype=np.int64).reshape(-1, 3)
    engine = _Engine(crystal, beams, frame, K, kv, a, t * 10.0, extra_hkl=exclude)
    leave_out = engine.index(exclude) if len(exclude) else np.zeros(0, dtype=int)
    cell = np.floor(flat / cell_mrad).astype(np.int64)
    cells, inverse = np.unique(cell, axis=0, return_inverse=True)
    inverse = np.ravel(inverse)
    order = np.argsort(inverse, kind="stable")
    bounds = np.flatnonzero(np.diff(inverse[order])) + 1
    tasks = [((cells[inverse[members[0]]] + _CORNERS) * cell_mrad, flat[members])
             for members in np.split(order, bounds)] if len(flat) else []
    out = np.empty(len(flat))
    if workers == 1 or len(tasks) < 2:
        results = _solve_cells(engine, leave_out, tasks)
    else:
        results = _solve_cells_in_processes(engine, leave_out, tasks, workers)
    n_beams = len(beams.zolz_hkl)
    for members, (values, n) in zip(np.split(order, bounds) if len(flat) else [], results):
        out[members] = values
        n_beams = max(n_beams, n)
    return out.reshape(points.shape[:-1]), int(n_beams)


def _solve_cells(engine, leave_out, tasks):
    """[(intensities, exact beams)] of every (corners, points) task."""
    results = []
    for corners, members in tasks:
        group = engine.group(corners, exclude=leave_out)
        results.append((group.direct(members), len(group)))
    return results


_WORKER_STATE = {}


def _worker_start(engine, leave_out):
    _WORKER_STATE["args"] = (engine, leave_out)


def _worker_solve(tasks):
    return _solve_cells(*_WORKER_STATE["args"], tasks)


def _solve_cells_in_processes(engine, leave_out, tasks, workers):
    """_solve_cells spread over ``workers`` processes, in batches of similar size."""
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    # about four batches per process, cut by point count so that none lags far behind
    size = np.cumsum([len(m) for _, m in tasks])
    n_batches = min(len(tasks), 4 * workers)
    cut = np.searchsorted(size, size[-1] * np.arange(1, n_batches) / n_batches)
    batches = [b for b in np.split(np.arange(len(tasks)), np.unique(cut)) if len(b)]
    method = "fork" if "fork" in multiprocessing.get_all_start_methods() else None
    with ProcessPoolExecutor(max_workers=workers,
                             mp_context=multiprocessing.get_context(method),
                             initializer=_worker_start, initargs=(engine, leave_out)) as pool:
        parts = pool.map(_worker_solve, [[tasks[i] for i in b] for b in batches])
        return [r for part in parts for r in part]


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
