"""smallmatrix (Cholesky and triangular solves in plain jnp) against numpy/scipy LAPACK.

Outside references: numpy.linalg.cholesky and scipy.linalg.solve_triangular / cho_solve (LAPACK potrf/trtrs);
the algorithms are Golub & Van Loan 2013, Matrix Computations, Alg. 4.2.1 and §3.1.  The compiled program under
vmap must hold no LAPACK custom call (the reason the module exists: jaxlib 0.10.2's batched CPU kernels can
block every thread of XLA's intra-op pool).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.linalg

from driftwise import smallmatrix

SIZES = [1, 2, 3, 6, 7, 10, 18]      # unrolled (≤ UNROLL_MAX = 6) and looped


def spd(n: int, seed: int) -> np.ndarray:
    a = np.random.default_rng(seed).normal(size=(n, n))
    return a @ a.T + n * np.eye(n)


@pytest.mark.parametrize("n", SIZES)
def test_cholesky_and_solves_match_lapack(n):
    a = spd(n, n)
    b = np.random.default_rng(100 + n).normal(size=(n, 3))
    chol = np.asarray(jax.jit(smallmatrix.cholesky)(jnp.asarray(a)))
    np.testing.assert_allclose(chol, np.linalg.cholesky(a), rtol=1e-12, atol=1e-12 * np.sqrt(a.max()))
    np.testing.assert_allclose(np.asarray(smallmatrix.solve_lower(jnp.asarray(chol), jnp.asarray(b))),
                               scipy.linalg.solve_triangular(chol, b, lower=True), rtol=1e-11, atol=1e-13)
    np.testing.assert_allclose(np.asarray(smallmatrix.solve_upper(jnp.asarray(chol.T), jnp.asarray(b[:, 0]))),
                               scipy.linalg.solve_triangular(chol.T, b[:, 0], lower=False), rtol=1e-11, atol=1e-13)
    np.testing.assert_allclose(np.asarray(smallmatrix.cho_solve(jnp.asarray(chol), jnp.asarray(b))),
                               scipy.linalg.cho_solve((chol, True), b), rtol=1e-10, atol=1e-13)
    assert float(smallmatrix.log_det_from_cholesky(jnp.asarray(chol))) == pytest.approx(
        np.linalg.slogdet(a)[1], rel=1e-12)


@pytest.mark.parametrize("n", [3, 10])
def test_gradients_match_the_lapack_path(n):
    """d/da of log N(x | 0, a) through smallmatrix equals jax's own (LAPACK) path to 1e-9 relative."""
    a, x = jnp.asarray(spd(n, 7)), jnp.asarray(np.linspace(-1.0, 1.0, n))

    def ours(m):
        chol = smallmatrix.cholesky(m)
        z = smallmatrix.solve_lower(chol, x)
        return -0.5 * (z @ z) - 0.5 * smallmatrix.log_det_from_cholesky(chol)

    def reference(m):
        return jax.scipy.stats.multivariate_normal.logpdf(x, jnp.zeros(n), m) + 0.5 * n * jnp.log(2 * jnp.pi)

    sym = lambda g: 0.5 * (g + g.T)  # noqa: E731  (ours reads the lower triangle only)
    g_ours, g_ref = sym(np.asarray(jax.grad(ours)(a))), np.asarray(jax.grad(reference)(a))
    np.testing.assert_allclose(np.tril(g_ours + g_ours.T - np.diag(np.diag(g_ours))),
                               np.tril(g_ref + g_ref.T - np.diag(np.diag(g_ref))), rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("n", [2, 10])
def test_no_lapack_call_under_vmap(n):
    batch = jnp.asarray(np.stack([spd(n, s) for s in range(512)]))
    program = jax.jit(jax.vmap(lambda m: smallmatrix.cho_solve(smallmatrix.cholesky(m), jnp.ones(n))))
    text = program.lower(batch).compile().as_text()
    assert "custom_call_target=\"lapack" not in text
    expected = np.stack([np.linalg.solve(np.asarray(m), np.ones(n)) for m in batch])
    np.testing.assert_allclose(np.asarray(program(batch)), expected, rtol=1e-10)
