"""``thresher demo`` as a real subprocess: the service, the invented traffic and the shift.

What is checked is the behaviour the demo is built to show with its invented marketplace
data (demo_traffic.py): the drift alarm fires after the fraud campaign changes, and the
mistake rate then falls back. The levels compared are the demo's own, read from the running
service's quality API and from the snapshot it leaves behind; the Page-Hinkley test behind the
alarm is Page (1954).
"""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path
from typing import Any

import pytest

from conftest import free_port
from thresher.quality import Quality
from thresher.snapshots import SnapshotStore

SHIFT_AT = 2000  # the documented default of --shift-at
pytestmark = pytest.mark.timeout(120)


def demo(*args: str) -> subprocess.Popen[str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("THRESHER_")}
    command = [sys.executable, "-m", "thresher.cli", "demo", *args]
    return subprocess.Popen(
        command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env
    )


def quality(port: int) -> dict[str, Any] | None:
    url = f"http://127.0.0.1:{port}/api/models/listings/quality"
    try:
        with urllib.request.urlopen(url, timeout=5) as resp:
            data: dict[str, Any] = json.loads(resp.read())
            return data
    except (urllib.error.URLError, OSError):
        return None  # not up yet, or the model is not created yet


def test_demo_shows_the_drift_alarm_and_the_recovery(tmp_path: Path) -> None:
    port, data_dir = free_port(), tmp_path / "demo"
    started = time.monotonic()
    proc = demo("--duration", "20", "--port", str(port), "--data-dir", str(data_dir))
    samples: list[tuple[int, float | None, int]] = []
    try:
        while proc.poll() is None and time.monotonic() - started < 60:
            report = quality(port)
            if report is not None and report["labelled"]:
                rate = report["mistake_rate"]["last_1000"]
                samples.append((report["labelled"], rate, report["drift"]["alarms"]))
            time.sleep(0.5)
        out, err = proc.communicate(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 0, err
    assert "Traceback" not in err and time.monotonic() - started < 40
    assert f"http://127.0.0.1:{port}/" in out.splitlines()[0]
    assert f"data left in {data_dir}" in out
    # The alarm is told in words on the console, at the label the snapshot records below.
    alarm_lines = [line for line in err.splitlines() if "drift alarm" in line]
    assert alarm_lines and all("{" not in line for line in alarm_lines), err

    # The service left a verifiable snapshot with everything that was labelled.
    store = SnapshotStore(data_dir / "models" / "listings" / "snapshots")
    newest = store.load_newest()
    assert newest is not None
    state, info, skipped = newest
    final = Quality.from_state(state["quality"])
    assert not skipped and info.offset == final.labelled == state["offset"]
    assert final.labelled > SHIFT_AT + 2000, "too few labels to see the recovery"
    assert samples and samples[-1][0] <= final.labelled

    # The alarm: none before the shift, at least one within 1,500 labels after it.
    assert all(at > SHIFT_AT for at in final.alarm_at), final.alarm_at
    assert f"drift alarm on model 'listings' at label {final.alarm_at[0]:,}:" in alarm_lines[0]
    assert any(SHIFT_AT < at <= SHIFT_AT + 1500 for at in final.alarm_at), final.alarm_at
    assert all(alarms == 0 for labelled, _, alarms in samples if labelled <= SHIFT_AT)
    assert any(alarms >= 1 for labelled, _, alarms in samples if labelled > SHIFT_AT)

    # The recovery: last_1000 right after the shift, against the value at the end.
    before = [r for labelled, r, _ in samples if SHIFT_AT - 600 < labelled <= SHIFT_AT]
    after = [r for labelled, r, _ in samples if SHIFT_AT < labelled <= SHIFT_AT + 1500]
    assert before and after, samples
    peak, end = max(after), final.mistake_rates()["last_1000"]
    assert end is not None and peak is not None
    assert peak > 2 * max(before), (before, after)  # the shift hurts
    assert end < 0.6 * peak, (peak, end)  # and the model learns the new campaign
    report = final.report()
    assert report["by_source"] == {"moderators": final.labelled}
    assert 0 < report["served"]["mistake_rate"] < 1  # scored before review, then labelled


def test_ctrl_c_stops_the_demo_gracefully(tmp_path: Path) -> None:
    port, data_dir = free_port(), tmp_path / "interrupted"
    proc = demo("--port", str(port), "--data-dir", str(data_dir))
    try:
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            report = quality(port)
            if report is not None and report["labelled"] >= 300:
                break
            time.sleep(0.2)
        else:
            raise AssertionError("the demo labelled nothing")
        proc.send_signal(signal.SIGINT)
        out, err = proc.communicate(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 0, err
    assert "Ctrl-C to stop" in out and "demo stopped after" in out
    snapshots = SnapshotStore(data_dir / "models" / "listings" / "snapshots").list()
    assert snapshots and snapshots[0].offset >= 300


def test_a_taken_port_is_one_line_and_exit_1(tmp_path: Path) -> None:
    with socket.socket() as holder:
        holder.bind(("127.0.0.1", 0))
        holder.listen()
        port = holder.getsockname()[1]
        proc = demo("--duration", "5", "--port", str(port), "--data-dir", str(tmp_path / "d"))
        _, err = proc.communicate(timeout=60)
    assert proc.returncode == 1
    assert err.splitlines() == [
        f"thresher: cannot listen on 127.0.0.1:{port}: address already in use; pick another --port"
    ]
