"""The kinematic line-profile integral and the excitation error of disk points.

See :mod:`laueline.relaxation` for the model and its sources.
"""

from __future__ import annotations

import numpy as np

__all__ = ["kinematic_profile", "excitation_errors", "strain_shifts"]

_VOIGT = ((0, 0), (1, 1), (2, 2), (1, 2), (0, 2), (0, 1))
_N_SLABS = 256           # depth slabs of the profile integral
_SINC2_FWHM = 0.8859     # FWHM of sinc^2(s t) in units of 1/t (Hirsch et al. 1977)


def _slab_weights(g_dot_u):
    """Phase factors of the depth slabs: exp(2 pi i g.u at the slab centre) sinc(change of g.u)."""
    gu = np.asarray(g_dot_u, dtype=float)
    return np.exp(1j * np.pi * (gu[..., 1:] + gu[..., :-1])) * np.sinc(gu[..., 1:] - gu[..., :-1])


def kinematic_profile(s_inv_A, g_dot_u, thickness_nm):
    """Kinematic line profile |integral_0^t exp(2 pi i (s z + g.u(z))) dz|^2 / t^2.

    The foil is cut into N equal slabs.  In each, g.u is taken as linear
    between its values at the slab edges and s z is integrated exactly; the
    slab integral exp(2 pi i (s z_j + gu_j)) dz sinc((s + gamma_j) dz) is
    then written as dz exp(...) sinc(s dz) sinc(gamma_j dz), exact when g.u
    is linear (uniform strain) and otherwise in error by about
    pi^2 (s dz)(gamma_j dz) / 3, below 1e-3 for the default N = 256 over a
    profile a few line widths wide.

    Parameters
    ----------
    s_inv_A : ndarray, shape (n, k)
        Excitation errors, 1/angstrom, for n lines.
    g_dot_u : ndarray, shape (n, N + 1)
        g . u (dimensionless, cycles) at depths linspace(0, t, N + 1).
    thickness_nm : float

    Returns
    -------
    ndarray (n, k)
        Intensity relative to the Bragg condition of a perfect foil.
    """
    s = np.asarray(s_inv_A, dtype=float)
    weights = _slab_weights(g_dot_u)                     # (n, N)
    n_slabs = weights.shape[-1]
    dz = 10.0 * thickness_nm / n_slabs
    z_mid = (np.arange(n_slabs) + 0.5) * dz
    phase = np.exp(2j * np.pi * s[..., None] * z_mid)    # (n, k, N)
    amp = np.sinc(s * dz) * np.einsum("...kn,...n->...k", phase, weights) / n_slabs
    return amp.real ** 2 + amp.imag ** 2


class _ProfileEngine:
    """:func:`kinematic_profile` for profiles on fixed grids s = s0_p + slope_p d_k.

    exp(2 pi i slope_p d_k z_j) is computed once; each evaluation needs only
    the slab weights and one batched complex matrix product.
    """

    def __init__(self, slope, d, thickness_nm, n_slabs):
        self.dz = 10.0 * thickness_nm / n_slabs
        self.z_mid = (np.arange(n_slabs) + 0.5) * self.dz
        self.sd = np.asarray(slope, dtype=float)[:, None] * np.asarray(d, dtype=float)[None, :]
        self.phase = np.exp(2j * np.pi * self.sd[..., None] * self.z_mid)   # (p, k, N)

    def __call__(self, s0, g_dot_u):
        weights = _slab_weights(g_dot_u) * np.exp(2j * np.pi * np.asarray(s0)[:, None]
                                                  * self.z_mid)
        s = np.asarray(s0)[:, None] + self.sd
        amp = np.sinc(s * self.dz) * np.einsum("pkn,pn->pk", self.phase, weights) / len(
            self.z_mid)
        return amp.real ** 2 + amp.imag ** 2


def excitation_errors(t_mrad, params):
    """Excitation errors s = -(2 K_in.g + |g|^2) / (2K), 1/angstrom.

    Parameters
    ----------
    t_mrad : ndarray (n, ..., 2)
        Disk points for each of n lines.
    params : laueline.lines.LineParameters
    """
    from ..lines import locus_residual

    t = np.asarray(t_mrad, dtype=float) * 1e-3
    extra = (slice(None),) + (None,) * (t.ndim - 2)
    return -params.g_perp_norm[extra] * locus_residual(t, params)


def strain_shifts(basis, zone, x_axis, wave_number, hkl, t_mrad, step=1e-5):
    """Change of each line's excitation error per unit strain component, (n, 6).

    Central differences of :func:`excitation_errors` for bases (I + e) A,
    e one of the six components (exx eyy ezz eyz exz exy; tensor shears),
    at the disk points ``t_mrad`` (n, 2) of the n reflections ``hkl``.
    """
    from ..lines import LineParameters, line_parameters_batch

    eye = np.zeros((12, 3, 3))
    for c, (i, j) in enumerate(_VOIGT):
        for k, sign in enumerate((1.0, -1.0)):
            eye[2 * c + k, i, j] += sign * step
            if i != j:
                eye[2 * c + k, j, i] += sign * step
    bases = (np.eye(3) + eye) @ np.asarray(basis, dtype=float)
    lp = line_parameters_batch(bases, zone, x_axis, wave_number, np.asarray(hkl))  # (12, n)
    n = len(hkl)
    flat = LineParameters(lp.g_perp.reshape(-1, 2), lp.g_perp_norm.ravel(), lp.gz.ravel(),
                          lp.c.ravel())
    t = np.broadcast_to(np.asarray(t_mrad, dtype=float), (12, n, 2)).reshape(-1, 2)
    s = excitation_errors(t, flat).reshape(12, n)
    return ((s[0::2] - s[1::2]) / (2 * step)).T
