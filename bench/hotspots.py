"""Where the time goes in the worst misses: py-spy samples, folded into top functions.

In-process figures are profiled by running their workload under ``py-spy record`` in a child
(``python -m bench.hotspots WORKLOAD SECONDS``); HTTP figures by attaching py-spy to a running
thresher server while wrk loads it. Samples become self and total shares per function.
"""

from __future__ import annotations

import argparse
import re
import shutil
import subprocess
import sys
from collections import Counter
from pathlib import Path
from typing import Any

from . import wrk
from .common import ROOT, Mode, cpus, model_body, on_cpu
from .servers import Server, ServerFailed

RATE = 200  # samples per second
TOP = 8
MOST = 5  # workloads profiled per run
_FRAME = re.compile(r"^(?P<func>.*) \((?P<file>[^()]*?)(?::(?P<line>\d+))?\)$")
FOCUS = {
    "batch-learning": "Workload.learn_batches",
    "one-event": "Workload.learn_singly",
    "featurize-score": "Workload.score_from_fields",
    "replay": "ModelRegistry.open",
}

# Figure number -> (kind, workload). Memory (10) has its own per-step breakdown in the row.
WORKLOADS = {
    "1.": ("inproc", "batch-learning"),
    "2.": ("inproc", "one-event"),
    "3b": ("inproc", "featurize-score"),
    "8.": ("inproc", "replay"),
    "4a": ("http", "score1"),
    "4b": ("http", "score1"),
    "5a": ("http", "score100"),
    "5b": ("http", "labels100"),
    "6.": ("http", "labels100"),
}


def shortfall(item: dict[str, Any]) -> float:
    """How far a missed row is from its target, as a factor (> 1 means missed)."""
    goal = item.get("goal")
    if item.get("met") is not False or not goal:
        return 0.0
    kind, threshold = goal
    got = item.get("ratio") if kind.startswith("ratio") else item.get("value")
    if not got or not threshold:
        return 0.0
    return float(threshold / got if kind.endswith(">=") else got / threshold)


def fold(raw: str, focus: str | None = None) -> dict[str, Any]:
    """py-spy's raw (collapsed) output -> samples and top functions by self and total share.

    With ``focus``, only stacks through a function of that name count (set-up is left out).
    """
    own: Counter[str] = Counter()
    total: Counter[str] = Counter()
    samples = 0
    for line in raw.splitlines():
        stack, _, count = line.rpartition(" ")
        if not stack or not count.isdigit():
            continue
        frames = [_FRAME.match(frame.strip()) for frame in stack.split(";")]
        names = [f"{m['func']} ({m['file']})" if m else "?" for m in frames]
        if focus is not None and not any(m and m["func"] == focus for m in frames):
            continue
        n = int(count)
        samples += n
        own[names[-1]] += n
        for name in set(names):
            total[name] += n
    if not samples:
        return {"samples": 0, "self": [], "total": []}

    def share(counter: Counter[str], keep: Any) -> list[tuple[str, float]]:
        picked = [(name, n / samples) for name, n in counter.most_common() if keep(name)]
        return picked[:TOP]

    skip = (
        "main (",
        "run (",
        "_workload (",
        "<module> (",
        "Workload.",
        "cmd_serve (",
        "guard.<locals>.guarded (",
    )
    return {
        "samples": samples,
        "self": share(own, lambda name: True),
        "total": share(
            total,
            lambda name: (
                "thresher/" in name and not name.startswith(skip) and total[name] < 0.99 * samples
            ),  # the entry points every sample runs through
        ),
    }


def _py_spy() -> str:
    # Beside the interpreter first: a venv's tools are there even when its bin is not on PATH.
    path = shutil.which("py-spy", path=str(Path(sys.executable).parent)) or shutil.which("py-spy")
    if path is None:
        raise RuntimeError("py-spy is not installed (pip install py-spy)")
    return path


def _record(target: list[str], out: Path, seconds: float) -> str:
    command = [_py_spy(), "record", "--format", "raw", "--rate", str(RATE), "--nonblocking",
               "--output", str(out), *target]  # fmt: skip
    done = subprocess.run(command, cwd=ROOT, capture_output=True, text=True, timeout=seconds + 120)
    if not out.exists():
        raise RuntimeError(f"py-spy wrote nothing: {done.stderr.strip()[-300:]}")
    return out.read_text()


