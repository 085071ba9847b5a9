"""Observations of a pattern and their assignment to predicted features.

Every kind of observation implements one small interface, which is all the
fit engine (:mod:`laueline.fit.engine`) uses:

``kind`` : str
    A plural noun for messages (``crossings``, ``line points``).
``group_size`` : int
    Residuals per group: a group is what is kept or rejected together
    (one crossing: 2; one detected line: its sample points).
``sigma_stated`` : bool
    The covariance is absolute (stated sigmas); otherwise its scale is
    estimated from the scatter after the fit.
``inflate`` : bool
    With stated sigmas, scale the covariance up (never down) when the
    scatter exceeds them.
``__len__()``
    Number of groups n.
``residuals(geometry)`` -> ndarray (m, n, group_size)
    Fitted minus measured, pixels, for m stacked parameter sets
    (:class:`laueline.fit.parameters.Geometry`).
``residual_covariance()`` -> ndarray (N,) or (N, N), N = n * group_size
    Covariance of the measured values, px^2, in the order of the flattened
    residuals: a vector of variances when they are independent, else the
    full matrix.  A per-line error model, in which one random offset moves
    all crossings of a line together, enters here as off-diagonal terms
    without any change to the engine.
``line_labels()`` -> ndarray (n, k, 3)
    The reflections each group belongs to (2 per crossing, 1 per line).

The assignment of measured features to predicted ones is the other half:
:class:`CrossingData` and :class:`LineData` hold everything measured in one
pattern, search the detector orientation, assign (``assign`` returns a key
that changes whenever the assignment does) and hand the engine the
currently assigned :class:`Crossings` or :class:`LinePoints`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..detector import rotation_matrix
from ..errors import InputError
from ..lines import crossing_angles_deg, crossing_positions, line_parameters_batch, \
    locus_distances, predict

__all__ = ["Crossings", "LinePoints", "CrossingData", "LineData"]


# ---------------------------------------------------------------------------
# observation types
# ---------------------------------------------------------------------------

@dataclass
class Crossings:
    """Measured crossings of assigned line pairs (px, internal y-down)."""

    zone: tuple
    x_axis: tuple
    xy_px: np.ndarray        # (n, 2)
    hkl_a: np.ndarray        # (n, 3)
    hkl_b: np.ndarray        # (n, 3)
    sigma_px: np.ndarray | None = None  # (n,)
    line_sigma_px: float = 0.0
    loading: np.ndarray | None = None   # (2n, m) line offsets -> residuals, px per px

    kind = "crossings"
    group_size = 2
    inflate = False

    @property
    def sigma_stated(self):
        return self.sigma_px is not None

    def attach_lines(self, geometry, line_sigma_px):
        """Add the per-line error term: one offset per line, shared by its crossings.

        The loading comes from the unit normals of both loci at each crossing
        in pixels (:func:`laueline.uncertainty.crossing_loading`), so a
        crossing of lines meeting at a small angle is loose along their
        bisector, whatever the detector's rotation, mirror or distortion.
        """
        from ..uncertainty import crossing_loading

        _, index = np.unique(self.line_labels().reshape(-1, 3), axis=0, return_inverse=True)
        index = index.reshape(-1, 2)
        normals = self.line_normals_px(geometry)
        self.loading = crossing_loading(normals[:, 0], normals[:, 1], index[:, 0],
                                        index[:, 1], int(index.max()) + 1 if len(index) else 0)
        self.line_sigma_px = float(line_sigma_px)

    def __len__(self):
        return len(self.xy_px)

    def predicted_px(self, geometry):
        t = crossing_positions(geometry.bases, self.zone, self.x_axis, geometry.wave_numbers,
                               self.hkl_a, self.hkl_b)
        return t @ np.swapaxes(geometry.matrices, -1, -2) + geometry.centres[:, None, :]

    def residuals(self, geometry):
        return self.predicted_px(geometry) - self.xy_px

    def residual_covariance(self):
        """Point variances (2n,), or D + s^2 M M^T (2n, 2n) with the per-line term."""
        s = np.ones(len(self)) if self.sigma_px is None else np.asarray(self.sigma_px, float)
        if self.loading is None or self.line_sigma_px == 0:
            return np.repeat(s * s, 2)
        from ..uncertainty import residual_covariance

        return residual_covariance(self.loading, np.repeat(s, 2), self.line_sigma_px).dense()

    def line_labels(self):
        return np.stack([self.hkl_a, self.hkl_b], axis=1)

    def line_normals_px(self, geometry):
        """Unit normals (n, 2, 2) in pixels of both lines at each fitted crossing."""
        t = crossing_positions(geometry.bases[:1], self.zone, self.x_axis,
                               geometry.wave_numbers[:1], self.hkl_a, self.hkl_b)[0] * 1e-3
        out = []
        for hkl in (self.hkl_a, self.hkl_b):
            p = line_parameters_batch(geometry.bases[0], self.zone, self.x_axis,
                                      geometry.wave_numbers[0], hkl)
            axial = np.sqrt(1.0 - np.sum(t * t, axis=-1))
            grad = p.g_perp + (p.gz / axial)[:, None] * t
            n = grad @ np.linalg.inv(geometry.matrices[0])  # normals map with M^-T
            out.append(n / np.linalg.norm(n, axis=1, keepdims=True))
        return np.stack(out, axis=1)


@dataclass
class LinePoints:
    """Sample points along detected lines, each line assigned to a reflection.

    The residual of a point is its signed distance (px) from the exact
    predicted locus of the line's reflection.
    """

    zone: tuple
    x_axis: tuple
    hkl: np.ndarray          # (L, 3)
    points_px: np.ndarray    # (L, k, 2)
    covariance: np.ndarray   # (L, k, k) px^2, across-line position at the points
    line_sigma_px: float = 0.0

    kind = "line points"
    sigma_stated = True
    inflate = True

    def attach_lines(self, geometry, line_sigma_px):
        """Add the per-line offset term to the detection's own covariance of each line.

        An offset moves every point of its line across it by itself
        (:func:`laueline.uncertainty.line_point_loading`): s^2 in every
        element of the line's block.
        """
        self.line_sigma_px = float(line_sigma_px)

    def loading_of_lines(self):
        from ..uncertainty import line_point_loading

        return line_point_loading(np.repeat(np.arange(len(self)), self.group_size), len(self))

    @property
    def group_size(self):
        return self.points_px.shape[1]

    def __len__(self):
        return len(self.hkl)

    def residuals(self, geometry):
        inverse = np.linalg.inv(geometry.matrices)
        rel = self.points_px[None] - geometry.centres[:, None, None, :]
        t = np.einsum("mij,mlkj->mlki", inverse, rel)            # mrad
        params = line_parameters_batch(geometry.bases, self.zone, self.x_axis,
                                       geometry.wave_numbers, self.hkl)
        return locus_distances(t * 1e-3, params) * 1e3 * geometry.scales[:, None, None]

    def residual_covariance(self):
        from scipy.linalg import block_diag

        return block_diag(*(self.covariance + self.line_sigma_px ** 2))

    def line_labels(self):
        return self.hkl[:, None, :]


# ---------------------------------------------------------------------------
# helpers shared by the assignment of both kinds
# ---------------------------------------------------------------------------

def _excluded(hkl, exclude):
    if not exclude:
        return np.zeros(len(hkl), bool)
    ex = np.array(sorted(exclude), dtype=np.int64).reshape(-1, 3)
    return np.any(np.all(np.asarray(hkl)[:, None, :] == ex[None], axis=-1), axis=1)


def _predicted(problem, j, full, min_angle_deg=0.0):
    pm, spec = problem.parameters, problem.specs[j]
    basis = pm.bases(full)[0]
    pattern = predict(pm.crystal.with_basis(basis), spec.zone,
                      float(full[pm.slot("kv", j)]), spec.disk_mrad, x_axis=spec.x_axis,
                      min_strength=spec.min_strength, min_angle_deg=min_angle_deg,
                      wave_number=pm.wave_numbers(full, j)[0])
    return pattern


def _similarity(src, dst, mirror):
    """Least-squares dst = c + s R M src (Umeyama 1991), returns (c, s, angle_deg, rms)."""
    m = np.diag([1.0, -1.0 if mirror else 1.0])
    a = src @ m.T
    ca, cb = a.mean(axis=0), dst.mean(axis=0)
    a0, b0 = a - ca, dst - cb
    cov = b0.T @ a0
    angle = math.atan2(cov[1, 0] - cov[0, 1], cov[0, 0] + cov[1, 1])
    r = rotation_matrix(math.degrees(angle))
    s = np.sum((a0 @ r.T) * b0) / np.sum(a0 * a0)
    c = cb - s * (ca @ r.T)
    rms = math.sqrt(np.mean(np.sum((c + s * a @ r.T - dst) ** 2, axis=1)))
    return c, s, math.degrees(angle), rms


def _vote_offset(u, t, gate, bound):
    """Mode of the differences u_i - t_j on a grid of cell ``gate``."""
    d = (u[:, None, :] - t[None, :, :]).reshape(-1, 2)
    span = int(math.ceil(2 * bound / gate)) + 1
    q = ((d + bound) / gate).astype(np.int64)
    counts = np.bincount(q[:, 0] * span + q[:, 1], minlength=span * span)
    best = int(np.argmax(counts))
    centre = (np.array([best // span, best % span]) + 0.5) * gate - bound
    near = np.sum((d - centre) ** 2, axis=1) < (1.5 * gate) ** 2
    return np.median(d[near], axis=0)


def _search_orientation(xy, t_cand, scale, center, rotation, mirror, gate_mrad):
    """Rotation, mirror (and centre) maximising gated matches of points to candidates.

    Coarse steps of 3 degrees with a gate wide enough for the step, then
    fine steps around the five best coarse candidates.  Without a centre,
    the offset is the mode of all point-candidate differences.
    """
    from scipy.spatial import cKDTree

    tree = cKDTree(t_cand)
    mirrors = [mirror] if mirror is not None else [False, True]
    r_max = max(float(np.max(np.linalg.norm(t_cand, axis=1))), 1e-9)

    def score(m, rot, gate):
        inv = np.diag([1.0, -1.0 if m else 1.0]) @ rotation_matrix(-rot) / scale
        u = xy @ inv.T
        if center is None:
            bound = float(np.max(np.abs(u))) + r_max
            offset = _vote_offset(u, t_cand, gate, bound)
        else:
            offset = np.asarray(center) @ inv.T
        dist, _ = tree.query(u - offset, distance_upper_bound=gate)
        hits = np.isfinite(dist)
        return (int(hits.sum()), -float(np.sum(dist[hits]))), np.linalg.solve(inv, offset)

    if rotation is not None:
        trials = [(m, float(rotation)) for m in mirrors]
    else:
        coarse = 3.0
        coarse_gate = max(gate_mrad, 0.6 * r_max * math.radians(coarse))
        ranked = sorted(((score(m, rot, coarse_gate)[0], m, rot) for m in mirrors
                         for rot in np.arange(0.0, 360.0, coarse)),
                        key=lambda r: r[0], reverse=True)[:5]
        fine_step = min(1.0, math.degrees(gate_mrad / r_max))
        trials = [(m, rot + d) for _, m, rot in ranked
                  for d in np.arange(-coarse, coarse + 1e-9, fine_step)]
    results = sorted(((score(m, rot % 360.0, gate_mrad), m, rot % 360.0)
                      for m, rot in trials),
                     key=lambda r: (r[0][0][0], not r[1], r[0][0][1]), reverse=True)
    (sc, c), m, rot = results[0]
    rivals = [(other_m, other_rot) for (other_sc, _), other_m, other_rot in results[1:]
              if other_sc[0] >= sc[0] and (other_m != m or
                                           abs((other_rot - rot + 180) % 360 - 180) > 5)]
    return sc, m, rot, c, rivals


def _note_orientation(spec, rotation, mirror, rivals, what, warnings, remedy):
    """Warn of an orientation found by search and of rivals that fit as well.

    Returns the rivals (or None when there are none).
    """
    if spec.rotation_deg is None:
        warnings.append(f"{spec.label}orientation found by search: rotation {rotation:.1f} "
                        f"deg, mirror {'yes' if mirror else 'no'}")
    if not rivals:
        return None
    warnings.append(spec.label + _rival_warning(what, rivals, remedy))
    return rivals


def _rival_warning(what, rivals, hint):
    other_m, other_rot = rivals[0]
    return (f"the {what} fit the pattern equally well at rotation {other_rot:.1f} deg, mirror "
            f"{'yes' if other_m else 'no'}: the pattern's symmetry leaves the assignment, and "
            f"with it the sign or order of some strain components, undetermined; {hint}")


def _match(xy_px, cand_px, gate_px, distinct=False, minimum=0):
    """Optimal one-to-one assignment within a gate; returns candidate index or -1.

    With ``distinct``, only points whose nearest candidate is less than half
    as far as the next are matched (unless that leaves fewer than ``minimum``
    points): the unambiguous matches that start the alternation safely.
    """
    from scipy.optimize import linear_sum_assignment
    from scipy.spatial.distance import cdist

    d = cdist(xy_px, cand_px)
    if distinct and d.shape[1] > 1:
        two = np.sort(d, axis=1)[:, :2]
        clear = (two[:, 0] <= gate_px) & (two[:, 0] < 0.5 * two[:, 1])
        if 2 * clear.sum() >= max(minimum, 6):
            d = np.where(clear[:, None], d, np.inf)
    cost = np.where(d <= gate_px, d, 1e6)
    rows, cols = linear_sum_assignment(cost)
    assigned = np.full(len(xy_px), -1)
    ok = d[rows, cols] <= gate_px
    assigned[rows[ok]] = cols[ok]
    return assigned


# ---------------------------------------------------------------------------
# crossings measured in one pattern
# ---------------------------------------------------------------------------

def _row_keys(hkl):
    """One integer per index triple (for comparing pairs of labels)."""
    h = np.asarray(hkl, np.int64) + 512
    return (h[:, 0] * 1024 + h[:, 1]) * 1024 + h[:, 2]


def _refuse_repeats(rows, label, what):
    """A point (or label pair) given twice would count twice and shrink every sigma."""
    rows = np.asarray(rows)
    if len(rows) < 2:
        return
    _, first, counts = np.unique(rows, axis=0, return_index=True, return_counts=True)
    if np.any(counts > 1):
        again = [int(i) for i in np.setdiff1d(np.arange(len(rows)), first)]
        twice = [i + 1 for i in again[:5]]
        raise InputError(f"{label}points: {len(again)} {what}(s) repeat an earlier one (rows "
                         f"{', '.join(map(str, twice))}{', ...' if len(again) > 5 else ''}): a "
                         "crossing measured twice must be given once (average the positions)")


class CrossingData:
    """Measured crossing positions of one pattern, labelled or not."""

    def __init__(self, points, exclude=()):
        self.xy = np.asarray(points.xy_px, dtype=float)
        self.sigma = None if points.sigma_px is None else np.asarray(points.sigma_px, float)
        self.labelled = points.labelled
        n = len(self.xy)
        self.hkl_a = np.zeros((n, 3), np.int64) if not self.labelled else \
            np.asarray(points.hkl_a, np.int64)
        self.hkl_b = np.zeros((n, 3), np.int64) if not self.labelled else \
            np.asarray(points.hkl_b, np.int64)
        self.used = np.ones(n, bool)
        self.notes = [""] * n
        self.exclude = set(map(tuple, exclude))
        if self.labelled and self.exclude:
            out = _excluded(self.hkl_a, self.exclude) | _excluded(self.hkl_b, self.exclude)
            self.used &= ~out
            for i in np.flatnonzero(out):
                self.notes[i] = "a line of this crossing is excluded"
        self.gate = None
        self.rivals = []
        self.kind = "crossings"

    def __len__(self):
        return len(self.xy)

    def check(self, problem, j):
        """Refuse points that cannot be fitted: too few, collinear, bad labels."""
        spec = problem.specs[j]
        if len(self.xy) == 0:
            raise InputError(f"{spec.label}no points to fit")
        if len(self.xy) >= 2:
            sv = np.linalg.svd(self.xy - self.xy.mean(axis=0), compute_uv=False)
            if sv[0] == 0 or sv[-1] < 1e-3 * sv[0]:
                raise InputError(f"{spec.label}the points are collinear (or coincide): a "
                                 "crossing pattern needs points spread in two dimensions")
        _refuse_repeats(self.xy, spec.label, "point")
        if not self.labelled:
            return
        pairs = np.sort(np.stack([_row_keys(self.hkl_a), _row_keys(self.hkl_b)], 1), axis=1)
        _refuse_repeats(pairs, spec.label, "label pair")
        crystal = problem.parameters.crystal
        both = np.concatenate([self.hkl_a, self.hkl_b])
        if np.any(~np.any(both, axis=1)):
            raise InputError(f"{spec.label}a label names the reflection 0 0 0")
        absent = crystal.is_absent(both)
        if np.any(absent):
            bad = both[absent][0]
            raise InputError(f"{spec.label}label ({' '.join(map(str, bad))}) is a "
                             f"systematically absent reflection of "
                             f"{crystal.space_group_symbol}: it draws no line")
        layers = both @ np.asarray(spec.zone)
        if np.any(layers < 0):
            bad = both[layers < 0][0]
            raise InputError(f"{spec.label}label ({' '.join(map(str, bad))}) has hu+kv+lw "
                             f"< 0 for zone {list(spec.zone)}: its line is not in the "
                             "central disk")
        pm = problem.parameters
        full = pm.full0[None]
        geo = pm.geometry(full, j)
        t = crossing_positions(geo.bases[0], spec.zone, spec.x_axis, geo.wave_numbers[0],
                               self.hkl_a, self.hkl_b)
        angles = crossing_angles_deg(geo.bases[0], spec.zone, spec.x_axis,
                                     geo.wave_numbers[0], self.hkl_a, self.hkl_b,
                                     np.nan_to_num(t))
        bad = ~np.isfinite(t).all(axis=1) | (angles < 1.0)
        if np.any(bad):
            i = int(np.flatnonzero(bad)[0])
            raise InputError(f"{spec.label}row {i + 1}: lines "
                             f"({' '.join(map(str, self.hkl_a[i]))}) and "
                             f"({' '.join(map(str, self.hkl_b[i]))}) are parallel or nearly so")

    def check_inside_disk(self, spec, center, scale):
        """Refuse points far outside the disk of a known detector geometry."""
        r = np.linalg.norm((self.xy - np.asarray(center)) / scale, axis=1)
        far = r > 1.5 * spec.disk_mrad
        if np.any(far):
            i = int(np.flatnonzero(far)[0])
            raise InputError(f"{spec.label}point {i + 1} lies {r[i]:.1f} mrad from the centre, "
                             f"far outside a {spec.disk_mrad:g} mrad disk (check the centre, "
                             "the scale and the disk radius)")

    def start(self, problem, j):
        """Detector start values of pattern j: from the labels, or by a search."""
        pm, spec = problem.parameters, problem.specs[j]
        warnings = []
        if self.labelled:
            geo = pm.geometry(pm.full0[None], j)
            t = crossing_positions(geo.bases[0], spec.zone, spec.x_axis, geo.wave_numbers[0],
                                   self.hkl_a[self.used], self.hkl_b[self.used])
            options = [spec.mirror] if spec.mirror is not None else [False, True]
            c, s, angle, _, m = min((_similarity(t, self.xy[self.used], m) + (m,)
                                     for m in options), key=lambda r: r[3])
            pm.mirror[j] = bool(m)
            centre = c if spec.center_px is None else spec.center_px
            pm.set_start("center_x", j, centre[0])
            pm.set_start("center_y", j, centre[1])
            pm.set_start("scale", j, s if spec.scale_px_per_mrad is None
                         else spec.scale_px_per_mrad)
            pm.set_start("rotation", j, angle if spec.rotation_deg is None
                         else spec.rotation_deg)
            return warnings
        if spec.scale_px_per_mrad is None:
            raise InputError(f"{spec.label}unlabelled points need a starting detector scale "
                             "(scale_px_per_mrad or a calibration)")
        pattern = _predicted(problem, j, pm.full0, spec.min_angle_deg)
        ha, hb = pattern.crossing_hkl()
        keep = ~(_excluded(ha, self.exclude) | _excluded(hb, self.exclude))
        t_cand = pattern.crossing_mrad[keep]
        if len(t_cand) < 2:
            raise InputError(f"{spec.label}fewer than two predicted crossings to match the "
                             "points to; lower the strength threshold or check the zone axis")
        score, m, rot, c, rivals = _search_orientation(
            self.xy, t_cand, spec.scale_px_per_mrad, spec.center_px, spec.rotation_deg,
            spec.mirror, spec.match_mrad)
        if score[0] < max(3, 0.3 * len(self.xy)):
            raise InputError(f"{spec.label}only {score[0]} of {len(self.xy)} points lie within "
                             f"{spec.match_mrad:g} mrad of a predicted crossing in any "
                             "orientation: check the zone axis, the scale or the match gate")
        self.rivals = _note_orientation(spec, rot, m, rivals, "points", warnings,
                                        "fix the orientation (rotation and mirror, or a "
                                        "calibration) from a labelled reference") or self.rivals
        pm.mirror[j] = bool(m)
        pm.set_start("center_x", j, c[0])
        pm.set_start("center_y", j, c[1])
        pm.set_start("scale", j, spec.scale_px_per_mrad)
        pm.set_start("rotation", j, rot)
        self.gate = spec.match_mrad
        return warnings

    @property
    def needs_assignment(self):
        return not self.labelled

    def assign(self, problem, j, full, round_):
        """Match unlabelled points to predicted crossings; returns the assignment key."""
        if self.labelled:
            return None
        pm, spec = problem.parameters, problem.specs[j]
        pattern = _predicted(problem, j, full, spec.min_angle_deg)
        ha, hb = pattern.crossing_hkl()
        keep = ~(_excluded(ha, self.exclude) | _excluded(hb, self.exclude))
        ha, hb, t_cand = ha[keep], hb[keep], pattern.crossing_mrad[keep]
        det = pm.detector(full, j)
        cand_px = det.to_pixels(t_cand)
        assigned = _match(self.xy, cand_px, self.gate * det.scale_px_per_mrad,
                          distinct=round_ == 0, minimum=len(pm.free))
        self.used = assigned >= 0
        self.hkl_a = np.zeros((len(self.xy), 3), np.int64)
        self.hkl_b = np.zeros((len(self.xy), 3), np.int64)
        self.hkl_a[self.used] = ha[assigned[self.used]]
        self.hkl_b[self.used] = hb[assigned[self.used]]
        self.notes = ["" if u else "no predicted crossing within the gate" for u in self.used]
        self._candidates = (ha, hb, cand_px)
        return tuple((tuple(ha[a]), tuple(hb[a])) if a >= 0 else None for a in assigned)

    def after_round(self, problem, j, full, rms_px):
        """Shrink the gate toward the achieved precision, never below 3 px."""
        if self.labelled:
            return
        scale = problem.parameters.detector(full, j).scale_px_per_mrad
        spec = problem.specs[j]
        self.gate = max(min(spec.match_mrad, 6 * rms_px / scale), 3.0 / scale)

    def active(self, problem, j):
        spec = problem.specs[j]
        u = self.used
        return Crossings(spec.zone, spec.x_axis, self.xy[u], self.hkl_a[u], self.hkl_b[u],
                         None if self.sigma is None else self.sigma[u])

    def set_used(self, mask, notes):
        """Mark groups of the active set (in order) as rejected with a note."""
        idx = np.flatnonzero(self.used)
        for k, i in enumerate(idx):
            if not mask[k]:
                self.used[i] = False
                self.notes[i] = notes[k]

    def ambiguity(self, problem, j, full, rms_px):
        """Note points lying as near a second predicted crossing as their own."""
        if self.labelled or not hasattr(self, "_candidates"):
            return 0
        from scipy.spatial.distance import cdist

        ha, hb, _ = self._candidates
        pattern = _predicted(problem, j, full, problem.specs[j].min_angle_deg)
        pa, pb = pattern.crossing_hkl()
        keep = ~(_excluded(pa, self.exclude) | _excluded(pb, self.exclude))
        pa, pb = pa[keep], pb[keep]
        cand_px = problem.parameters.detector(full, j).to_pixels(pattern.crossing_mrad[keep])
        level = 3 * max(rms_px, 0.05)
        d = cdist(self.xy, cand_px)
        count = 0
        for i in np.flatnonzero(self.used):
            own = {tuple(self.hkl_a[i]), tuple(self.hkl_b[i])}
            others = [k for k in np.flatnonzero(d[i] < level)
                      if {tuple(pa[k]), tuple(pb[k])} != own]
            if others:
                k = others[0]
                self.notes[i] = (f"ambiguous: the crossing of ({' '.join(map(str, pa[k]))}) "
                                 f"and ({' '.join(map(str, pb[k]))}) is as near")
                count += 1
        return count


# ---------------------------------------------------------------------------
# lines detected in one image
# ---------------------------------------------------------------------------

_POINTS_PER_LINE = (-0.8, 0.0, 0.8)  # positions along each chord, fractions of its half


def _line_samples(detection, indices):
    """Three points on each detected line and the covariance of their positions."""
    cx, cy = detection.disk.center_px
    points, covariances = [], []
    for i in indices:
        ln = detection.lines[i]
        ang = math.radians(ln.normal_angle_deg)
        n = np.array([math.cos(ang), math.sin(ang)])
        m = np.array([-n[1], n[0]])
        along = (ln.points_px - [cx, cy]) @ m
        half = 0.5 * (along.max() - along.min())
        mid = 0.5 * (along.max() + along.min())
        s = mid + half * np.array(_POINTS_PER_LINE)
        offset = ln.offset_px + ln.curvature_per_px * s * s
        points.append(np.array([cx, cy]) + offset[:, None] * n + s[:, None] * m)
        # position along the normal moves by d_rho - s d_angle + s^2 d_kappa
        jac = np.stack([np.ones_like(s), -s, s * s], axis=1)
        covariances.append(jac @ ln.covariance @ jac.T + np.eye(3) * 1e-12)
    return np.array(points), np.array(covariances)


class LineData:
    """Lines detected in one pattern image (:class:`laueline.images.detect.Detection`)."""

    def __init__(self, detection, exclude=()):
        self.detection = detection
        self.good = detection.good_lines
        self.points, self.covariance = _line_samples(detection, self.good)
        self.hkl = np.zeros((len(self.good), 3), np.int64)
        self.used = np.zeros(len(self.good), bool)
        self.notes = [""] * len(self.good)
        self.exclude = set(map(tuple, exclude))
        self.gate = None
        self.rivals = []
        self.kind = "line points"
        self.labelled = False

    def __len__(self):
        return len(self.good)

    needs_assignment = True

    def check(self, problem, j):
        if len(self.good) < 3:
            raise InputError(f"{problem.specs[j].label}only {len(self.good)} usable lines were "
                             "detected: too few to fit")

    def _predicted_lines(self, problem, j, full):
        """Predicted lines as (hkl, normal angle rad, offset px from the disk centre)."""
        pattern = _predicted(problem, j, full)
        det = problem.parameters.detector(full, j)
        keep = ~_excluded(pattern.hkl, self.exclude)
        centre = np.asarray(self.detection.disk.center_px)
        # a straight line n.t = d in mrad maps to pixels as N.(p - c) = d with N = M^-T n
        normal_px = pattern.normal[keep] @ np.linalg.inv(det.matrix)
        length = np.linalg.norm(normal_px, axis=1)
        normal_px /= length[:, None]
        offset = pattern.offset_mrad[keep] / length + normal_px @ (np.asarray(det.center_px)
                                                                   - centre)
        return pattern.hkl[keep], np.arctan2(normal_px[:, 1], normal_px[:, 0]), offset

    def start(self, problem, j):
        """Rotation and mirror that bring most predicted lines onto detected ones."""
        pm, spec = problem.parameters, problem.specs[j]
        warnings = []
        centre = np.asarray(self.detection.disk.center_px)
        d_ang = np.array([math.radians(self.detection.lines[i].normal_angle_deg)
                          for i in self.good])
        d_off = np.array([self.detection.lines[i].offset_px for i in self.good])
        mirrors = [spec.mirror] if spec.mirror is not None else [False, True]
        rotations = [float(spec.rotation_deg)] if spec.rotation_deg is not None \
            else np.arange(0.0, 360.0, 0.5)
        gate = self.gate
        results = []
        for m in mirrors:
            pm.mirror[j] = bool(m)
            full = pm.full0.copy()
            full[pm.slot("rotation", j)] = 0.0
            _, p_ang, p_off = self._predicted_lines(problem, j, full)
            rot = np.asarray(rotations)
            ang = p_ang[None, :] + np.radians(rot)[:, None]           # (R, P)
            da = np.angle(np.exp(1j * (d_ang[None, :, None] - ang[:, None, :])))  # (R, D, P)
            same = (np.abs(da) < math.radians(1.0)) & \
                (np.abs(d_off[None, :, None] - p_off[None, None, :]) < gate)
            flipped = (np.abs(np.abs(da) - math.pi) < math.radians(1.0)) & \
                (np.abs(d_off[None, :, None] + p_off[None, None, :]) < gate)
            hits = np.sum(np.any(same | flipped, axis=2), axis=1)
            results += [(int(h), not m, -r, m, float(r)) for h, r in zip(hits, rot)]
        results.sort(reverse=True)
        hits, _, _, m, rot = results[0]
        rivals = [(r[3], r[4]) for r in results[1:] if r[0] >= hits and
                  (r[3] != m or abs((r[4] - rot + 180) % 360 - 180) > 5)]
        if hits < max(3, 0.3 * len(self.good)):
            raise InputError(f"{spec.label}only {hits} of {len(self.good)} detected lines "
                             "match predicted ones in any orientation: check the zone axis, "
                             "the voltage and the scale")
        self.rivals = _note_orientation(spec, rot, m, rivals, "lines", warnings,
                                        "fix the orientation from a labelled reference") \
            or self.rivals
        pm.mirror[j] = bool(m)
        pm.set_start("rotation", j, rot)
        return warnings

    def assign(self, problem, j, full, round_):
        from scipy.optimize import linear_sum_assignment

        hkl, p_ang, p_off = self._predicted_lines(problem, j, full)
        centre = np.asarray(self.detection.disk.center_px)
        normals = np.stack([np.cos(p_ang), np.sin(p_ang)], axis=1)
        cost = np.empty((len(self.good), len(p_ang)))
        for r, i in enumerate(self.good):
            ln = self.detection.lines[i]
            pts = ln.points_px[::8] - centre
            cost[r] = np.mean(np.abs(pts @ normals.T - p_off[None, :]), axis=0)
            da = np.angle(np.exp(1j * (math.radians(ln.normal_angle_deg) - p_ang)))
            # voltage and strain move lines sideways far more than they turn them
            cost[r, np.minimum(np.abs(da), np.pi - np.abs(da)) > math.radians(1.0)] = np.inf
        rows, cols = linear_sum_assignment(np.where(cost <= self.gate, cost, 1e6))
        assigned = np.full(len(self.good), -1)
        ok = cost[rows, cols] <= self.gate
        assigned[rows[ok]] = cols[ok]
        self.used = assigned >= 0
        self.hkl = np.zeros((len(self.good), 3), np.int64)
        self.hkl[self.used] = hkl[assigned[self.used]]
        self.notes = ["" if u else "no predicted line within the gate" for u in self.used]
        return tuple(tuple(hkl[a]) if a >= 0 else None for a in assigned)

    def after_round(self, problem, j, full, rms_px):
        self.gate = max(min(self.gate, 6 * rms_px), 2.0)

    def active(self, problem, j):
        spec = problem.specs[j]
        u = self.used
        return LinePoints(spec.zone, spec.x_axis, self.hkl[u], self.points[u],
                          self.covariance[u])

    set_used = CrossingData.set_used

    def ambiguity(self, problem, j, full, rms_px):
        return 0
