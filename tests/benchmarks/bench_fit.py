"""Benchmark of driftwise.fit (run by hand: ``.venv/bin/python tests/benchmarks/bench_fit.py``).

Prints one table, everything measured in this run (medians):

1. the machine's float64 matmul rate (jax, 2048³) — the yardstick;
2. one optimiser step, Helmholtz kernel, 2-D, M = 256, minibatch 1024: seconds and the
   achieved GFLOP/s from an analytic flop count (below), for both q updates, and once with
   OpenBLAS limited to one thread (threadpoolctl) next to XLA's own threads;
3. time to fit 10k, 100k and 1M observations to the plateau and t(10N)/t(N) (≤ 12 wanted);
4. the three q schedules on 5,000 observations (time to the plateau and the final ELBO);
5. 5,000 observations: predictive RMSE against the true field and wall time of the fit,
   next to an exact dense GP with the same kernel whose hyperparameters are learned by
   L-BFGS-B on the exact log marginal likelihood (Rasmussen & Williams 2006, eq. 2.30) —
   RMSE within 5 %, fit at least 10× faster wanted.

``--parts step,scaling,schedules,exact`` picks parts (default all; the whole run takes
about an hour on two cores, the exact GP most of it).

Data: Taylor & Green (1937) cells u = U sin kx cos ky, v = −U cos kx sin ky (U = 0.2 m/s,
L = 1 km) sampled at random midpoints over 4 km × 4 km, Δt ∈ {10, 30, 60} min, with the
velocity noise of driftwise's observation model (K = 1 m²/s, σ_pos = 10 m).

Flop count of one step, n = b·d rows, m = M·d inducing values (multiply + add = 2):
  ELBO forward:   Cholesky of K_ZZ m³/3, Φ = L⁻¹K_Zx m²n, ΦS 2nm²;
  its gradient:   d(ΦS)/dΦ 2nm², trsm backward m²n + 2m²n, Cholesky backward ≈ m³
                  (Adam on q adds dS = Φᵀ d(ΦS): 2nm²);
  natural q step: Φ m²n, ΦᵀΛΦ 2nm², Cholesky, inverse m³/3 + m³/3, two (Λ, η) from (m, S)
                  conversions 2·(m³/3 + 2m³), one back m³/3 + m³/3 (+ one K_ZZ Cholesky m³/3).
Kernel evaluations and O(nm) terms are left out, so the rates are lower bounds.
"""

from __future__ import annotations

import math
import time
from types import SimpleNamespace

import jax
import jax.numpy as jnp
import numpy as np

import driftwise
from driftwise.gp import training as F
from driftwise.gp.schedule import Schedule, TrainConfig

U, CELL, K_TRUE, SIGMA_POS = 0.2, 1000.0, 1.0, 10.0


def truth(xy):
    k = math.pi / CELL
    return np.stack([U * np.sin(k * xy[:, 0]) * np.cos(k * xy[:, 1]),
                     -U * np.cos(k * xy[:, 0]) * np.sin(k * xy[:, 1])], axis=1)


