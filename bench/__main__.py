"""``python -m bench``: every performance figure of thresher beside its peer, the floor or target.

``--quick`` measures once with short runs (under two minutes, for development); the default
full mode repeats each figure (medians of at least three) and takes under fifteen minutes.
Results go to bench/results/latest.md and latest.json; the table is also printed.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib.util
import json
import os
import signal
import subprocess
import sys
import tempfile
import time
import traceback
from collections.abc import Callable
from pathlib import Path
from typing import Any

from . import bench_ids, http_figures, inproc, memory, report, storage
from .common import FULL, QUICK, ROOT, Mode, cpus, machine, missing_row, on_cpu

RESULTS = Path(__file__).with_name("results")
REDIS_FIGURE = "9. Redis replica apply rate and label-to-visible latency"
Section = Callable[[Mode, Path], list[dict[str, Any]]]


def _inproc(mode: Mode, tmp: Path) -> list[dict[str, Any]]:
    with on_cpu(cpus()[0]):
        return inproc.run(mode)


def _snapshots(mode: Mode, tmp: Path) -> list[dict[str, Any]]:
    with on_cpu(cpus()[0]):
        rows = storage.snapshot_rows(mode)
    return rows + http_figures.snapshot_p99(mode, tmp)


def _replay(mode: Mode, tmp: Path) -> list[dict[str, Any]]:
    with on_cpu(cpus()[0]):
        return storage.replay_rows(mode)


def _ids(mode: Mode, tmp: Path) -> list[dict[str, Any]]:
    with on_cpu(cpus()[0]):
        return bench_ids.rows(mode)


def _memory(mode: Mode, tmp: Path) -> list[dict[str, Any]]:
    with on_cpu(cpus()[0]):
        return memory.rows(mode)


REDIS_TIMEOUT = {"quick": 45, "full": 240}  # seconds; a hung run must not stall the rest


def _redis(mode: Mode, tmp: Path) -> list[dict[str, Any]]:
    """Figure 9: bench/bench_redis.py's ``run(quick)``, called in a child with a time limit."""
    if importlib.util.find_spec(f"{__package__}.bench_redis") is None:
        return [missing_row(REDIS_FIGURE, "bench/bench_redis.py does not exist yet")]
    call = (
        "import json; from bench import bench_redis; "
        f"print('BENCH-ROWS ' + json.dumps(bench_redis.run({mode.quick}), default=str))"
    )
    # Its own session, so a time-out can stop the child and the servers it started, together.
    child = subprocess.Popen(
        [sys.executable, "-c", call], cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
        text=True, start_new_session=True,
    )  # fmt: skip
    try:
        out, err = child.communicate(timeout=REDIS_TIMEOUT[mode.name])
    except subprocess.TimeoutExpired:
        _stop_group(child)
        return [missing_row(REDIS_FIGURE, f"bench_redis.run({mode.quick}) did not finish in "
                                          f"{REDIS_TIMEOUT[mode.name]} s; stopped")]  # fmt: skip
    lines = [line for line in out.splitlines() if line.startswith("BENCH-ROWS ")]
    if child.returncode != 0 or not lines:
        why = (err.strip().splitlines() or [f"exit status {child.returncode}"])[-1]
        return [missing_row(REDIS_FIGURE, f"bench_redis.run failed: {why}")]
    rows = []
    for item in json.loads(lines[-1][len("BENCH-ROWS ") :]):
        met = item.get("met")
        if isinstance(met, str):
            met = {"yes": True, "no": False}.get(met.lower())
        figure = str(item.get("figure", "redis"))
        rows.append(
            {
                **item,
                "figure": figure if figure.startswith("9") else f"9. {figure}",
                "met": met,
                "note": item.get("note") or "from bench/bench_redis.py",
            }
        )
    return rows or [missing_row(REDIS_FIGURE, "bench_redis.run returned no rows")]


def _stop_group(child: subprocess.Popen[str]) -> None:
    """Stop a child started in its own session, and everything it started, by its group id."""
    for sig, wait in ((signal.SIGTERM, 10), (signal.SIGKILL, 10)):
        with contextlib.suppress(ProcessLookupError):
            os.killpg(child.pid, sig)
        try:
            child.communicate(timeout=wait)
            return
        except subprocess.TimeoutExpired:
            continue


SECTIONS: dict[str, Section] = {
    "inproc": _inproc,
    "http": http_figures.run,
    "snapshots": _snapshots,
    "replay": _replay,
    "redis": _redis,
    "memory": _memory,
    "ids": _ids,
}


def _order(item: dict[str, Any]) -> int:
    """Figures by number ("10a" after "9"), stable within one, unnumbered ones last."""
    figure = str(item["figure"])
    digits = figure[: len(figure) - len(figure.lstrip("0123456789"))]
    return int(digits) if digits else 99


def _write(
    out: Path,
    mode: Mode,
    sections: list[str],
    rows: list[dict[str, Any]],
    spots: list[dict[str, Any]],
    started: float,
) -> dict[str, Any]:
    result = {
        "machine": {**machine(mode), "sections": sections},
        "rows": rows,
        "hotspots": spots,
        "elapsed_s": time.monotonic() - started,
    }
    report.write(result, out)
    return result


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m bench", description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="one short pass (development)")
    parser.add_argument(
        "--only", default="", help=f"comma-separated sections: {', '.join(SECTIONS)}"
    )
    parser.add_argument("--no-profile", action="store_true", help="skip profiling the misses")
    parser.add_argument("--out", type=Path, default=RESULTS, help="results directory")
    args = parser.parse_args(argv)
    mode = QUICK if args.quick else FULL
    chosen = [s.strip() for s in args.only.split(",") if s.strip()] or list(SECTIONS)
    unknown = [s for s in chosen if s not in SECTIONS]
    if unknown:
        parser.error(f"unknown section {unknown[0]!r}; choose from {', '.join(SECTIONS)}")
    started = time.monotonic()
    rows: list[dict[str, Any]] = []
    with tempfile.TemporaryDirectory(prefix="bench-") as tmp:
        for name in chosen:
            print(f"bench: {name} ({mode.name}) ...", file=sys.stderr, flush=True)
            begun = time.monotonic()
            try:
                rows += SECTIONS[name](mode, Path(tmp))
            except Exception as error:  # one broken section still leaves the others' figures
                traceback.print_exc()
                rows.append(missing_row(f"{name} section", f"{type(error).__name__}: {error}"))
            print(f"bench: {name} took {time.monotonic() - begun:.0f} s", file=sys.stderr)
            rows.sort(key=_order)
            _write(args.out, mode, chosen, rows, [], started)  # a later hang keeps these
        spots: list[dict[str, Any]] = []
        if not args.no_profile:
            from .hotspots import profile_misses

            print("bench: profiling the worst misses ...", file=sys.stderr, flush=True)
            spots = profile_misses(rows, mode, Path(tmp))
    result = _write(args.out, mode, chosen, rows, spots, started)
    md, js = args.out / "latest.md", args.out / "latest.json"
    print(report.table(rows))
    print(f"\nwrote {md} and {js} in {result['elapsed_s']:.0f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
