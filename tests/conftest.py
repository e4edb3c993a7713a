"""Shared test helpers: write a small file, run the command line; compiled programs freed between modules."""

from __future__ import annotations

import gc

import jax
import pytest


@pytest.fixture(autouse=True, scope="module")
def free_compiled_programs():
    """Drop jax's compiled programs after each test module.

    Every compiled XLA CPU program keeps memory mappings; the whole suite compiles thousands of them in one
    process, which reached Linux's default limit of 65,530 mappings per process (vm.max_map_count) and made
    LLVM crash inside a later compilation.  Clearing the caches per module keeps the count bounded.
    """
    yield
    jax.clear_caches()
    gc.collect()


@pytest.fixture
def write_file(tmp_path):
    """``write_file(name, content)`` → path; ``content`` is text (UTF-8, newlines kept as given) or bytes."""

    def write(name: str, content: str | bytes):
        path = tmp_path / name
        path.write_bytes(content if isinstance(content, bytes) else content.encode("utf-8"))
        return path

    return write


@pytest.fixture
def run_cli(capsys):
    """``run_cli(*argv)`` → (exit code, stdout, stderr) of ``driftwise.app.cli.main``."""
    from driftwise.app.cli import main

    def run(*argv: str):
        capsys.readouterr()
        code = main([str(a) for a in argv])
        captured = capsys.readouterr()
        return code, captured.out, captured.err

    return run
