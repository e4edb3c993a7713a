"""The README's Quick start commands are exactly the ones CI runs."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def quick_start_commands() -> list[str]:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    block = re.search(r"```bash\n(.*?)```", section, re.S)
    assert block, "README Quick start has no bash block"
    return [line for line in block.group(1).splitlines() if line.strip()]


def test_quick_start_has_exactly_two_commands():
    assert len(quick_start_commands()) == 2


def test_ci_runs_quick_start_commands_verbatim():
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    ci_lines = [line.strip() for line in ci.splitlines()]
    for command in quick_start_commands():
        assert any(line.startswith(command) or command in line for line in ci_lines), command


def test_readme_carries_the_caution():
    text = " ".join((ROOT / "README.md").read_text(encoding="utf-8").lower().replace(">", " ").split())
    assert "research tool" in text and "responsible authorities" in text and "licensed practice" in text