def profile_inproc(workload: str, seconds: float, tmp: Path) -> dict[str, Any]:
    server_cpu, _ = cpus()
    with on_cpu(server_cpu):
        raw = _record(
            ["--", sys.executable, "-m", "bench.hotspots", workload, str(seconds)],
            tmp / f"{workload}.txt",
            seconds,
        )
    return fold(raw, FOCUS[workload])


def profile_http(workload: str, seconds: float, tmp: Path) -> dict[str, Any]:
    """py-spy attached to a fresh thresher server under wrk, plus its collector pauses."""
    from .gcwatch import pauses
    from .http_figures import LABELS, MODEL, SCORE, TRAIN, bodies

    server_cpu, load_cpu = cpus()
    files = bodies(tmp)
    body = files["labels100" if workload == "labels100" else workload]
    path = LABELS if workload == "labels100" else SCORE
    gc_log = tmp / f"gc-{workload}.log"
    with on_cpu(load_cpu), Server("thresher", server_cpu, gc_log=gc_log) as ours:
        ours.post("/api/models", model_body(MODEL))
        ours.train(MODEL, TRAIN)
        url = ours.base + path
        # Fill the scored-event cache first (100-event batches with ids), as on a busy server.
        fill = max(1, int(seconds / 2))
        wrk.run(ours.base + SCORE, files["score100"], connections=32, seconds=fill)
        wrk.run(url, body, connections=32, seconds=1)
        out = tmp / f"http-{workload}.txt"
        command = [_py_spy(), "record", "--format", "raw", "--rate", str(RATE), "--nonblocking",
                   "--duration", str(int(seconds)), "--pid", str(ours.pid),
                   "--output", str(out)]  # fmt: skip
        skip = len(gc_log.read_text().splitlines())
        spy = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        load = wrk.run(url, body, connections=32, seconds=int(seconds) + 1)
        _, err = spy.communicate(timeout=120)
        collector = pauses(gc_log, skip)
        if not out.exists():
            raise RuntimeError(f"py-spy wrote nothing: {err.decode(errors='replace')[-300:]}")
        result = fold(out.read_text())
    result["gc"] = {**collector, "seconds": load.seconds, "p99_ms": load.p99_ms}
    return result


def profile_misses(rows: list[dict[str, Any]], mode: Mode, tmp: Path) -> list[dict[str, Any]]:
    """Profile the workloads behind the worst misses (at most ``MOST`` distinct ones)."""
    seconds = 3.0 if mode.quick else 8.0
    missed = sorted(rows, key=shortfall, reverse=True)
    done: set[str] = set()
    out: list[dict[str, Any]] = []
    for item in missed:
        if shortfall(item) <= 1.0 or len(done) == MOST:
            break
        key = next((k for k in WORKLOADS if item["figure"].startswith(k)), None)
        if key is None or WORKLOADS[key][1] in done:
            continue
        kind, workload = WORKLOADS[key]
        done.add(workload)
        entry: dict[str, Any] = {"figure": item["figure"], "workload": workload,
                                 "shortfall": shortfall(item)}  # fmt: skip
        try:
            if kind == "inproc":
                entry.update(profile_inproc(workload, seconds, tmp))
            else:
                entry.update(profile_http(workload, seconds, tmp))
        except (RuntimeError, OSError, ServerFailed, wrk.LoadFailed) as error:
            entry["error"] = str(error)
        out.append(entry)
    return out


def _workload(name: str, seconds: float) -> None:
    """Run one in-process workload in a loop for about ``seconds``."""
    import time

    from .inproc import Workload
    from .storage import replay_workload

    if name == "replay":
        replay_workload(seconds)
        return
    work = Workload(5000)
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if name == "batch-learning":
            work.learn_batches()
        elif name == "one-event":
            work.learn_singly(2000)
        elif name == "featurize-score":
            learner = work.learn_batches()
            for _ in range(5):
                work.score_from_fields(learner)
        else:
            raise SystemExit(f"unknown workload {name!r}")


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description="run one workload for the profiler")
    parser.add_argument("workload")
    parser.add_argument("seconds", type=float)
    args = parser.parse_args(argv)
    _workload(args.workload, args.seconds)


if __name__ == "__main__":
    main()
