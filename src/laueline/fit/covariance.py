"""The one covariance step of every fit, and the whitening it rests on.

Each observation type supplies the covariance of its measured values
(``residual_covariance``); :func:`parameter_covariance` turns a Jacobian and
that covariance into the covariance of the parameters.  The fit engine uses
the same decomposition for its condition number and degeneracy test.

References
----------
Aitken, A. C. (1935). On least squares and linear combination of
observations. Proc. R. Soc. Edinb. 55, 42-48.
"""

from __future__ import annotations

import numpy as np

__all__ = ["parameter_covariance", "whitener", "apply_whitener", "scaled_svd",
           "covariance_from_svd"]


def parameter_covariance(jacobian, residual_covariance):
    """Covariance of least-squares parameters, (J^T S^-1 J)^-1.

    Parameters
    ----------
    jacobian : ndarray (n, p)
        Derivatives of the residuals (not whitened) with respect to the
        parameters.
    residual_covariance : ndarray (n,) or (n, n)
        Covariance S of the measured values: variances of independent values,
        or any symmetric positive-definite matrix -- correlated errors (such
        as one random offset per line that moves all of its crossings
        together) enter here.

    Returns
    -------
    ndarray (p, p)
        In the units of the Jacobian's columns; columns are scaled to unit
        length before the pseudo-inverse so that the result does not depend
        on the parameters' units.
    """
    J = np.asarray(jacobian, float)
    Jw = apply_whitener(whitener(np.asarray(residual_covariance, float)), J)
    return covariance_from_svd(*scaled_svd(Jw))


def covariance_from_svd(scale, sv, vt):
    """(J^T J)^-1 from the decomposition of :func:`scaled_svd`, null directions dropped."""
    inv = np.where(sv > sv[0] * 1e-14, 1.0 / sv ** 2, 0.0) if sv.size else sv
    return (vt.T * inv) @ vt / np.outer(scale, scale)


def scaled_svd(jacobian):
    """Column norms and the singular values and vectors of the column-scaled matrix.

    Via the triangular factor of a QR decomposition: the same singular
    values as the tall matrix, at the cost of a p x p decomposition.
    """
    scale = np.linalg.norm(jacobian, axis=0)
    scale = np.where(scale == 0, 1.0, scale)
    r = np.linalg.qr(jacobian / scale, mode="r")
    _, sv, vt = np.linalg.svd(r)
    return scale, sv, vt


def whitener(cov):
    """W with W S W^T = I: a vector of 1/sigma for variances S (n,), else inverse Cholesky."""
    if cov.ndim == 1:
        return 1.0 / np.sqrt(cov)
    from scipy.linalg import cholesky
    from scipy.linalg.lapack import dtrtri

    lower = cholesky(cov, lower=True)
    inverse, info = dtrtri(lower, lower=1)   # LAPACK's triangular inverse, L^-1
    if info != 0:
        raise np.linalg.LinAlgError("singular residual covariance")
    return inverse


def apply_whitener(white, v):
    """W v for a whitener of :func:`whitener` (v of shape (n,) or (n, p))."""
    if white.ndim == 1:
        return white.reshape((-1,) + (1,) * (v.ndim - 1)) * v
    return white @ v
