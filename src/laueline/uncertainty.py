"""Error model of measured crossings and line points, with a per-line term.

Two kinds of error move a measured HOLZ position:

* point noise: independent for every measured point, standard deviation
  ``point_sigma`` per coordinate (crossings) or across the line (points
  digitised along a line);
* a line offset: an error that belongs to a whole line (its detection, a
  dynamical shift the kinematic model ignores, a mis-set profile), an offset
  ``delta_l`` along the line's normal shared by every observation of line
  ``l``, with standard deviation ``line_sigma``.

A crossing of lines a and b moves by the displacement d solving
``n_a . d = delta_a`` and ``n_b . d = delta_b`` (n the unit normals of the
two loci at the crossing), so a crossing of two lines meeting at a small
angle is poorly located along their bisector, and crossings sharing a line
are correlated.  A point on line a moves across it by ``delta_a``.  Writing
the residual vector r (all coordinates stacked) as r = e + M delta, with M
the *loading* of the line offsets on the residuals, the residual covariance
is

    V = D + M S M^T,   D = diag(point variances),  S = diag(line variances),

a diagonal plus a matrix of rank at most the number of lines.  It is kept in
that form (:class:`ResidualCovariance`): solves use the Woodbury identity

    V^-1 = D^-1 - D^-1 U (I + U^T D^-1 U)^-1 U^T D^-1,   U = M S^(1/2),

so 600 crossings of 50 lines cost a 50 x 50 factorisation, never a dense
1200 x 1200 inverse.  Observation types that share lines (crossings and
points along the same lines) are joined with :func:`combine`.

The parameter covariance of the generalised least-squares (GLS) fit with
Jacobian J is ``(J^T V^-1 J)^-1`` (:func:`gls_covariance`).  For Gaussian
errors this is also the Cramer-Rao bound, the smallest covariance any
unbiased estimator reaches; :func:`predicted_covariance` evaluates it for a
planned experiment from the same two functions the fit uses, so a
predicted sigma and a fitted sigma cannot drift apart.

The line sigma is estimated from the residuals grouped by line
(:func:`estimate_line_sigma`).  Two estimators are offered:

* "reml" (default): restricted maximum likelihood (Patterson and Thompson
  1971), the likelihood of the residuals with the fitted parameters
  integrated out, maximised over the line sigma with the point sigma known;
* "moments": a method of moments generalising the one-way analysis of
  variance (Searle et al. 1992, ch. 3; Paule and Mandel 1982): the line
  sigma at which the GLS chi-square exceeds the chi-square with every line
  offset free ("within lines") by exactly the number of degrees of freedom
  the offsets add.

Both are exact for balanced one-way data; REML is the more efficient when
the lines carry few observations each.

In a fit (sketch)::

    loading, lines = crossing_loading_of_lines(basis, zone, x_axis, K,
                                               hkl_a, hkl_b, t_mrad)
    V = residual_covariance(loading, point_sigma, line_sigma)
    step, cov = gls_solve(J, r, V)            # each Gauss-Newton iteration
    est = estimate_line_sigma(r, loading, point_sigma, J)   # when not given
    parts = add_systematic(cov_strain, systematic_strain)   # stat, sys, total

and the survey evaluates ``predicted_covariance(J, loading, point_sigma,
line_sigma)`` on the planned crossings: the same two functions.

Units are the caller's: residuals, point sigma and line sigma share one
length unit (mrad in the survey, pixels in a fit); the loading is unit-free.

References
----------
Paule, R. C. and Mandel, J. (1982). Consensus values and weighting factors.
J. Res. Natl. Bur. Stand. 87, 377-385.

Patterson, H. D. and Thompson, R. (1971). Recovery of inter-block
information when block sizes are unequal. Biometrika 58, 545-554.

Searle, S. R., Casella, G. and McCulloch, C. E. (1992). *Variance
Components*. New York: Wiley (ch. 3, the one-way classification).

Kay, S. M. (1993). *Fundamentals of Statistical Signal Processing:
Estimation Theory*. Prentice Hall (ch. 3, the Cramer-Rao bound of the
linear Gaussian model).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from .errors import InputError

__all__ = [
    "ResidualCovariance",
    "CovarianceParts",
    "LineSigmaEstimate",
    "crossing_loading",
    "crossing_loading_of_lines",
    "locus_normals",
    "line_point_loading",
    "residual_covariance",
    "combine",
    "gls_covariance",
    "gls_solve",
    "predicted_covariance",
    "estimate_line_sigma",
    "add_systematic",
]

_RANK_TOL = 1e-10  # relative singular value below which a parameter is undetermined
_NORMAL_STEP = 1e-7  # rad: finite step for the locus normals at a point


# ---------------------------------------------------------------------------
# the loading of line offsets on residuals
# ---------------------------------------------------------------------------

def crossing_loading(normal_a, normal_b, line_a, line_b, n_lines=None):
    """How an offset of each line along its normal moves each crossing.

    Parameters
    ----------
    normal_a, normal_b : ndarray, shape (p, 2)
        Unit normals of the two loci at each crossing, in the coordinates of
        the crossing positions (any sign: the sign of an offset is a
        convention of the line, and the covariance does not depend on it).
    line_a, line_b : ndarray of int, shape (p,)
        Index of the two lines of each crossing.
    n_lines : int, optional
        Number of lines (columns); by default one more than the largest index.

    Returns
    -------
    loading : ndarray, shape (2 p, n_lines)
        Rows ordered x0, y0, x1, y1, ... as the crossings flattened.  The
        columns of line a and line b of crossing k hold the displacement d
        solving ``n_a . d = 1, n_b . d = 0`` and ``n_a . d = 0, n_b . d = 1``.

    Raises
    ------
    InputError
        For parallel lines: their crossing is not located at all.
    """
    na = np.asarray(normal_a, dtype=float).reshape(-1, 2)
    nb = np.asarray(normal_b, dtype=float).reshape(-1, 2)
    la = np.asarray(line_a, dtype=int).ravel()
    lb = np.asarray(line_b, dtype=int).ravel()
    p = len(na)
    if not (len(nb) == len(la) == len(lb) == p):
        raise InputError("normal_a, normal_b, line_a and line_b must have one row per crossing")
    if np.any(la == lb):
        raise InputError("line_a and line_b name the same line for some crossing")
    n_lines = _line_count(n_lines, la, lb)
    det = na[:, 0] * nb[:, 1] - na[:, 1] * nb[:, 0]
    if np.any(np.abs(det) < 1e-12):
        raise InputError("normal_a and normal_b are parallel for some crossing: "
                         "parallel lines do not locate a point")
    # inverse of the 2x2 matrix with rows n_a, n_b: its columns are the
    # displacements for a unit offset of line a and of line b
    col_a = np.stack([nb[:, 1], -nb[:, 0]], axis=1) / det[:, None]
    col_b = np.stack([-na[:, 1], na[:, 0]], axis=1) / det[:, None]
    loading = np.zeros((p, 2, n_lines))
    rows = np.arange(p)
    loading[rows, :, la] = col_a
    loading[rows, :, lb] = col_b
    return loading.reshape(2 * p, n_lines)


def locus_normals(basis, zone, x_axis, wave_number, hkl, t_mrad):
    """Unit normals (disk frame) of the exact loci of ``hkl`` at the points ``t_mrad``.

    The gradient of the forward model's signed distance from each locus
    (:func:`laueline.lines.locus_distances`), by finite differences: the
    geometry stays in :mod:`laueline.lines`.

    Parameters
    ----------
    basis : ndarray (3, 3)
    zone, x_axis : sequence of 3 int
    wave_number : float
    hkl : ndarray (p, 3)
        One reflection per point.
    t_mrad : ndarray (p, 2)

    Returns
    -------
    ndarray (p, 2)
        Pointing to the side where the Bragg-condition residual is positive.
    """
    from .lines import LineParameters, line_parameters_batch, locus_distances

    hkl = np.asarray(hkl).reshape(-1, 3)
    unique, index = np.unique(hkl, axis=0, return_inverse=True)
    index = index.ravel()
    params = line_parameters_batch(basis, zone, x_axis, wave_number, unique)
    sub = LineParameters(params.g_perp[index], params.g_perp_norm[index], params.gz[index],
                         params.c[index])
    steps = np.array([[0.0, 0.0], [_NORMAL_STEP, 0.0], [0.0, _NORMAL_STEP]])
    points = np.asarray(t_mrad, dtype=float).reshape(-1, 1, 2) * 1e-3 + steps
    d = locus_distances(points, sub)
    n = (d[:, 1:] - d[:, :1]) / _NORMAL_STEP
    return n / np.linalg.norm(n, axis=1, keepdims=True)


def crossing_loading_of_lines(basis, zone, x_axis, wave_number, hkl_a, hkl_b, t_mrad):
    """The loading of :func:`crossing_loading` for crossings named by their reflections.

    Lines are numbered by their distinct (h k l); the normals are those of
    the exact loci at the crossing points (:func:`locus_normals`), in the
    disk frame.  A fit working in detector pixels applies the detector's
    rotation and mirror to the two rows of each crossing (a line offset and
    the displacement it causes both scale by the camera scale, which
    cancels); with an affine distortion it passes normals mapped into
    pixels to :func:`crossing_loading` instead.

    Parameters
    ----------
    basis : ndarray (3, 3)
    zone, x_axis : sequence of 3 int
    wave_number : float
    hkl_a, hkl_b : ndarray (p, 3)
    t_mrad : ndarray (p, 2)
        The crossing points.

    Returns
    -------
    loading : ndarray (2 p, m)
    lines : ndarray (m, 3) of int
        The reflection of each column.
    """
    hkl_a = np.asarray(hkl_a).reshape(-1, 3)
    hkl_b = np.asarray(hkl_b).reshape(-1, 3)
    lines, index = np.unique(np.concatenate([hkl_a, hkl_b]), axis=0, return_inverse=True)
    index = index.ravel()
    normals = locus_normals(basis, zone, x_axis, wave_number,
                            np.concatenate([hkl_a, hkl_b]), np.concatenate([t_mrad, t_mrad]))
    p = len(hkl_a)
    loading = crossing_loading(normals[:p], normals[p:], index[:p], index[p:], len(lines))
    return loading, lines


def line_point_loading(line_index, n_lines=None):
    """Loading of line offsets on points measured along lines.

    Each point's residual is its signed distance across its line, so an
    offset of the line moves it by the offset itself.

    Parameters
    ----------
    line_index : ndarray of int, shape (n,)
    n_lines : int, optional

    Returns
    -------
    loading : ndarray, shape (n, n_lines)
    """
    idx = np.asarray(line_index, dtype=int).ravel()
    n_lines = _line_count(n_lines, idx)
    loading = np.zeros((len(idx), n_lines))
    loading[np.arange(len(idx)), idx] = 1.0
    return loading


def _line_count(n_lines, *indices):
    top = max((int(i.max()) + 1 if len(i) else 0) for i in indices)
    if any(len(i) and i.min() < 0 for i in indices):
        raise InputError("line indices must be non-negative")
    if n_lines is None:
        return top
    if n_lines < top:
        raise InputError(f"n_lines = {n_lines} but a line index reaches {top - 1}")
    return int(n_lines)


# ---------------------------------------------------------------------------
# the structured covariance
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class ResidualCovariance:
    """V = diag(point_variance) + factor @ factor.T, kept in that form.

    Attributes
    ----------
    point_variance : ndarray, shape (n,)
        Variance of the independent part of each residual (all > 0).
    factor : ndarray, shape (n, m)
        Loading times line sigma, ``U = M S^(1/2)``; m is the number of lines.
    """

    point_variance: np.ndarray
    factor: np.ndarray

    @property
    def n(self):
        """Number of residuals."""
        return len(self.point_variance)

    def with_factor(self, extra):
        """V + extra @ extra.T: further correlated terms, still in structured form.

        For example a line detection's own covariance of each line's offset
        and angle: with C_l = L_l L_l^T per line and the loading of those
        two line parameters on the residuals, ``extra`` holds the loading
        times L_l, two columns per line.
        """
        extra = np.asarray(extra, dtype=float)
        if extra.ndim != 2 or extra.shape[0] != self.n:
            raise InputError(f"extra must have {self.n} rows, one per residual")
        return ResidualCovariance(self.point_variance, np.concatenate([self.factor, extra], 1))

    def dense(self):
        """The full n x n matrix (for small problems, tests and reports)."""
        return np.diag(self.point_variance) + self.factor @ self.factor.T

    @cached_property
    def _capacitance(self):
        u = self.factor / self.point_variance[:, None]          # D^-1 U
        cap = np.eye(self.factor.shape[1]) + self.factor.T @ u  # I + U^T D^-1 U
        return u, np.linalg.cholesky(cap)

    def solve(self, b):
        """V^-1 b by the Woodbury identity; b of shape (n,) or (n, k)."""
        b = np.asarray(b, dtype=float)
        d_inv_b = b / (self.point_variance if b.ndim == 1 else self.point_variance[:, None])
        if self.factor.shape[1] == 0:
            return d_inv_b
        u, chol = self._capacitance
        inner = _cho_solve(chol, self.factor.T @ d_inv_b)
        return d_inv_b - u @ inner

    def logdet(self):
        """log det V (matrix determinant lemma)."""
        value = float(np.sum(np.log(self.point_variance)))
        if self.factor.shape[1]:
            _, chol = self._capacitance
            value += 2.0 * float(np.sum(np.log(np.diag(chol))))
        return value


def _cho_solve(chol, b):
    from scipy.linalg import cho_solve

    return cho_solve((chol, True), b)


def residual_covariance(loading, point_sigma, line_sigma):
    """Covariance of the residuals under the per-line error model.

    Parameters
    ----------
    loading : ndarray, shape (n, m)
        From :func:`crossing_loading` or :func:`line_point_loading` (or the
        two stacked for the same lines).
    point_sigma : float or ndarray, shape (n,)
        Standard deviation of the independent part of each residual; must
        be positive.
    line_sigma : float or ndarray, shape (m,)
        Standard deviation of each line's offset; zero turns the term off.

    Returns
    -------
    ResidualCovariance
    """
    loading = np.asarray(loading, dtype=float)
    if loading.ndim != 2:
        raise InputError("loading must be a 2-D array (residuals x lines)")
    n, m = loading.shape
    point_sigma = np.broadcast_to(np.asarray(point_sigma, dtype=float), (n,))
    line_sigma = np.broadcast_to(np.asarray(line_sigma, dtype=float), (m,))
    if not np.all(np.isfinite(point_sigma)) or np.any(point_sigma <= 0):
        raise InputError("point_sigma must be positive and finite")
    if not np.all(np.isfinite(line_sigma)) or np.any(line_sigma < 0):
        raise InputError("line_sigma must be non-negative and finite")
    return ResidualCovariance(point_sigma ** 2, loading * line_sigma[None, :])


def combine(*covariances):
    """Join residual sets that share the same lines (same columns) into one.

    Crossings and points along the same lines are correlated through the
    common line offsets; stacking their diagonals and factors keeps that.
    """
    if not covariances:
        raise InputError("combine needs at least one covariance")
    m = {c.factor.shape[1] for c in covariances}
    if len(m) != 1:
        raise InputError("covariances to combine must have the same number of lines")
    return ResidualCovariance(np.concatenate([c.point_variance for c in covariances]),
                              np.concatenate([c.factor for c in covariances], axis=0))


# ---------------------------------------------------------------------------
# generalised least squares
# ---------------------------------------------------------------------------

def _solve_v(covariance, b):
    if isinstance(covariance, ResidualCovariance):
        return covariance.solve(b)
    v = np.asarray(covariance, dtype=float)
    if v.ndim == 1:  # variances of independent residuals
        return b / (v if b.ndim == 1 else v[:, None])
    from scipy.linalg import cho_factor, cho_solve

    return cho_solve(cho_factor(v), b)


def _information(jacobian, covariance):
    jac = np.asarray(jacobian, dtype=float)
    if jac.ndim != 2:
        raise InputError("jacobian must be a 2-D array (residuals x parameters)")
    n = covariance.n if isinstance(covariance, ResidualCovariance) else len(covariance)
    if jac.shape[0] != n:
        raise InputError(f"jacobian has {jac.shape[0]} rows but the covariance "
                         f"describes {n} residuals")
    if not np.all(np.isfinite(jac)):
        raise InputError("jacobian has non-finite entries")
    v_inv_j = _solve_v(covariance, jac)
    info = jac.T @ v_inv_j
    return 0.5 * (info + info.T), v_inv_j


def _invert_information(info, names=None):
    """(J^T V^-1 J)^-1 with column scaling; InputError when singular."""
    scale = np.sqrt(np.abs(np.diag(info)))
    if np.any(scale == 0):
        bad = np.flatnonzero(scale == 0)
        raise InputError("the data do not depend on parameter(s) "
                         f"{_names(bad, names)}: they are not determined")
    w, v = np.linalg.eigh(info / np.outer(scale, scale))
    if w[0] <= _RANK_TOL * w[-1]:
        worst = np.argsort(-np.abs(v[:, 0]))[:2]
        raise InputError("the parameters are not all determined by these observations "
                         f"(the combination of {_names(worst, names)} is free)")
    return (v / w) @ v.T / np.outer(scale, scale)


def _names(index, names):
    if names is None:
        return ", ".join(f"#{i}" for i in index)
    return ", ".join(str(names[i]) for i in index)


def gls_covariance(jacobian, covariance, names=None):
    """Parameter covariance (J^T V^-1 J)^-1 of the generalised least-squares fit.

    Parameters
    ----------
    jacobian : ndarray, shape (n, p)
        Derivatives of the residuals (or model values) with respect to the
        parameters, at the solution.
    covariance : ResidualCovariance, or ndarray (n, n), or ndarray (n,)
        Residual covariance V (structured, dense, or independent variances).
    names : sequence of str, optional
        Parameter names used in error messages.

    Returns
    -------
    ndarray, shape (p, p)

    Raises
    ------
    InputError
        When the observations do not determine every parameter.
    """
    info, _ = _information(jacobian, covariance)
    return _invert_information(info, names)


def gls_solve(jacobian, residuals, covariance, names=None):
    """One generalised Gauss-Newton step and the covariance at that point.

    Minimises (r - J x)^T V^-1 (r - J x): x = (J^T V^-1 J)^-1 J^T V^-1 r.

    Parameters
    ----------
    jacobian : ndarray, shape (n, p)
    residuals : ndarray, shape (n,)
        Observed minus model.
    covariance : ResidualCovariance, ndarray (n, n) or ndarray (n,)

    Returns
    -------
    step : ndarray, shape (p,)
    cov : ndarray, shape (p, p)
    """
    info, v_inv_j = _information(jacobian, covariance)
    cov = _invert_information(info, names)
    return cov @ (v_inv_j.T @ np.asarray(residuals, dtype=float)), cov


def predicted_covariance(jacobian, loading, point_sigma, line_sigma, names=None):
    """Cramer-Rao bound of a planned measurement under the per-line model.

    The covariance the GLS fit of these observations reaches for Gaussian
    point noise and line offsets (Kay 1993, linear Gaussian model): the
    same :func:`residual_covariance` and :func:`gls_covariance` a fit uses.

    Parameters
    ----------
    jacobian : ndarray, shape (n, p)
    loading : ndarray, shape (n, m)
    point_sigma, line_sigma : float or ndarray
        As for :func:`residual_covariance`.

    Returns
    -------
    ndarray, shape (p, p)
    """
    return gls_covariance(jacobian, residual_covariance(loading, point_sigma, line_sigma),
                          names)


# ---------------------------------------------------------------------------
# estimating the line sigma
# ---------------------------------------------------------------------------

@dataclass
class LineSigmaEstimate:
    """Line sigma estimated from residuals.

    Attributes
    ----------
    line_sigma : float
        The estimate, in the unit of the residuals (0 when the residuals
        show no per-line excess over the point noise).
    method : str
        "reml" or "moments".
    chi_square : float
        GLS chi-square of the residuals at the estimate.
    dof : int
        Degrees of freedom, residuals minus parameters.
    chi_square_points_only : float
        Chi-square with the line term off: the excess over ``dof`` is what
        the line term explains.
    determined : bool
        Whether the data can separate a line offset from point noise: at
        least two lines, each loading at least two residuals, and more
        degrees of freedom than lines.  When false the estimate is returned but should
        be replaced by a value the user gives.
    """

    line_sigma: float
    method: str
    chi_square: float
    dof: int
    chi_square_points_only: float
    determined: bool


def _gls_chi_square(jacobian, residuals, cov):
    if jacobian is None or jacobian.shape[1] == 0:
        return float(residuals @ cov.solve(residuals))
    info, v_inv_j = _information(jacobian, cov)
    step = np.linalg.lstsq(info, v_inv_j.T @ residuals, rcond=None)[0]
    r = residuals - jacobian @ step
    return float(r @ cov.solve(r))


def _within_line_chi_square(jacobian, residuals, loading, point_sigma):
    """Chi-square with every line offset free, and the rank the offsets add.

    The "within lines" sum of squares of the one-way classification
    (Searle et al. 1992, ch. 3): it does not depend on the line sigma.
    """
    w = 1.0 / point_sigma
    design = loading if jacobian is None else np.concatenate([jacobian, loading], axis=1)
    coef, _, rank_full, _ = np.linalg.lstsq(design * w[:, None], residuals * w, rcond=None)
    r = (residuals - design @ coef) * w
    rank_params = 0 if jacobian is None else np.linalg.matrix_rank(jacobian * w[:, None])
    return float(r @ r), int(rank_full - rank_params)


def _reml_objective(jacobian, residuals, cov):
    """-2 log restricted likelihood up to a constant (Patterson and Thompson 1971)."""
    value = cov.logdet()
    r = residuals
    if jacobian is not None and jacobian.shape[1]:
        info, v_inv_j = _information(jacobian, cov)
        _, logdet_info = np.linalg.slogdet(info)
        value += logdet_info
        step = np.linalg.lstsq(info, v_inv_j.T @ residuals, rcond=None)[0]
        r = residuals - jacobian @ step
    return value + float(r @ cov.solve(r))


def estimate_line_sigma(residuals, loading, point_sigma, jacobian=None, *, method="reml"):
    """Estimate the per-line offset sigma from residuals grouped by line.

    Parameters
    ----------
    residuals : ndarray, shape (n,)
        Observed minus model at (or near) the fitted solution, flattened in
        the order of the loading's rows.
    loading : ndarray, shape (n, m)
        From :func:`crossing_loading` / :func:`line_point_loading`.
    point_sigma : float or ndarray, shape (n,)
        The independent noise, known (from the detection, or given).
    jacobian : ndarray, shape (n, p), optional
        Jacobian of the fit: the residuals are re-fitted by GLS for every
        trial sigma so that the parameters' share of the residual scatter is
        removed (p degrees of freedom).  Without it the residuals are taken
        as they are (p = 0).
    method : {"reml", "moments"}
        "reml": the maximum of the restricted likelihood (Patterson and
        Thompson 1971); "moments": the sigma at which the GLS chi-square
        exceeds the within-line chi-square by the degrees of freedom the
        line offsets add (one-way analysis of variance generalised).

    Returns
    -------
    LineSigmaEstimate
    """
    from scipy.optimize import brentq, minimize_scalar

    r = np.asarray(residuals, dtype=float).ravel()
    loading = np.asarray(loading, dtype=float)
    if loading.ndim != 2 or loading.shape[0] != len(r):
        raise InputError("loading must have one row per residual")
    jac = None if jacobian is None else np.asarray(jacobian, dtype=float)
    if jac is not None and jac.shape[0] != len(r):
        raise InputError("jacobian must have one row per residual")
    if method not in ("moments", "reml"):
        raise InputError(f"method must be 'moments' or 'reml', got {method!r}")
    p = 0 if jac is None else jac.shape[1]
    dof = len(r) - p
    if dof <= 0:
        raise InputError("estimate_line_sigma needs more residuals than parameters")
    used = np.any(loading != 0, axis=0)
    per_line = np.sum(loading != 0, axis=0)
    determined = bool(np.sum(used) >= 2 and np.all(per_line[used] >= 2) and dof > np.sum(used))
    loading = loading[:, used]
    point_sigma = np.broadcast_to(np.asarray(point_sigma, dtype=float), r.shape)

    def cov(s):
        return residual_covariance(loading, point_sigma, s)

    chi0 = _gls_chi_square(jac, r, cov(0.0))
    # the line term only ever lowers the chi-square; an upper bracket where it
    # falls below its target is a line sigma of the size of the raw residuals
    top = max(10.0 * float(np.sqrt(np.mean(r * r))), 10.0 * float(np.max(point_sigma)))
    if method == "moments":
        within, between_dof = _within_line_chi_square(jac, r, loading, point_sigma)
        excess = lambda s: _gls_chi_square(jac, r, cov(s)) - within - between_dof  # noqa: E731
        if between_dof == 0 or excess(0.0) <= 0:
            sigma = 0.0
        elif excess(top) > 0:
            sigma = top
        else:
            sigma = brentq(excess, 0.0, top, xtol=1e-9 * top)
    else:
        # over log(sigma): the likelihood is smooth in it across decades
        floor = 1e-4 * float(np.min(point_sigma))
        res = minimize_scalar(lambda x: _reml_objective(jac, r, cov(math.exp(x))),
                              bounds=(math.log(floor), math.log(top)), method="bounded",
                              options={"xatol": 1e-4})
        sigma = math.exp(float(res.x))
        if _reml_objective(jac, r, cov(0.0)) <= res.fun:
            sigma = 0.0
    return LineSigmaEstimate(line_sigma=float(sigma), method=method,
                             chi_square=_gls_chi_square(jac, r, cov(sigma)), dof=int(dof),
                             chi_square_points_only=chi0, determined=determined)


# ---------------------------------------------------------------------------
# statistical and systematic parts
# ---------------------------------------------------------------------------

@dataclass
class CovarianceParts:
    """A covariance split into its statistical and systematic parts.

    The parts are independent, so they add: ``total = statistical +
    systematic``.  The ``sigma_*`` properties are the square roots of the
    diagonals.
    """

    statistical: np.ndarray
    systematic: np.ndarray
    total: np.ndarray

    @property
    def sigma_statistical(self):
        return np.sqrt(np.maximum(np.diag(self.statistical), 0.0))

    @property
    def sigma_systematic(self):
        return np.sqrt(np.maximum(np.diag(self.systematic), 0.0))

    @property
    def sigma_total(self):
        return np.sqrt(np.maximum(np.diag(self.total), 0.0))

    def transformed(self, matrix):
        """The three parts of ``matrix @ x`` (for example a change of frame)."""
        t = np.asarray(matrix, dtype=float)
        return CovarianceParts(t @ self.statistical @ t.T, t @ self.systematic @ t.T,
                               t @ self.total @ t.T)


def add_systematic(statistical, systematic=None):
    """Statistical, systematic and total covariance of the same quantities.

    Parameters
    ----------
    statistical : ndarray, shape (p, p)
    systematic : ndarray, shape (p, p) or (p,), optional
        A covariance, or 1-sigma values of independent systematic errors
        (for example a kinematic-bias estimate per component); None or zeros
        when no systematic part is known.

    Returns
    -------
    CovarianceParts
    """
    stat = np.asarray(statistical, dtype=float)
    if stat.ndim != 2 or stat.shape[0] != stat.shape[1]:
        raise InputError("statistical must be a square covariance matrix")
    if systematic is None:
        sys_cov = np.zeros_like(stat)
    else:
        sys_cov = np.asarray(systematic, dtype=float)
        if sys_cov.ndim == 1:
            if np.any(sys_cov < 0):
                raise InputError("systematic sigmas must be non-negative")
            sys_cov = np.diag(sys_cov ** 2)
        if sys_cov.shape != stat.shape:
            raise InputError(f"systematic has shape {sys_cov.shape}, statistical {stat.shape}")
        if not np.allclose(sys_cov, sys_cov.T, rtol=1e-9, atol=0):
            raise InputError("systematic must be a symmetric covariance")
    return CovarianceParts(stat, sys_cov, stat + sys_cov)
