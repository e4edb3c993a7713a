"""Everyday speed: the command line starts without the numerical stack, progress shows in a pipe or a log,
and the stages' wall times are reported (``timing_s``, ``--profile``).  Timings themselves are measured by
hand in tests/benchmarks/bench_everyday.py, never asserted here."""

from __future__ import annotations

import io
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from driftwise.app.cli import COMMANDS, build_parser
from driftwise.app.cliparts import profile_text
from driftwise.data import synthetic
from driftwise.progress import Progress, Stopwatch

SRC = str(Path(__file__).resolve().parents[2] / "src")
HEAVY = ("jax", "matplotlib", "xarray", "scipy", "optax")


def _loaded_after(code: str) -> dict[str, bool]:
    """Which heavy packages a fresh interpreter has imported after running ``code``."""
    probe = code + "\nimport json, sys\nprint(json.dumps({m: m in sys.modules for m in %r}))" % (HEAVY,)
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True,
                          env={**os.environ, "PYTHONPATH": SRC})
    return json.loads(done.stdout.strip().splitlines()[-1])


def test_importing_the_command_line_loads_no_numerical_stack():
    assert _loaded_after("import driftwise.app.cli") == dict.fromkeys(HEAVY, False)


def test_help_and_inspect_load_no_numerical_stack(tmp_path):
    path = tmp_path / "small.csv"
    synthetic.random_walk(3, 10, fix_interval_s=60.0, diffusivity_m2_s=1.0, seed=0).to_csv(path, index=False)
    run = "import contextlib, io\nfrom driftwise.app.cli import main\n"
    assert _loaded_after(run + "with contextlib.redirect_stdout(io.StringIO()):\n"
                         "    try:\n        main(['--help'])\n    except SystemExit:\n        pass") \
        == dict.fromkeys(HEAVY, False)
    assert _loaded_after(run + f"assert main(['inspect', {str(path)!r}, '--json']) == 0") \
        == dict.fromkeys(HEAVY, False)


def _lapack_threads_after_a_command(tmp_path, env: dict[str, str]) -> dict:
    """A fresh interpreter runs ``driftwise inspect``, then a LAPACK call through jax: the OpenBLAS threads of
    the library jax's LAPACK uses (scipy's, loaded by that call; threadpoolctl reads them) and the variable."""
    path = tmp_path / "small.csv"
    synthetic.random_walk(3, 10, fix_interval_s=60.0, diffusivity_m2_s=1.0, seed=0).to_csv(path, index=False)
    probe = (f"import contextlib, io, json, os\nfrom driftwise.app.cli import main\n"
             f"with contextlib.redirect_stdout(io.StringIO()):\n    assert main(['inspect', {str(path)!r}]) == 0\n"
             "import jax, jax.numpy as jnp, threadpoolctl\njnp.linalg.cholesky(2.0 * jnp.eye(64)).block_until_ready()\n"
             "scipy_blas = [i['num_threads'] for i in threadpoolctl.threadpool_info() if 'scipy_openblas-' in i['filepath']]\n"
             "print(json.dumps({'threads': scipy_blas, 'variable': os.environ.get('OPENBLAS_NUM_THREADS')}))")
    clean = {k: v for k, v in os.environ.items() if k != "OPENBLAS_NUM_THREADS"}
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True,
                          env={**clean, "PYTHONPATH": SRC, **env})
    return json.loads(done.stdout.strip().splitlines()[-1])


def test_a_command_line_run_keeps_lapack_to_one_blas_thread_unless_told(tmp_path):
    assert _lapack_threads_after_a_command(tmp_path, {}) == {"threads": [1], "variable": "1"}
    assert _lapack_threads_after_a_command(tmp_path, {"OPENBLAS_NUM_THREADS": "2"}) == {"threads": [2],
                                                                                          "variable": "2"}


def test_the_package_loads_its_public_names_on_first_use():
    loaded = _loaded_after("import driftwise\nassert driftwise.__version__")
    assert loaded["jax"] is False
    loaded = _loaded_after("import driftwise, jax.numpy as jnp\nf = driftwise.fit\n"
                           "assert jnp.zeros(1).dtype == jnp.float64, 'float64 is on'")
    assert loaded["jax"] is True


