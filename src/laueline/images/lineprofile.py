"""Deficit-line profiles: sampling across lines and a batched fit of their minima.

A dynamical HOLZ deficit line is not a symmetric Gaussian dip: it is
asymmetric and carries side fringes.  Its profile across the line is
modelled by a Gauss-Hermite series (van der Marel and Franx, ApJ 407, 525,
1993),

    f(d) = b0 + b1 d - D exp(-u^2 / 2) [1 + c u^2 + a u^3],   u = (d - x0) / s,

with depth D, width s, an odd (asymmetry) term a and an even term c
(c < 0 sharpens the core and raises bright side fringes, c > 0 flattens
it); b0 + b1 d takes up what the background model left.  The series lacks
the linear term on purpose: the bracketed dip then has zero slope at u = 0
and, for |a| <= 0.4 and c <= 0.45, its deepest point there, so x0 is the
position of the deficit minimum itself, not the centre of a Gaussian that
an asymmetric line would pull aside.  Weak Gaussian priors (a within 0.2,
c within 0.3, one sigma) keep the shape terms at zero unless the data ask
for them.

Profiles are taken on short segments of a line: the pixels of the
flattened image near each segment centre, binned by their exact distance
across the line (no interpolation).  Pixels near other lines are left out.  All profiles of all lines are fitted
together by a damped Gauss-Newton (Levenberg-Marquardt) iteration
vectorised over profiles.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["ProfileFit", "sample_profiles", "fit_profiles", "fit_line_offsets"]

# one-sigma priors: none on position, depth, width and level; the background
# slope is small after flattening (0.5 % per px), which keeps a profile cut on
# one side (near the rim or another line) from trading slope against position
_PRIOR_SD = np.array([np.inf, np.inf, np.inf, np.inf, 0.005, 0.2, 0.3])
_N_PARAMS = 7  # x0, depth, width, base, slope, asymmetry, fringe


@dataclass
class ProfileFit:
    """Batched fits of M profiles (arrays of shape (M,) unless noted).

    Attributes
    ----------
    minimum : offset (px, along the normal) of the profile's minimum
    minimum_var : its variance (px^2)
    depth, depth_sigma : fitted D (relative to the flattened background)
    width : fitted s (px; the FWHM of the Gaussian core is 2.355 s)
    asymmetry, fringe : a and c of the Gauss-Hermite series
    ok : usable fits
    params : (M, 7) all parameters
    gaussian : ProfileFit or None
        With the shape terms free, the plain Gaussian fit they started from.
    """

    minimum: np.ndarray
    minimum_var: np.ndarray
    depth: np.ndarray
    depth_sigma: np.ndarray
    width: np.ndarray
    asymmetry: np.ndarray
    fringe: np.ndarray
    ok: np.ndarray
    params: np.ndarray
    gaussian: "ProfileFit | None" = None


def sample_profiles(flat, valid, points, normals, half_width, segment, others=None,
                    step=0.5):
    """Profiles across lines at segment centres, from the pixels themselves.

    Every usable pixel within ``segment / 2`` of a segment centre along the
    line and within ``half_width`` across it enters the profile at its exact
    distance d from the line; pixels are binned by d in ``step``-px bins and
    each bin keeps its mean intensity, its pixel count and its mean d.  No
    interpolation: an interpolated profile would be blurred (moving the
    minimum of an asymmetric dip) and distorted where the line runs along a
    pixel row.

    Parameters
    ----------
    flat : ndarray (rows, cols)
        Flattened image (background removed, 0 on the background).
    valid : ndarray of bool (rows, cols)
        Usable pixels.
    points, normals : ndarray (M, 2)
        Segment centres (x, y) px and unit normals.
    half_width : float or ndarray (M,)
        Profiles reach from -half_width to +half_width px along the normal.
    segment : float
        Length of a segment along the line (px).
    others : tuple of (M, J) arrays, optional
        ``(distance, along_normal, along_tangent, keep_out)``: signed
        distance of each other (straight) line from each segment centre,
        the components of that line's normal along the segment's normal and
        tangent, and the half width (px) to keep clear of it; 0 for none.
    step : float
        Bin width across the line (px).

    Returns
    -------
    d : ndarray (M, n)
        Mean distance across the line of each bin (its centre when empty), px.
    profile : ndarray (M, n)
        Mean flattened intensity; 0 where nothing is usable.
    count : ndarray (M, n)
        Number of pixels averaged (0: left out).
    crowded : ndarray of bool (M,)
        Another line passes through the sampled patch.
    """
    points = np.asarray(points, float)
    normals = np.asarray(normals, float)
    m_count = len(points)
    rows, cols = flat.shape
    hw_m = np.broadcast_to(np.asarray(half_width, float), (m_count,))
    hw = float(np.max(hw_m)) if m_count else 1.0
    # each segment's pixels lie in a rotated rectangle; its bounding box is
    # tight when segments of like orientation and width share one (four
    # classes of the angle of the normal to the nearest image axis, widths in
    # classes of a factor of two)
    ax, ay = np.abs(normals[:, 0]), np.abs(normals[:, 1])
    ex = hw_m * ax + 0.5 * segment * ay         # half extents of the rectangles, px
    ey = hw_m * ay + 0.5 * segment * ax
    kind = np.minimum((np.arctan2(ay, ax) / (np.pi / 8)).astype(int), 3) + \
        4 * np.ceil(np.log2(np.maximum(hw_m, 1.0))).astype(int)
    out = [np.empty((m_count, int(math.ceil(2 * hw / step)))) for _ in range(3)]
    crowded = np.zeros(m_count, dtype=bool)
    for k in np.unique(kind):
        members = np.flatnonzero(kind == k)
        box = (int(math.ceil(ex[members].max())) + 1, int(math.ceil(ey[members].max())) + 1)
        chunk = max(1, _MAX_SAMPLES // ((2 * box[0] + 1) * (2 * box[1] + 1)))
        for lo in range(0, len(members), chunk):  # memory bounded by a few million samples
            sel = members[lo:lo + chunk]
            sub = None if others is None else tuple(a[sel] for a in others)
            parts = _sample(flat, valid, points[sel], normals[sel], hw_m[sel], hw, segment,
                            sub, step, box)
            for target, part in zip(out, parts[:3]):
                target[sel] = part
            crowded[sel] = parts[3]
    return out[0], out[1], out[2], crowded


_MAX_SAMPLES = 4_000_000


def _sample(flat, valid, points, normals, hw_m, hw, segment, others, step, box):
    """:func:`sample_profiles` for one chunk of segments (all sharing the bins of ``hw``).

    ``box`` (x, y): half size in px of the pixel patch around each segment centre.
    """
    m_count = len(points)
    rows, cols = flat.shape
    n_bins = int(math.ceil(2 * hw / step))
    centres = -hw + step * (np.arange(n_bins) + 0.5)
    off_x, off_y = np.arange(-box[0], box[0] + 1), np.arange(-box[1], box[1] + 1)
    base = np.round(points).astype(np.intp)
    frac = points - base                                   # (M, 2) in [-0.5, 0.5]
    nx, ny = normals[:, 0, None, None], normals[:, 1, None, None]
    # pixel offsets from the segment centre: d across the line, v along it
    ox, oy = off_x[None, None, :].astype(float), off_y[None, :, None].astype(float)
    d0 = (frac[:, 0] * normals[:, 0] + frac[:, 1] * normals[:, 1])[:, None, None]
    v0 = (-frac[:, 0] * normals[:, 1] + frac[:, 1] * normals[:, 0])[:, None, None]
    d = ox * nx + oy * ny - d0
    v = oy * nx - ox * ny - v0
    use = (np.abs(v) <= segment / 2.0) & (np.abs(d) < hw_m[:, None, None])
    lin = (base[:, 1] * cols + base[:, 0])[:, None, None] + \
        (off_y[:, None] * cols + off_x[None, :])[None]
    lo, hi = base.min(axis=0) - np.array(box), base.max(axis=0) + np.array(box)
    if lo[0] < 0 or lo[1] < 0 or hi[0] >= cols or hi[1] >= rows:  # patches at the frame's edge
        ix = base[:, 0, None, None] + off_x[None, None, :]
        iy = base[:, 1, None, None] + off_y[None, :, None]
        use &= (ix >= 0) & (ix < cols) & (iy >= 0) & (iy < rows)
        lin = np.where(use, lin, 0)
    use &= valid.ravel()[lin]
    crowded = np.zeros(m_count, dtype=bool)
    if others is not None:
        dist, along_n, along_t, keep = others
        # only (segment, line) pairs whose line comes near the sampled patch
        reach = np.abs(dist) - hw * np.abs(along_n) - 0.5 * segment * np.abs(along_t)
        m_idx, j_idx = np.nonzero((reach < keep) & (keep > 0))
        crowded[m_idx] = True
        # the other line's distance at pixel offset (ox, oy) is dist + d along_n
        # + v along_t, linear in the offsets: a + b ox + c oy
        an, at = along_n[m_idx, j_idx], along_t[m_idx, j_idx]
        nxp, nyp = normals[m_idx, 0], normals[m_idx, 1]
        a = dist[m_idx, j_idx] - d0[m_idx, 0, 0] * an - v0[m_idx, 0, 0] * at
        b, c = nxp * an - nyp * at, nyp * an + nxp * at
        kp = keep[m_idx, j_idx]
        # one pass per rank of a pair within its segment: no segment twice in a pass
        first = np.searchsorted(m_idx, m_idx)
        rank = np.arange(len(m_idx)) - first
        for k in range(int(rank.max()) + 1 if len(rank) else 0):
            sel = rank == k
            near = np.abs(a[sel, None, None] + b[sel, None, None] * ox
                          + c[sel, None, None] * oy) < kp[sel, None, None]
            use[m_idx[sel]] &= ~near
    seg_id = np.nonzero(use)[0]
    d_use = d[use]
    bins = np.clip(((d_use + hw) / step).astype(np.intp), 0, n_bins - 1)
    key = seg_id * n_bins + bins
    size = m_count * n_bins
    count = np.bincount(key, minlength=size).astype(float).reshape(m_count, n_bins)
    total = np.bincount(key, flat.ravel()[lin[use]], minlength=size).reshape(m_count, n_bins)
    dsum = np.bincount(key, d_use, minlength=size).reshape(m_count, n_bins)
    profile = np.divide(total, count, out=np.zeros_like(total), where=count > 0)
    dmean = np.where(count > 0, dsum / np.maximum(count, 1), centres[None, :])
    return dmean, profile, count, crowded


def _model(p, d, cols=None):
    """Profile model and Jacobian; p (M, 7), d (M, n) -> f (M, n), J (M, n, len(cols)).

    ``cols`` lists the parameters whose derivatives are wanted (all by default).
    """
    x0, depth, width, base, slope, a, c = (p[:, k:k + 1] for k in range(_N_PARAMS))
    u = (d - x0) / width
    u2 = u * u
    e = np.exp(-0.5 * u2)
    shape = 1.0 + c * u2 + a * u2 * u
    g = e * shape
    f = base + slope * d - depth * g
    cols = range(_N_PARAMS) if cols is None else cols
    jac = np.empty(f.shape + (len(cols),))
    if 0 in cols or 2 in cols:
        dg_w = depth * e * (-u * shape + 2.0 * c * u + 3.0 * a * u2) / width
    for k, col in enumerate(cols):
        if col == 0:
            jac[..., k] = dg_w
        elif col == 1:
            jac[..., k] = -g
        elif col == 2:
            jac[..., k] = dg_w * u
        elif col == 3:
            jac[..., k] = 1.0
        elif col == 4:
            jac[..., k] = d
        elif col == 5:
            jac[..., k] = -depth * e * u2 * u
        else:
            jac[..., k] = -depth * e * u2
    return f, jac


def fit_profiles(d, profile, count, start_x0, start_width, noise, *, max_width=None,
                 search=2.0, shape_terms=True, iterations=20, shape_iterations=None):
    """Fit the Gauss-Hermite deficit model to every profile at once.

    Parameters
    ----------
    d, profile, count :
        As returned by :func:`sample_profiles`.
    start_x0, start_width : ndarray (M,) or float
        Start values of the dip centre and width (px).
    noise : float
        Noise of one flattened pixel (relative units); a profile point
        averaged over n pixels has noise / sqrt(n) before the residual scale.
    max_width : float, optional
        Largest width s accepted (px).
    search : float
        The fit starts from the deepest point of the smoothed profile within
        this distance (px) of ``start_x0``.
    shape_terms : bool
        Free the asymmetry and fringe terms after a plain Gaussian fit;
        False stops at the Gaussian (as a start for :func:`template_minima`).
    iterations : int
        Most Levenberg-Marquardt steps; each profile leaves the iteration
        as soon as it has converged.
    shape_iterations : int, optional
        Most steps once the shape terms are free (by default ``iterations``).

    Returns
    -------
    ProfileFit
        With ``shape_terms``, its ``gaussian`` holds the plain Gaussian fit.
    """
    m_count = profile.shape[0]
    start_x0 = np.broadcast_to(np.asarray(start_x0, float), (m_count,))
    start_width = np.broadcast_to(np.asarray(start_width, float), (m_count,))
    max_width = float(max_width or max(3.0 * float(np.max(start_width)), 4.0))
    w = np.sqrt(count) / noise                                   # (M, n) inverse sigmas
    used = count > 0
    base0 = _masked_median(profile, used)
    # start at the deepest point of the lightly smoothed profile near the start
    from scipy.ndimage import uniform_filter1d

    smooth = uniform_filter1d(np.where(used, profile, base0[:, None]), 3, axis=1)
    near = np.abs(d - start_x0[:, None]) <= search + 0.5
    at = np.argmin(np.where(near, smooth, np.inf), axis=1)
    dip0 = base0 - smooth[np.arange(m_count), at]
    p = np.stack([d[np.arange(m_count), at], np.maximum(dip0, noise), start_width, base0,
                  np.zeros(m_count), np.zeros(m_count), np.zeros(m_count)], 1)
    # first a plain Gaussian dip (shape terms held at zero), then everything
    gaussian = (0, 1, 2, 3, 4)
    p = _levenberg_marquardt(p, d, profile, w, gaussian, max_width, iterations)
    if not shape_terms:
        return _finished_fit(p, d, profile, w, gaussian, max_width)
    free = tuple(range(_N_PARAMS))
    full = _finished_fit(_levenberg_marquardt(p, d, profile, w, free, max_width,
                                              shape_iterations or iterations),
                         d, profile, w, free, max_width)
    full.gaussian = _finished_fit(p, d, profile, w, gaussian, max_width)
    return full


def _finished_fit(p, d, profile, w, free, max_width):
    """ProfileFit of parameters ``p`` fitted over ``free``: covariances and checks."""
    m_count = profile.shape[0]
    used = w > 0
    f, jac = _model(p, d, free)
    r = (f - profile) * w
    jw = jac * w[..., None]
    prior_diag = _prior_diag(free)
    a_mat = np.matmul(jw.transpose(0, 2, 1), jw) + np.diag(prior_diag)[None]
    n_used = used.sum(axis=1)
    dof = np.maximum(n_used - _N_PARAMS, 1)  # as for the full series, free or held
    s2 = np.sum(r * r, axis=1) / dof
    s2 = s2 * _correlation_factor(r, used)
    ok = n_used >= _N_PARAMS + 2
    cov = np.full((m_count, len(free), len(free)), np.nan)
    good_mat = ok & np.all(np.isfinite(a_mat), axis=(1, 2))
    if good_mat.any():
        with np.errstate(divide="ignore", invalid="ignore"):  # singular: sign 0, left out
            sign, _ = np.linalg.slogdet(a_mat[good_mat])
        idx = np.flatnonzero(good_mat)[sign > 0]
        cov[idx] = np.linalg.inv(a_mat[idx]) * s2[idx, None, None]
        ok &= np.isin(np.arange(m_count), idx)
    minimum, depth, width, a, c = p[:, 0], p[:, 1], p[:, 2], p[:, 5], p[:, 6]
    var = cov[:, 0, 0]
    depth_sigma = np.sqrt(np.abs(cov[:, 1, 1]))
    ok &= np.isfinite(var) & (var > 0) & (depth > 0) & (width < 0.98 * max_width)
    ok &= (minimum > d[:, 0] + width) & (minimum < d[:, -1] - width)
    return ProfileFit(minimum, var, depth, depth_sigma, width, a, c, ok, p)


def _prior_diag(free):
    """Inverse prior variances of the free parameters (0 where there is no prior)."""
    sd = _PRIOR_SD[list(free)]
    return np.where(np.isfinite(sd), 1.0 / sd ** 2, 0.0)


def _levenberg_marquardt(p, d, profile, w, free, max_width, iterations):
    """Damped Gauss-Newton over the parameters ``free`` of every profile at once.

    Each profile is iterated until its cost stops falling (relative change
    below 1e-7) or its position and width stop moving on an accepted step,
    or until rejected steps have driven the damping beyond 1e3; converged
    profiles leave the batch, so the work follows the profiles still moving.
    """
    free = list(free)
    prior_diag = _prior_diag(free)
    prior_w = np.sqrt(prior_diag)
    eye = np.eye(len(free))

    def cost_and_parts(p, d, profile, w):
        f, jac = _model(p, d, free)
        r = (f - profile) * w
        jac *= w[..., None]                         # weighted Jacobian
        prior = p[:, free] * prior_w
        return np.sum(r * r, axis=1) + np.sum(prior * prior, axis=1), r, jac

    p = p.copy()
    lam = np.full(len(p), 1e-2)
    cost, r, jac = cost_and_parts(p, d, profile, w)
    active = np.arange(len(p))
    for _ in range(iterations):
        if not len(active):
            break
        pa, da, wa = p[active], d[active], w[active]
        jt = jac.transpose(0, 2, 1)
        a_mat = np.matmul(jt, jac) + np.diag(prior_diag)[None]
        grad = np.matmul(jt, r[..., None])[..., 0] + prior_diag[None] * pa[:, free]
        diag = np.einsum("mii->mi", a_mat)
        damped = a_mat + (lam[active][:, None] * np.maximum(diag, 1e-12))[:, :, None] * eye
        try:
            step = -np.linalg.solve(damped, grad[..., None])[..., 0]
        except np.linalg.LinAlgError:
            break
        trial = pa.copy()
        trial[:, free] += step
        trial[:, 2] = np.clip(trial[:, 2], 0.3, max_width)
        trial[:, 5] = np.clip(trial[:, 5], -0.4, 0.4)
        trial[:, 6] = np.clip(trial[:, 6], -0.8, 0.45)
        trial[:, 0] = np.clip(trial[:, 0], da[:, 0], da[:, -1])
        new_cost, new_r, new_jac = cost_and_parts(trial, da, profile[active], wa)
        old = cost[active]
        better = new_cost < old
        p[active[better]] = trial[better]
        cost[active[better]] = new_cost[better]
        lam[active] = np.where(better, lam[active] / 3.0, lam[active] * 4.0)
        # converged: the cost no longer falls, or the position and width no longer
        # move (well below a thousandth of a pixel), or the damping has run away
        settled = (np.abs(step[:, 0]) < 2e-4) & (np.abs(step[:, 2]) < 1e-3 * pa[:, 2])
        done = (better & ((old - new_cost <= 1e-7 * old) | settled)) | (lam[active] > 1e3)
        r[better], jac[better] = new_r[better], new_jac[better]
        r, jac = r[~done], jac[~done]
        active = active[~done]
    return p


def _masked_median(profile, used):
    """Median of each row over its used entries (0 for a row with none)."""
    n_used = used.sum(axis=1)
    ordered = np.sort(np.where(used, profile, np.inf), axis=1)
    lo = np.clip((n_used - 1) // 2, 0, profile.shape[1] - 1)
    hi = np.clip(n_used // 2, 0, profile.shape[1] - 1)
    rows = np.arange(len(profile))
    out = 0.5 * (ordered[rows, lo] + ordered[rows, hi])
    return np.where(n_used > 0, out, 0.0)


def _correlation_factor(r, used):
    """Variance inflation for correlated neighbouring profile points.

    Neighbouring points share pixels (bilinear interpolation, detector blur),
    so the residual scatter overstates the information; the factor
    (1 + rho) / (1 - rho) with rho the lag-1 correlation of the residuals
    (pooled over all profiles) is the usual effective-sample-size correction
    of an AR(1) series.
    """
    both = used[:, 1:] & used[:, :-1]
    if both.sum() < 20:
        return 1.0
    a, b = r[:, 1:][both], r[:, :-1][both]
    rho = float(np.sum(a * b) / math.sqrt(np.sum(a * a) * np.sum(b * b) + 1e-300))
    rho = min(max(rho, 0.0), 0.8)
    return (1 + rho) / (1 - rho)


def fit_line_offsets(s, offset, var, weight_ok, span, *, curvature_sagitta_px=0.1):
    """Weighted fits offset = r + beta s + kappa s^2 of each line's segment minima.

    Parameters
    ----------
    s, offset, var : ndarray (L, K)
        Coordinate along each line, measured offset along its normal and its
        variance, for K segments of L lines.
    weight_ok : ndarray of bool (L, K)
        Segments to use.
    span : ndarray (L,)
        Half chord length (px); a Gaussian prior holds the sagitta
        kappa span^2 to about ``curvature_sagitta_px`` unless the data insist.

    Returns
    -------
    coef : ndarray (L, 3)
        r, beta, kappa.
    cov : ndarray (L, 3, 3)
        Scaled up by chi2/dof when the scatter exceeds the variances (Birge).
    chi2, dof : ndarray (L,)
    """
    wgt = np.where(weight_ok, 1.0 / np.where(var > 0, var, np.inf), 0.0)
    design = np.stack([np.ones_like(s), s, s * s], axis=2)          # (L, K, 3)
    a_mat = np.einsum("lk,lki,lkj->lij", wgt, design, design)
    kappa_prior = curvature_sagitta_px / np.maximum(span, 1.0) ** 2
    a_mat[:, 2, 2] += 1.0 / kappa_prior ** 2
    rhs = np.einsum("lk,lki,lk->li", wgt, design, offset)
    a_mat[:, 0, 0] += 1e-12
    a_mat[:, 1, 1] += 1e-12
    cov = np.linalg.inv(a_mat)
    coef = np.einsum("lij,lj->li", cov, rhs)
    resid = offset - np.einsum("lki,li->lk", design, coef)
    chi2 = np.sum(wgt * resid * resid, axis=1)
    dof = np.maximum(weight_ok.sum(axis=1) - 3, 1)
    cov = cov * np.maximum(chi2 / dof, 1.0)[:, None, None]
    return coef, cov, chi2, dof


def pool_offsets(offset, var, width, usable):
    """Each line's template offset shrunk toward the mean over lines, with its variance.

    A weak line's own template is noisy and its minimum wanders by a good
    fraction of a pixel; the offsets of all lines (in units of each line's
    width, as the offset of a given profile shape scales with it) are
    combined in a random-effects model: the between-line variance tau^2 by
    the moment estimator of DerSimonian and Laird (Controlled Clinical Trials
    7, 177, 1986), then each line's offset is the precision-weighted mean of
    its own and of the pooled one (the best linear unbiased predictor), so a
    strong line keeps its own and a weak one leans on the others.

    Parameters
    ----------
    offset, var : ndarray (L,)
        Template offsets (px) and their variances (px^2).
    width : ndarray (L,)
        Line widths (px) setting the scale of each offset.
    usable : ndarray of bool (L,)
        Lines whose templates enter the pool.

    Returns
    -------
    offset, var : ndarray (L,)
    """
    ok = usable & np.isfinite(offset) & np.isfinite(var) & (var > 0) & (width > 0)
    if ok.sum() < 3:
        return offset, var
    scale = np.where(width > 0, width, 1.0)
    x, v = offset / scale, np.where(ok, var, 1.0) / scale ** 2
    w = 1.0 / v[ok]
    mean = float(np.sum(w * x[ok]) / np.sum(w))
    q = float(np.sum(w * (x[ok] - mean) ** 2))
    tau2 = max(0.0, (q - (ok.sum() - 1)) / (np.sum(w) - np.sum(w * w) / np.sum(w)))
    mean_var = 1.0 / np.sum(w)
    if tau2 > 0:
        post_var = 1.0 / (1.0 / v + 1.0 / tau2)
        post = post_var * (x / v + mean / tau2)
        # the pooled mean is itself uncertain: its share of each line's estimate
        post_var = post_var + (post_var / tau2) ** 2 * mean_var
    else:  # the lines agree within their noise: the common offset for all
        post, post_var = np.full_like(x, mean), np.full_like(x, mean_var)
    new_offset = np.where(ok, post, offset / scale) * scale
    new_var = np.where(ok, post_var * scale ** 2, var)
    # a line that does not enter the pool (too few profiles) takes the pooled offset
    lonely = ~ok
    new_offset[lonely] = mean * scale[lonely]
    new_var[lonely] = (mean_var + tau2) * scale[lonely] ** 2
    return new_offset, new_var


def template_minima(d, profile, count, line_of, fit, noise, *, clean=None, step=0.2,
                    passes=2, refit=True, orientation=None):
    """Minimum positions from a profile template taken from each line itself.

    The Gauss-Hermite series cannot follow every dynamical profile; a biased
    shape biases the minimum.  Here the profiles of one line, shifted by
    their fitted positions and normalised by their depth, are averaged on a
    fine grid into that line's own template, whose minimum (a parabola
    through the template's deepest 0.8 px) fixes the position of the deficit
    minimum relative to the template; every profile is then fitted by the
    template (shift, depth, background b0 + b1 d) and the template rebuilt.

    Parameters
    ----------
    d, profile, count : as from :func:`sample_profiles`
    line_of : ndarray of int (M,)
        The line each profile belongs to.
    fit : ProfileFit
        Start values (Gauss-Hermite fits); profiles with ``ok`` False do
        not enter the templates.
    noise : float
        Noise of one flattened pixel.
    clean : ndarray of bool (M,), optional
        Profiles free of other lines; only they build the templates of
        lines that have at least three of them.
    orientation : ndarray (L,), optional
        Sign of each line's profile axis relative to a physical direction
        shared by all lines (for predicted lines, the direction in which the
        excitation error grows).  When given (and without ``refit``), the
        template offsets are pooled over lines (:func:`pool_offsets`): a weak
        line's own template is too noisy to place its minimum.
    refit : bool
        Fit every profile with its template.  Without, the positions are
        the Gaussian centres of ``fit`` plus the offset from a Gaussian
        centre to the minimum that the template shows: less noisy for weak
        lines, whose single profiles cannot carry a template fit.

    Returns
    -------
    minimum, minimum_var : ndarray (M,)
    ok : ndarray of bool (M,)
    template_offset : ndarray (L,)
        Minimum of each line's template relative to its origin (px).
    template_var : ndarray (L,)
        Variance of that minimum (px^2), shared by all profiles of the line:
        the template averages the profiles that build it, so its minimum is
        as uncertain as their weighted mean position.
    """
    from scipy import ndimage

    line_of = np.asarray(line_of, int)
    n_lines = int(line_of.max()) + 1 if len(line_of) else 0
    p = fit.params.copy()
    shift, depth, base, slope = p[:, 0].copy(), p[:, 1].copy(), p[:, 3].copy(), p[:, 4].copy()
    ok = fit.ok.copy()
    builds = ok.copy()
    if clean is not None:
        n_clean = np.bincount(line_of, ok & clean, minlength=n_lines)
        builds = ok & (clean | (n_clean < 3)[line_of])
    half = float(np.max(np.abs(d)))
    grid = np.arange(-half, half + step / 2, step)
    n_grid = len(grid)
    w = np.sqrt(count) / noise
    offset = np.zeros(max(n_lines, 1))
    var = np.full(len(shift), np.nan)
    width = np.maximum(fit.width, 0.5)
    for _ in range(passes):
        # template: normalised deficit of every usable profile, on the fine grid
        rel = d - shift[:, None]
        norm = (profile - base[:, None] - slope[:, None] * d) / depth[:, None]
        use = (count > 0) & (ok & builds)[:, None] & (np.abs(rel) < half)
        bins = np.clip(np.round((rel + half) / step).astype(int), 0, n_grid - 1)
        key = (line_of[:, None] * n_grid + bins)[use]
        weight = (count * depth[:, None] ** 2)[use]
        total = np.bincount(key, weight * norm[use], minlength=n_lines * n_grid)
        wsum = np.bincount(key, weight, minlength=n_lines * n_grid)
        template = np.divide(total, wsum, out=np.zeros_like(total), where=wsum > 0)
        template = template.reshape(n_lines, n_grid)
        have = wsum.reshape(n_lines, n_grid) > 0
        # fill empty bins from their neighbours, then a light smoothing (one bin)
        for k in range(n_lines):
            if have[k].sum() >= 2 and not have[k].all():
                template[k] = np.interp(grid, grid[have[k]], template[k][have[k]])
        template = ndimage.gaussian_filter1d(template, 1.0, axis=1, mode="nearest")
        # each template's minimum near its origin: a parabola through 5 bins
        line_width = np.bincount(line_of, width, minlength=n_lines) / \
            np.maximum(np.bincount(line_of, minlength=n_lines), 1)
        near = np.abs(grid)[None, :] <= np.maximum(1.5 * line_width, 1.0)[:, None]
        at = np.argmin(np.where(near, template, np.inf), axis=1)
        # a parabola through the template's core (+-0.7 sigma): wide enough to
        # average the template's noise, narrow enough to follow its minimum
        reach = np.clip(np.round(0.7 * line_width / step).astype(int), 2, 20)
        big = int(reach.max())
        at = np.clip(at, big, n_grid - 1 - big)
        offs = np.arange(-big, big + 1)
        yv = np.take_along_axis(template, at[:, None] + offs[None, :], axis=1)
        wv = (np.abs(offs)[None, :] <= reach[:, None]).astype(float)
        xv = offs * step
        design = np.stack([np.ones_like(xv), xv, xv * xv], 1)           # (W, 3)
        normal = np.einsum("lw,wi,wj->lij", wv, design, design)
        coef = np.linalg.solve(normal, np.einsum("lw,wi,lw->li", wv, design, yv)[..., None])[..., 0]
        curv = coef[:, 2]
        vertex = np.where(curv > 0, -coef[:, 1] / (2 * np.where(curv > 0, curv, 1.0)), 0.0)
        lim = reach * step
        offset = grid[at] + np.clip(vertex, -lim, lim)
        # variance of the vertex: the template bins carry noise^2 / sum(count
        # depth^2) each before the one-bin smoothing; propagated through the
        # smoothing, the weighted parabola and vertex = -c1 / (2 c2)
        # bins no profile fell into were filled from their neighbours: they
        # take their neighbours' variance (and add no information of their own:
        # the count of independent bins is that of the filled ones)
        wsum_l = wsum.reshape(n_lines, n_grid)
        bin_var = np.divide(noise ** 2, wsum_l, out=np.full_like(wsum_l, np.nan),
                            where=wsum_l > 0)
        for k in range(n_lines):  # per line only where bins are missing
            filled = np.isfinite(bin_var[k])
            if filled.sum() >= 2 and not filled.all():
                spacing = np.interp(grid, grid[filled], np.arange(filled.sum()))
                density = np.gradient(spacing) / 1.0  # filled bins per grid bin
                bin_var[k] = np.interp(grid, grid[filled], bin_var[k][filled]) / \
                    np.clip(density, 1e-3, 1.0)
        bin_var = np.where(np.isfinite(bin_var), bin_var, 1e6)
        bin_var = np.pad(bin_var, ((0, 0), (4, 4)), mode="edge")
        kernel = np.exp(-0.5 * np.arange(-4, 5) ** 2)
        kernel /= kernel.sum()
        vb = np.take_along_axis(bin_var, at[:, None] + np.arange(-big - 4, big + 5)[None, :],
                                axis=1)                                   # (L, W + 8)
        n_inv = np.linalg.inv(normal)
        left = np.einsum("lij,wj,lw->liw", n_inv, design, wv)            # (L, 3, W)
        # the smoothed bin w is sum_k kernel[k] raw[w + k - 4]: spread each row
        left_raw = np.zeros(left.shape[:2] + (left.shape[2] + 8,))
        for k in range(9):  # nine kernel taps, not a loop over data
            left_raw[:, :, k:k + left.shape[2]] += kernel[k] * left
        coef_cov = np.einsum("liw,lw,ljw->lij", left_raw, vb, left_raw)
        safe = np.where(curv > 0, curv, 1.0)
        grad = np.stack([np.zeros_like(curv), -1.0 / (2 * safe), coef[:, 1] / (2 * safe ** 2)], 1)
        vertex_var = np.einsum("li,lij,lj->l", grad, coef_cov, grad)
        vertex_var = np.where(curv > 0, vertex_var, lim ** 2)
        if not refit:
            var = fit.minimum_var.copy()
            if orientation is not None:  # profiles of one physical orientation
                sign = np.where(np.asarray(orientation) < 0, -1.0, 1.0)
                pooled, vertex_var = pool_offsets(
                    sign * offset, vertex_var, line_width,
                    np.bincount(line_of, ok & builds, minlength=n_lines) >= 3)
                offset = sign * pooled
            break
        # refit every profile with its line's template: shift, depth, b0, b1
        slope_t = np.gradient(template, step, axis=1)
        for _ in range(6):
            coords = (d - shift[:, None] + half) / step
            rows = np.broadcast_to(line_of[:, None], coords.shape)
            tv = ndimage.map_coordinates(template, [rows.ravel(), coords.ravel()], order=1,
                                         mode="nearest").reshape(coords.shape)
            tdv = ndimage.map_coordinates(slope_t, [rows.ravel(), coords.ravel()], order=1,
                                          mode="nearest").reshape(coords.shape)
            model = base[:, None] + slope[:, None] * d + depth[:, None] * tv
            r = (model - profile) * w
            jac = np.stack([-depth[:, None] * tdv, tv, np.ones_like(tv),
                            d], axis=2) * w[..., None]
            a_mat = np.matmul(jac.transpose(0, 2, 1), jac) + 1e-9 * np.eye(4)
            grad = np.matmul(jac.transpose(0, 2, 1), r[..., None])[..., 0]
            try:
                delta = -np.linalg.solve(a_mat, grad[..., None])[..., 0]
            except np.linalg.LinAlgError:
                ok[:] = False
                break
            delta[:, 0] = np.clip(delta[:, 0], -1.0, 1.0)
            shift = shift + delta[:, 0]
            depth, base, slope = depth + delta[:, 1], base + delta[:, 2], slope + delta[:, 3]
        n_used = (count > 0).sum(axis=1)
        s2 = np.sum(r * r, axis=1) / np.maximum(n_used - 4, 1) * _correlation_factor(r, count > 0)
        try:
            var = np.linalg.inv(a_mat)[:, 0, 0] * s2
        except np.linalg.LinAlgError:
            var = np.full(len(shift), np.nan)
        ok &= np.isfinite(var) & (var > 0) & (depth > 0) & (np.abs(shift) < half - 1.0)
    inv = np.where(ok & builds & np.isfinite(var) & (var > 0), 1.0 / np.where(var > 0, var, 1.0),
                   0.0)
    if refit:  # positions from template fits: the template's origin is their mean
        weight_sum = np.bincount(line_of, inv, minlength=n_lines)
        template_var = np.where(weight_sum > 0, 1.0 / np.maximum(weight_sum, 1e-300), np.inf)
    else:      # Gaussian centres plus the template's offset: its vertex carries the noise
        template_var = vertex_var
    return shift + offset[line_of], var, ok, offset, template_var
