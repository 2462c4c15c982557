"""Figure 10: process memory a bits=24 model adds, measured in a fresh subprocess.

``python -m bench.memory --rule classic`` prints one JSON line: resident memory (VmRSS) before
the model exists, the peak (VmHWM, reset first through /proc/self/clear_refs) after creating
it, scoring and labelling demo events and reading its summary, and the peak after one
snapshot as well. Labelling touches the weight pages a long-running model has touched, so the
figure is not flattered by untouched zero pages.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

from .common import ROOT, Mode, demo_events, model_body, row

BITS = 24
WEIGHTS_MIB = (1 << BITS) * 4 / 2**20  # one float32 row of 2**24 weights: 64 MiB
LABELS = 3000
TARGETS = {"classic": 1.1, "averaged": 2.2}


def _status_kib(key: str) -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(key + ":"):
            return int(line.split()[1])
    raise RuntimeError(f"/proc/self/status has no {key}")


def _reset_peak() -> bool:
    try:
        Path("/proc/self/clear_refs").write_text("5")  # 5 resets VmHWM to the current RSS
    except OSError:
        return False
    return True


async def _measure(rule: str) -> dict[str, Any]:
    from thresher.lifecycle import ModelRegistry
    from thresher.settings import Settings

    listings = demo_events(LABELS + 200, seed=41)
    with tempfile.TemporaryDirectory(prefix="bench-mem-") as tmp:
        settings = Settings.from_mapping(
            {"data_dir": tmp, "snapshot_interval": 0, "snapshot_every": 0, "flush": "interval"}
        )
        registry = ModelRegistry(settings)
        await registry.open()
        # Warm every code path once on a small model, so imports and caches are not counted.
        await _use(registry, model_body("warm", bits=10, rule=rule), listings[:200], [])
        await registry.snapshot("warm")
        await registry.delete("warm")
        before = _status_kib("VmRSS")
        reset = _reset_peak()
        steps: list[tuple[str, int]] = []
        await _use(registry, model_body("big", bits=BITS, rule=rule), listings, steps)
        used = {"after_kib": _status_kib("VmRSS"), "peak_kib": _status_kib("VmHWM")}
        await registry.snapshot("big")
        used["peak_snapshot_kib"] = _status_kib("VmHWM")
        steps.append(("snapshot", used["peak_snapshot_kib"]))
        await registry.close(snapshot=False)
    peaks = [(step, (kib - before) / 1024) for step, kib in steps]
    return {"rule": rule, "before_kib": before, "peak_reset": reset, "steps": peaks, **used}


async def _use(
    registry: Any, body: dict[str, Any], listings: list[Any], steps: list[tuple[str, int]]
) -> None:
    """Create, score, label and summarise; note the peak after each step."""
    model = await registry.create(body)
    steps.append(("create", _status_kib("VmHWM")))
    now = time.time()
    model.score([{"id": i, "fields": f} for i, f, _ in listings[:200]], explain=0, now=now)
    steps.append(("score", _status_kib("VmHWM")))
    for lo in range(0, len(listings), 500):
        chunk = listings[lo : lo + 500]
        labels = [{"id": i, "label": label, "fields": f} for i, f, label in chunk]
        await model.label(labels, source="bench", now=now)
    steps.append(("label", _status_kib("VmHWM")))
    model.summary()
    steps.append(("summary", _status_kib("VmHWM")))


def rows(mode: Mode) -> list[dict[str, Any]]:
    """Rows 10a-b: peak memory added per 64 MiB of weights, without and with a snapshot."""
    out = []
    for rule, target in TARGETS.items():
        done = subprocess.run(
            [sys.executable, "-m", "bench.memory", "--rule", rule],
            cwd=ROOT, capture_output=True, text=True, timeout=300,
        )  # fmt: skip
        if done.returncode != 0:
            why = (done.stderr.strip().splitlines() or ["no output"])[-1]
            out.append(row(f"10. peak RSS added, bits=24 {rule}", None, "x", note=why))
            continue
        got = json.loads(done.stdout.strip().splitlines()[-1])
        added = (got["peak_kib"] - got["before_kib"]) / 1024
        added_snap = (got["peak_snapshot_kib"] - got["before_kib"]) / 1024
        reset = "" if got["peak_reset"] else "; peak could not be reset, so it is an upper bound"
        steps = ", ".join(f"{step} {mib:.0f}" for step, mib in got["steps"])
        out.append(
            row(
                f"10a. peak RSS added, bits=24 {rule} (create, score, label, summary)",
                added / WEIGHTS_MIB,
                "x",
                target=("value<=", target),
                note=f"{added:.0f} MiB added per {WEIGHTS_MIB:.0f} MiB of weights; steady "
                f"{(got['after_kib'] - got['before_kib']) / 1024:.0f} MiB; peak MiB after each "
                f"step: {steps}{reset}",
            )
        )
        out.append(
            row(
                f"10b. peak RSS added, bits=24 {rule}, with one snapshot",
                added_snap / WEIGHTS_MIB,
                "x",
                target=("value<=", target),
                note=f"{added_snap:.0f} MiB: the same, then one snapshot (the server writes one "
                "every 5 minutes and on shutdown)",
            )
        )
    return out


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rule", choices=sorted(TARGETS), required=True)
    args = parser.parse_args(argv)
    print(json.dumps(asyncio.run(_measure(args.rule))))


if __name__ == "__main__":
    main()
