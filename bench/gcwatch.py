"""Run ``thresher`` with its garbage-collector pauses logged: a diagnostic for latency misses.

``python -m bench.gcwatch LOG serve ...`` runs the thresher command line unchanged, and
appends one line per collection to LOG: generation, milliseconds, objects collected. Figures
are never measured this way; only the hot-spot report uses it.
"""

from __future__ import annotations

import gc
import sys
import time
from pathlib import Path
from typing import Any


def watch(log: Path) -> None:
    """Append every collection's generation and duration to ``log``."""
    out = open(log, "a", buffering=1, encoding="utf-8")  # noqa: SIM115 - open for the run
    began = [0.0]

    def note(phase: str, info: dict[str, Any]) -> None:
        if phase == "start":
            began[0] = time.perf_counter()
            return
        took = (time.perf_counter() - began[0]) * 1000
        out.write(f"{info['generation']} {took:.3f} {info['collected']}\n")

    gc.callbacks.append(note)


def pauses(log: Path, skip_lines: int = 0) -> dict[str, Any]:
    """Summary of the generation-2 collections logged after the first ``skip_lines`` lines."""
    lines = log.read_text(encoding="utf-8").splitlines()[skip_lines:]
    full = [float(line.split()[1]) for line in lines if line.startswith("2 ")]
    young = [float(line.split()[1]) for line in lines if not line.startswith("2 ")]
    return {
        "gen2_count": len(full),
        "gen2_max_ms": max(full, default=0.0),
        "gen2_total_ms": sum(full),
        "young_count": len(young),
        "young_max_ms": max(young, default=0.0),
        "young_total_ms": sum(young),
    }


def main() -> None:
    from thresher.cli import main as thresher

    watch(Path(sys.argv[1]))
    sys.exit(thresher(sys.argv[2:]))


if __name__ == "__main__":
    main()
