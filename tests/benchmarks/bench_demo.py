"""How long `driftwise demo` takes, as a user runs it (fresh process, compilation included).

Run by hand:  .venv/bin/python tests/benchmarks/bench_demo.py [--repeat 3] [--fast-too]

Each repetition runs `driftwise demo --quiet --out TMP` in a new process and reads the per-step
wall and CPU times (process time, all threads) from its summary.json.  One table: median
seconds per step (full size, and the --fast setting side by side with --fast-too), each step's
share of the total, and the total against the two-minute target (ratio < 1 meets it).  The
machine's load average is printed first: wall times on a busy machine are not the demo's speed
(the CPU column is less sensitive to other load).
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

TARGET_S = 120.0
ROOT = Path(__file__).resolve().parents[2]


def run_once(fast: bool) -> tuple[float, dict[str, float], dict[str, float]]:
    """(process wall time in s, {step: wall s}, {step: CPU s}) of one demo run in a fresh process."""
    driftwise = Path(sys.executable).with_name("driftwise")
    with tempfile.TemporaryDirectory() as tmp:
        cmd = [str(driftwise), "demo", "--quiet", "--out", tmp] + (["--fast"] if fast else [])
        start = time.perf_counter()
        done = subprocess.run(cmd, capture_output=True, text=True, cwd=ROOT, env={**os.environ, "MPLBACKEND": "Agg"})
        wall = time.perf_counter() - start
        if done.returncode != 0:
            raise SystemExit(f"demo failed ({done.returncode}):\n{done.stdout[-2000:]}\n{done.stderr[-2000:]}")
        summary = json.loads((Path(tmp) / "summary.json").read_text())
    steps = {s["name"]: float(s["seconds"]) for s in summary["job"]["steps"]}
    cpu = {s["name"]: float(s.get("cpu_seconds", float("nan"))) for s in summary["job"]["steps"]}
    return wall, steps, cpu


def medians(runs: list[tuple[float, dict[str, float], dict[str, float]]]) -> tuple[float, dict, dict]:
    names = list(runs[0][1])
    return (statistics.median(w for w, _, _ in runs), {n: statistics.median(r[1][n] for r in runs) for n in names},
            {n: statistics.median(r[2][n] for r in runs) for n in names})


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--fast-too", action="store_true", help="also time `driftwise demo --fast`")
    args = parser.parse_args()
    print(f"cpus {os.cpu_count()}, load average {', '.join(f'{v:.2f}' for v in os.getloadavg())}")
    full = medians([run_once(False) for _ in range(args.repeat)])
    fast = medians([run_once(True) for _ in range(args.repeat)]) if args.fast_too else None
    header = f"{'step':<50} {'full (s)':>9} {'CPU (s)':>8} {'share':>6}" + (
        f" {'fast (s)':>9} {'fast/full':>9}" if fast else "")
    print(f"median of {args.repeat} runs, each a fresh process")
    print(header)
    print("-" * len(header))
    total_steps = sum(full[1].values())
    for name, seconds in full[1].items():
        row = f"{name:<50} {seconds:9.1f} {full[2][name]:8.1f} {seconds / total_steps:6.1%}"
        if fast:
            row += f" {fast[1][name]:9.1f} {fast[1][name] / max(seconds, 1e-9):9.2f}"
        print(row)
    row = f"{'process wall time (start-up, steps, report)':<50} {full[0]:9.1f} {sum(full[2].values()):8.1f} {'':>6}"
    print(row + (f" {fast[0]:9.1f} {fast[0] / full[0]:9.2f}" if fast else ""))
    print(f"{'target':<50} {TARGET_S:9.1f}")
    print(f"{'wall time / target (< 1 meets the target)':<50} {full[0] / TARGET_S:9.2f}")


if __name__ == "__main__":
    main()
