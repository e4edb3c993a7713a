"""Titsias' (2009, "Variational learning of inducing variables in sparse Gaussian processes", eq. 9) collapsed
bound written densely with numpy and scipy — the outside reference the fit's bound is checked against."""

from __future__ import annotations

import numpy as np
import scipy.stats

from driftwise.gp import field as fld


def dense_collapsed_bound(params, batch) -> float:
    """log N(y | 0, Q + R) − ½ Σ_n tr(K_nn − Q_nn)/r_n with Q = K_XZ (K_ZZ + δI)⁻¹ K_ZX (nats), for a steady 2-D
    field's ``params`` on all rows of ``batch``."""
    kern, x, z = params.kernel, batch.position_m, params.inducing_m
    kzz = np.array(kern.gram_matrix(z, z))
    kzz += float(fld.jitter_m2_s2(kern, z[0], fld.JITTER_MULTIPLE)) * np.eye(kzz.shape[0])
    kxz = np.asarray(kern.gram_matrix(x, z))
    q_ff = kxz @ np.linalg.solve(kzz, kxz.T)
    noise = np.repeat(np.asarray(fld.noise_variance_m2_s2(params, batch)), 2)
    k_diag = np.diag(np.asarray(kern.gram_matrix(x, x)))
    y = np.asarray(batch.velocity_m_s).ravel()
    return float(scipy.stats.multivariate_normal(np.zeros(y.size), q_ff + np.diag(noise)).logpdf(y)
                 - 0.5 * np.sum((k_diag - np.diag(q_ff)) / noise))
