"""Cholesky factor and triangular solves of one small matrix, in plain jnp (no LAPACK call), for use under vmap.

Why not jnp.linalg / jax.scipy.linalg here: under ``vmap`` those lower to one *batched* LAPACK custom call, and
jaxlib 0.10.2's CPU kernels split a large batch into tasks on XLA's intra-op thread pool and block the calling
pool thread until they finish.  When as many independent batched calls run at once as the pool has threads
(2 on a 2-core machine), every pool thread waits for tasks that no thread is left to run: the process hangs at
0 % CPU (seen in the time-varying table build: 20 independent batched solves of 10 × 10 in one program).
Unbatched calls (one matrix, e.g. the inducing-point Gram matrix) run inline and stay on LAPACK.

The algorithms are the textbook ones (Golub & Van Loan 2013, Matrix Computations, 4th ed., Alg. 4.2.1
column Cholesky and §3.1 forward/back substitution): unrolled for n ≤ UNROLL_MAX, a ``lax.fori_loop``
over columns above that, so compile time stays flat.  Matrices are assumed symmetric positive definite
(use ``moments.psd_cholesky`` for semi-definite covariances); all are differentiable by jax.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp

__all__ = ["UNROLL_MAX", "cholesky", "solve_lower", "solve_upper", "cho_solve", "log_det_from_cholesky"]

UNROLL_MAX = 6   # sizes up to this are unrolled (positions and velocities in 2-D and 3-D)


def cholesky(a: jax.Array) -> jax.Array:
    """Lower-triangular L with L Lᵀ = a for one symmetric positive definite a (n, n); only the lower triangle
    of ``a`` is read.  L_jj = √(a_jj − Σ_{k<j} L_jk²), L_ij = (a_ij − Σ_{k<j} L_ik L_jk) / L_jj (i > j)."""
    n = a.shape[-1]
    if n <= UNROLL_MAX:
        chol = jnp.zeros_like(a)
        for j in range(n):
            pivot = jnp.sqrt(a[j, j] - jnp.sum(chol[j, :j] ** 2))
            chol = chol.at[j, j].set(pivot)
            chol = chol.at[j + 1:, j].set((a[j + 1:, j] - chol[j + 1:, :j] @ chol[j, :j]) / pivot)
        return chol
    rows = jnp.arange(n)

    def column(j, chol):
        done = jnp.where(rows < j, chol[j], 0.0)                    # L_jk for k < j
        pivot = jnp.sqrt(a[j, j] - done @ done)
        below = (a[:, j] - chol @ done) / pivot
        return chol.at[:, j].set(jnp.where(rows > j, below, jnp.where(rows == j, pivot, 0.0)))

    return jax.lax.fori_loop(0, n, column, jnp.zeros_like(a))


def solve_lower(chol: jax.Array, b: jax.Array) -> jax.Array:
    """x with L x = b by forward substitution; L (n, n) lower triangular, b (n,) or (n, k)."""
    return _substitute(chol, b, reverse=False)


def solve_upper(upper: jax.Array, b: jax.Array) -> jax.Array:
    """x with U x = b by back substitution; U (n, n) upper triangular, b (n,) or (n, k)."""
    return _substitute(upper, b, reverse=True)


def cho_solve(chol: jax.Array, b: jax.Array) -> jax.Array:
    """a⁻¹ b from a's Cholesky factor L (a = L Lᵀ): Lᵀ x = L⁻¹ b."""
    return solve_upper(chol.T, solve_lower(chol, b))


def log_det_from_cholesky(chol: jax.Array) -> jax.Array:
    """log det a = 2 Σ_j log L_jj."""
    return 2.0 * jnp.sum(jnp.log(jnp.diagonal(chol)))


def _substitute(tri: jax.Array, b: jax.Array, *, reverse: bool) -> jax.Array:
    n = tri.shape[-1]
    order = range(n - 1, -1, -1) if reverse else range(n)
    if n <= UNROLL_MAX:
        x = jnp.zeros_like(b)
        for i in order:
            x = x.at[i].set((b[i] - tri[i] @ x) / tri[i, i])    # x is still 0 where not yet solved
        return x

    def row(step, x):
        i = n - 1 - step if reverse else step
        return x.at[i].set((b[i] - tri[i] @ x) / tri[i, i])

    return jax.lax.fori_loop(0, n, row, jnp.zeros_like(b))