def observations(n, seed):
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, 4000.0, (n, 2))
    dt = rng.choice([600.0, 1800.0, 3600.0], n)
    var = 2.0 * K_TRUE / dt + 2.0 * SIGMA_POS**2 / dt**2
    v = truth(x) + np.sqrt(var)[:, None] * rng.standard_normal((n, 2))
    return SimpleNamespace(position_m=x, velocity_m_s=v, dt_s=dt, time_s=np.zeros(n),
                           track_index=np.arange(n) // 20, position_error_m=SIGMA_POS)


def median_time(fn, repeats):
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        jax.block_until_ready(fn())
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def matmul_gflops():
    n = 2048
    a = jnp.asarray(np.random.default_rng(0).standard_normal((n, n)))
    f = jax.jit(lambda x: x @ x)
    f(a).block_until_ready()
    return 2 * n**3 / median_time(lambda: f(a), 7) / 1e9


def step_flops(b, d, M, q_update):
    n, m = b * d, M * d
    forward = m**3 / 3 + m**2 * n + 2 * n * m**2
    backward = 2 * n * m**2 + 3 * m**2 * n + m**3 + (2 * n * m**2 if q_update == "adam" else 0)
    natural = (m**2 * n + 2 * n * m**2 + 3 * m**3 / 3 + 2 * (m**3 / 3 + 2 * m**3) + 2 * m**3 / 3) \
        if q_update == "natural" else 0
    return forward + backward + natural


def time_step(q_update, M=256, b=1024, n=20000):
    data = F._prepare(observations(n, 1), SIGMA_POS)
    config = F._check_options("helmholtz", "squared-exponential", M, 0, Schedule(steps=100, batch_size=b, learning_rate=0.05, patience=15, q_update=q_update, natural_step=0.5), SIGMA_POS)
    config = F.dataclasses.replace(config, fingerprint=data.fingerprint)
    state, z_scale = F._start(data, config, learning_rate=0.05, checkpoint=None)
    for _ in range(2):  # compile, warm up
        state = F._advance(state, data, config, z_scale)
    times = []
    for _ in range(9):
        t0 = time.perf_counter()
        state = F._advance(state, data, config, z_scale)
        jax.block_until_ready(state.params)
        times.append(time.perf_counter() - t0)
    seconds = float(np.median(times))
    return seconds, step_flops(b, 2, M, q_update) / seconds / 1e9


def time_fit(n, seed=2, **options):
    obs = observations(n, seed)
    t0 = time.perf_counter()
    field = driftwise.fit(obs, "helmholtz", inducing=256, position_error_m=SIGMA_POS, progress=False,
                          schedule=Schedule(**options))
    return time.perf_counter() - t0, field


# ------------------------------------------------------------------- exact dense GP
def exact_log_marginal(trainable, z_dummy, x, y, walk, pos_noise):
    """log N(y | 0, K_XX + R), R = diag(K·2/Δt + 2σ_pos²/Δt² + σ₀²) (Rasmussen & Williams 2006, eq. 2.30)."""
    kernel, log_k, log_floor = trainable
    gram = kernel.gram_matrix(x, x)
    r = jnp.repeat(jnp.exp(log_k) * walk + pos_noise + jnp.exp(2 * log_floor), x.shape[1])
    chol = jnp.linalg.cholesky(gram + jnp.diag(r))
    alpha = jax.scipy.linalg.solve_triangular(chol, y.reshape(-1), lower=True)
    return -0.5 * jnp.sum(alpha**2) - jnp.sum(jnp.log(jnp.diag(chol))) - 0.5 * y.size * math.log(2 * math.pi)


def exact_gp(obs, init_params, test_x, *, max_evaluations=60):
    """Exact GP: hyperparameters by L-BFGS-B (scipy) on the exact log evidence, then the posterior mean.

    A quasi-Newton optimiser needs far fewer evaluations than Adam on this smooth 6-parameter
    objective, so the speed-up quoted against it is conservative; it stops at ``max_evaluations``
    or when an iteration improves the evidence by less than 1e-7 relative (ftol, a few 1e-3 nats
    here), which again favours the exact GP's time.  Each evaluation (a 2N × 2N Cholesky and its
    reverse-mode gradient) is printed as it finishes.  Returns (s, mean, evaluations).
    """
    from jax.flatten_util import ravel_pytree
    from scipy.optimize import minimize

    x, y = jnp.asarray(obs.position_m), jnp.asarray(obs.velocity_m_s)
    walk = jnp.asarray(2.0 / obs.dt_s)
    pos_noise = jnp.asarray(2.0 * obs.position_error_m**2 / obs.dt_s**2)
    trainable = (init_params.kernel, init_params.log_diffusivity_m2_s, init_params.log_noise_floor_m_s)
    flat0, unravel = ravel_pytree(trainable)
    value_and_grad = jax.jit(jax.value_and_grad(lambda v: -exact_log_marginal(unravel(v), None, x, y, walk,
                                                                                pos_noise)))
    evaluations = []

    def fun(v):
        value, grad = value_and_grad(jnp.asarray(v))
        evaluations.append(float(value))
        print(f"  exact GP evaluation {len(evaluations)}: −log evidence {float(value):.3f}, "
              f"{time.perf_counter() - t0:.0f} s so far", flush=True)
        return float(value), np.asarray(grad, dtype=float)

    t0 = time.perf_counter()
    result = minimize(fun, np.asarray(flat0, dtype=float), jac=True, method="L-BFGS-B",
                      options={"maxfun": max_evaluations, "ftol": 1e-7, "gtol": 1e-6})
    kernel, log_k, log_floor = unravel(jnp.asarray(result.x))
    r = jnp.repeat(jnp.exp(log_k) * walk + pos_noise + jnp.exp(2 * log_floor), 2)
    chol = jnp.linalg.cholesky(kernel.gram_matrix(x, x) + jnp.diag(r))
    alpha = jax.scipy.linalg.cho_solve((chol, True), y.reshape(-1))
    mean = (kernel.gram_matrix(jnp.asarray(test_x), x) @ alpha).reshape(-1, 2)
    mean.block_until_ready()
    return time.perf_counter() - t0, np.asarray(mean), len(evaluations)


def rmse(mean, xy):
    return float(np.sqrt(np.mean(np.sum((mean - truth(xy)) ** 2, axis=1))))


def main():
    import argparse
    import os

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--parts", default="step,scaling,schedules,exact",
                        help="comma list of the parts to run (default all): step, scaling, schedules, exact")
    parts = set(parser.parse_args().parts.split(","))
    rows = []
    print(f"driftwise {driftwise.__version__}, jax {jax.__version__}, devices {jax.devices()}, "
          f"load average {os.getloadavg()[0]:.1f}", flush=True)
    peak = matmul_gflops()
    rows.append(("float64 matmul 2048³ (jax)", f"{peak:.1f} GFLOP/s", "yardstick"))
    if "step" in parts:
        rows += part_step(peak)
    if "scaling" in parts:
        rows += part_scaling()
    if "schedules" in parts:
        rows += part_schedules()
    if "exact" in parts:
        rows += part_exact()
    rows.append(("load average at end", f"{os.getloadavg()[0]:.1f}", "other processes share the cores"))

    width = max(len(r[0]) for r in rows)
    print()
    print(f"{'measurement':<{width}}  {'result':<44}  note")
    for name, result, note in rows:
        print(f"{name:<{width}}  {result:<44}  {note}")