def test_every_command_is_configured_by_its_module():
    parser = build_parser()                    # every command configured: imports every command module
    sub = next(a for a in parser._actions if a.dest == "command")
    assert list(sub.choices) == list(COMMANDS)
    for name, p in sub.choices.items():
        assert p.get_default("run") is not None, name


class _Clock:
    def __init__(self):
        self.now = 0.0

    def __call__(self):
        return self.now


class _Pipe(io.StringIO):
    def isatty(self):
        return False


def test_progress_prints_a_plain_line_every_few_seconds_when_not_a_terminal():
    clock, stream = _Clock(), _Pipe()
    bar = Progress(1500, desc="driftwise fit", stream=stream, every_s=5.0, clock=clock)
    for step in range(1, 1501):
        clock.now = 0.01 * step                  # 10 ms a step: 15 s in all
        bar.update(1)
        bar.set_postfix(elbo=f"{-1000.0 + step:.6g}")
    bar.close()
    lines = stream.getvalue().splitlines()
    assert len(lines) == 3                       # at 5 s, 10 s and 15 s; time left at the rate since the last line
    assert lines[0] == "driftwise fit: step 500/1500, elbo=-501, 5 s elapsed, ~10 s left"
    assert lines[1].startswith("driftwise fit: step 1000/1500, elbo=-1, 10 s elapsed, ~5 s left")


def test_progress_is_silent_when_disabled_or_the_loop_is_short():
    clock, stream = _Clock(), _Pipe()
    bar = Progress(100, desc="x", stream=stream, enabled=False, clock=clock)
    clock.now = 60.0
    bar.update(100)
    quick = Progress(100, desc="x", stream=stream, clock=clock)
    quick.update(100)                             # no time has passed since it started
    assert stream.getvalue() == ""


def test_progress_counts_from_a_resumed_step_at_the_recent_rate():
    clock, stream = _Clock(), _Pipe()
    bar = Progress(1000, desc="fit", initial=600, stream=stream, every_s=5.0, clock=clock)
    clock.now = 5.0
    bar.update(100)                               # 100 steps in 5 s (a slow first step: compilation), 300 to go
    clock.now = 10.0
    bar.update(200)                               # then 200 steps in 5 s: 100 to go at 40 steps/s
    assert stream.getvalue().splitlines() == ["fit: step 700/1000, 5 s elapsed, ~15 s left",
                                              "fit: step 900/1000, 10 s elapsed, ~2.5 s left"]


def test_stopwatch_adds_up_stages_and_counts_a_failed_one():
    clock = _Clock()
    watch = Stopwatch(clock=clock)
    with watch("read"):
        clock.now += 0.25
    with watch("read"):
        clock.now += 0.5
    with pytest.raises(RuntimeError), watch("fit"):
        clock.now += 2.0
        raise RuntimeError
    assert watch.laps == {"read": 0.75, "fit": 2.0}
    text = profile_text(watch.laps | {"total": 2.75})
    assert "read" in text and "750 ms" in text and "27.3 %" in text and "2.75 s" in text


@pytest.mark.slow
def test_fit_json_has_a_timing_table(run_cli, tmp_path):
    path = tmp_path / "walk.csv"
    synthetic.random_walk(4, 30, fix_interval_s=600.0, diffusivity_m2_s=1.0, seed=1,
                          position_error_m=5.0).to_csv(path, index=False)
    code, out, err = run_cli("fit", path, "--out", tmp_path / "m.npz", "--kernel", "independent", "--inducing", "8",
                             "--no-calibrate", "--position-error", "5m", "--json")
    assert code == 0, err
    timing = json.loads(out)["timing_s"]
    assert {"read", "estimate_position_error", "prepare", "optimise", "finish", "save", "total"} <= set(timing)
    assert timing["total"] == pytest.approx(sum(v for k, v in timing.items() if k != "total"), rel=1e-9)
    assert all(v >= 0 for v in timing.values())


