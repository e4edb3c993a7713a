"""Shared test helpers: write a small file, run the command line."""

from __future__ import annotations

import pytest


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