def part_step(peak):
    rows = []
    from threadpoolctl import threadpool_limits  # test extra (scikit-learn); only for the BLAS-thread row

    for q_update, blas_threads in (("adam", None), ("natural", None), ("adam", 1)):
        with threadpool_limits(blas_threads, user_api="blas"):
            seconds, rate = time_step(q_update)
        threads = "" if blas_threads is None else f", OpenBLAS threads {blas_threads}"
        rows.append((f"step, Helmholtz 2-D, M=256, b=1024, q_update={q_update}{threads}",
                     f"{seconds * 1e3:.0f} ms, {rate:.1f} GFLOP/s", f"{rate / peak:.0%} of matmul rate"))
        print(rows[-1], flush=True)
    return rows


def part_scaling():
    rows, previous = [], None
    for n in (10_000, 100_000, 1_000_000):
        seconds, field = time_fit(n)
        info = field.fit_info
        ratio = "" if previous is None else f"t(10N)/t(N) = {seconds / previous:.2f}"
        rows.append((f"fit to plateau, N = {n:,}", f"{seconds:.1f} s, {info['steps']} steps, "
                     f"converged={info['converged']}", ratio))
        print(rows[-1], flush=True)
        previous = seconds
    return rows


def part_schedules():
    rows = []
    # N = 5,000 ≤ 16 × 1024 runs on all data; minibatches need batch_size < 5000/16, hence 256 for the others
    for label, options in (("all 5,000 every step, exact q + Adam on hyperparameters (default)", dict()),
                           ("minibatch 256, Adam on q and hyperparameters", dict(batch_size=256)),
                           ("minibatch 256, natural q step γ=0.5 + Adam", dict(batch_size=256, q_update="natural"))):
        seconds, field = time_fit(5000, **options)
        rows.append((f"q schemes, N = 5,000: {label}", f"{seconds:.1f} s, {field.fit_info['steps']} steps",
                     f"ELBO {field.fit_info['elbo']:.1f}"))
        print(rows[-1], flush=True)
    return rows


def part_exact():
    rows = []
    obs = observations(5000, 3)
    test = np.random.default_rng(4).uniform(200.0, 3800.0, (2000, 2))
    sv_seconds, field = time_fit(5000, seed=3)
    sv_mean, _ = field.predict(test)
    t0 = time.perf_counter()
    sv_mean, _ = field.predict(test)
    sv_seconds += time.perf_counter() - t0
    config = TrainConfig("helmholtz", "squared-exponential", 256, 0, 1024, False, "auto", 0.5, SIGMA_POS, "")
    init = F._initial_params(F._prepare(obs, SIGMA_POS), config)   # the default background, as in the sparse fit
    ex_seconds, ex_mean, ex_steps = exact_gp(obs, init, test)
    sv_rmse, ex_rmse = rmse(sv_mean, test), rmse(ex_mean, test)
    rows.append(("N = 5,000: sparse fit + predict", f"{sv_seconds:.1f} s, RMSE {sv_rmse:.4f} m/s",
                 f"{field.fit_info['steps']} steps"))
    rows.append(("N = 5,000: exact dense GP (same kernel, L-BFGS-B on exact evidence)",
                 f"{ex_seconds:.1f} s, RMSE {ex_rmse:.4f} m/s", f"{ex_steps} evaluations"))
    rows.append(("sparse vs exact", f"RMSE ratio {sv_rmse / ex_rmse:.3f}", f"speed-up {ex_seconds / sv_seconds:.1f}x"))
    for row in rows:
        print(row, flush=True)
    return rows


if __name__ == "__main__":
    main()