def test_the_program_restarts_once_with_huge_pages_for_heavy_commands(monkeypatch):
    """`driftwise fit …` run as the program re-executes itself with glibc's huge-page tunable (same interpreter, same
    original command line); light commands, an environment that already sets the tunable or turns it off, and other
    systems do not."""
    from driftwise.app import cli

    calls = []
    monkeypatch.setattr(cli.os, "execve", lambda path, args, env: calls.append((path, list(args), env)))
    monkeypatch.setattr(cli.sys, "platform", "linux")
    monkeypatch.setattr(cli.sys, "orig_argv", ["/usr/bin/python3", "/venv/bin/driftwise", "fit", "a.csv"])
    monkeypatch.delenv("GLIBC_TUNABLES", raising=False)
    monkeypatch.delenv(cli.HUGE_PAGES_OFF, raising=False)
    cli._restart_with_huge_pages(["fit", "a.csv"])
    assert len(calls) == 1
    path, args, env = calls[0]
    assert path == sys.executable and args == ["/usr/bin/python3", "/venv/bin/driftwise", "fit", "a.csv"]
    assert env["GLIBC_TUNABLES"] == "glibc.malloc.hugetlb=1"
    monkeypatch.setenv("GLIBC_TUNABLES", "glibc.malloc.arena_max=2")
    cli._restart_with_huge_pages(["check", "a.csv"])
    assert calls[-1][2]["GLIBC_TUNABLES"] == "glibc.malloc.arena_max=2:glibc.malloc.hugetlb=1"
    calls.clear()
    for argv in (["inspect", "a.csv"], ["--help"], []):
        cli._restart_with_huge_pages(argv)
    monkeypatch.setenv("GLIBC_TUNABLES", "glibc.malloc.hugetlb=0")
    cli._restart_with_huge_pages(["fit", "a.csv"])
    monkeypatch.delenv("GLIBC_TUNABLES")
    monkeypatch.setenv(cli.HUGE_PAGES_OFF, "off")
    cli._restart_with_huge_pages(["fit", "a.csv"])
    monkeypatch.delenv(cli.HUGE_PAGES_OFF)
    monkeypatch.setattr(cli.sys, "platform", "darwin")
    cli._restart_with_huge_pages(["fit", "a.csv"])
    assert calls == []


def test_the_restarted_program_runs_with_the_tunable_set(tmp_path):
    """End to end: a fresh interpreter asked to restart for `fit x.csv` comes back (re-executed, same command line)
    with GLIBC_TUNABLES holding the huge-page setting on Linux; elsewhere it goes on without restarting."""
    probe = ("import os, sys\nfrom driftwise.app import cli\n"
             "if os.environ.get('GLIBC_TUNABLES'): print(os.environ['GLIBC_TUNABLES']); sys.exit(0)\n"
             "cli._restart_with_huge_pages(sys.argv[1:])\nprint('not restarted')")
    env = {k: v for k, v in os.environ.items() if k not in ("GLIBC_TUNABLES", "DRIFTWISE_HUGE_PAGES")}
    done = subprocess.run([sys.executable, "-c", probe, "fit", "x.csv"], capture_output=True, text=True,
                          env={**env, "PYTHONPATH": SRC}, check=True)
    expected = "glibc.malloc.hugetlb=1" if sys.platform.startswith("linux") else "not restarted"
    assert done.stdout.strip() == expected


def test_importing_the_package_switches_off_xla_ynnpack_fusions_unless_told():
    """jaxlib 0.10.2's YNNPACK dot fusions failed on a 3-D forecast with 256 inducing points (tests/app/test_tank_abc.py
    is the case that crashed); the package turns them off before jax builds its CPU backend, keeping a user's own
    flags and a user's own choice of the option."""
    probe = "import os, driftwise; print(os.environ['XLA_FLAGS'])"
    env = {k: v for k, v in os.environ.items() if k != "XLA_FLAGS"}
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True,
                         env={**env, "PYTHONPATH": SRC}).stdout.strip()
    assert out == "--xla_cpu_experimental_ynn_fusion_type="
    mine = "--xla_force_host_platform_device_count=2"
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True,
                         env={**env, "PYTHONPATH": SRC, "XLA_FLAGS": mine}).stdout.strip()
    assert out == f"{mine} --xla_cpu_experimental_ynn_fusion_type="
    chosen = "--xla_cpu_experimental_ynn_fusion_type=LIBRARY_FUSION_TYPE_DOT"
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True,
                         env={**env, "PYTHONPATH": SRC, "XLA_FLAGS": chosen}).stdout.strip()
    assert out == chosen
