"""The demo's bookkeeping: a job of timed steps, the files and figures it wrote, and one-line texts.

A step that fails or lacks a piece is recorded with its reason and the job goes on; the demo never
invents a number it did not compute.
"""

from __future__ import annotations

import os
import platform
import time
import traceback
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import jax
import numpy as np

from ..errors import InputError
from ..products.plots import save_figure
from ..progress import Progress

HOUR_S = 3600.0


class Unavailable(Exception):
    """A library piece the step needs is not in this installation (reported, never faked)."""


@dataclass
class Job:
    """What the demo has done so far: steps, products, figures, warnings."""

    out: Path
    settings: Any
    progress: bool
    figures_dir: Path
    steps: list[dict] = field(default_factory=list)
    files: list[dict] = field(default_factory=list)
    figures: list[dict] = field(default_factory=list)
    missing: list[dict] = field(default_factory=list)
    summary: dict = field(default_factory=dict)
    state: dict = field(default_factory=dict)

    def relative(self, path: Path) -> str:
        """``path`` relative to the output folder when inside it, else absolute."""
        path = Path(path).resolve()
        try:
            return path.relative_to(self.out.resolve()).as_posix()
        except ValueError:
            return str(path)

    def add_file(self, path: Path, description: str) -> None:
        self.files.append({"path": self.relative(path), "description": description})

    def add_figure(self, fig: Any, name: str, caption: str, section: str) -> None:

        path = save_figure(fig, self.figures_dir / name)
        self.figures.append({"path": self.relative(path), "caption": caption, "section": section})
        self.add_file(path, caption)

    def run(self, name: str, section: str, fn: Callable[["Job"], str]) -> bool:
        """Run one step; record its status and wall time.  Returns True when it completed."""
        start, cpu = time.perf_counter(), time.process_time()
        status, detail = "done", ""
        try:
            detail = fn(self) or ""
        except Unavailable as err:
            status, detail = "not available", one_line(str(err))
        except InputError as err:
            status, detail = "failed", one_line(str(err))
        except Exception as err:  # an internal error: report it in one line, keep the rest of the job going
            status, detail = "failed", one_line(f"{type(err).__name__}: {err}")
            self.state.setdefault("tracebacks", []).append(traceback.format_exc())
        seconds, cpu = time.perf_counter() - start, time.process_time() - cpu
        self.steps.append({"name": name, "status": status, "seconds": round(seconds, 2),
                           "cpu_seconds": round(cpu, 2), "detail": detail})
        if status != "done":
            self.missing.append({"section": section, "reason": f"the {name} step {status}: {detail}"})
        return status == "done"


def fitted_field(job: Job) -> Any:
    """The field the fit step left in ``job.state``; Unavailable when it did not produce one."""
    if "field" not in job.state:
        raise Unavailable("needs the fitted field, which the fit step did not produce")
    return job.state["field"]


def one_line(text: str, limit: int = 300) -> str:
    """``text`` with its whitespace collapsed onto one line, cut at ``limit`` characters."""
    text = " ".join(str(text).split())
    return text if len(text) <= limit else text[: limit - 1] + "…"



def progress_bar(total: int, quiet: bool) -> Any:
    """The demo's step progress on stderr (:class:`driftwise.progress.Progress`), none with ``--quiet``."""
    return Progress(total, enabled=not quiet, desc="driftwise demo")


def one_line_warnings(caught: list[warnings.WarningMessage]) -> list[str]:
    """Each distinct warning once, on one line: ``Category: first line of the message (×n)``."""
    counts: dict[str, int] = {}
    for w in caught:
        text = f"{w.category.__name__}: {str(w.message).strip().splitlines()[0] if str(w.message).strip() else ''}"
        counts[text] = counts.get(text, 0) + 1
    return [text if n == 1 else f"{text} (×{n})" for text, n in counts.items()]


def environment() -> dict:
    """Versions and machine facts recorded with a run (python, platform, jax, numpy, cores)."""
    return {"python": platform.python_version(), "platform": platform.platform(), "jax": jax.__version__,
            "numpy": np.__version__, "cpu_count": os.cpu_count()}
