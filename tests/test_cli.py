"""The operator command line against a live ``thresher serve`` subprocess.

Every command runs as ``python -m thresher.cli ...`` in a subprocess. Its JSON is checked
against the HTTP API's own answers (the contract in DEVELOPERS.md), and replayed files against
counts the test makes from the file itself. The replay data is the invented demo traffic; the
CSV check uses the Breast Cancer Wisconsin (Diagnostic) data bundled with scikit-learn.
"""

from __future__ import annotations

import csv
import json
import os
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.request
from collections import Counter
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from conftest import free_port
from thresher.demo_traffic import DEMO_MODEL, ListingTraffic

pytestmark = pytest.mark.timeout(240)


class Server:
    """``thresher serve`` in a subprocess on a free loopback port."""

    def __init__(self, data_dir: Path, *flags: str) -> None:
        self.data_dir = data_dir
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.log = data_dir.parent / f"{data_dir.name}.server.log"
        args = [sys.executable, "-m", "thresher.cli", "serve", "--data-dir", str(data_dir),
                "--port", str(self.port), "--log-level", "warning", *flags]  # fmt: skip
        with open(self.log, "ab") as log:
            self.proc = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=log)
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise AssertionError(f"server exited: {self.log.read_text()[-2000:]}")
            try:
                if api("GET", self.url + "/readyz")[0] == 200:
                    return
            except OSError:
                pass
            time.sleep(0.05)
        self.stop()
        raise AssertionError("server did not become ready")

    def stop(self) -> int:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
        return self.proc.wait(timeout=30)


def api(method: str, url: str, body: Any = None) -> tuple[int, Any]:
    """One HTTP call with the standard library; (status, decoded JSON or None)."""
    data = None if body is None else json.dumps(body).encode()
    request = urllib.request.Request(url, data=data, method=method)
    if data is not None:
        request.add_header("Content-Type", "application/json")
    try:
        with urllib.request.urlopen(request, timeout=30) as resp:
            raw = resp.read()
            return resp.status, json.loads(raw) if raw else None
    except urllib.error.HTTPError as error:
        return error.code, json.loads(error.read() or b"null")


def cli(
    *args: str, url: str | None = None, env: dict[str, str] | None = None, timeout: float = 120
) -> subprocess.CompletedProcess:
    """Run ``thresher ARGS`` (with ``--url`` when given) and capture its output."""
    clean = {k: v for k, v in os.environ.items() if not k.startswith("THRESHER_")}
    env = {**clean, **(env or {})}
    command = [sys.executable, "-m", "thresher.cli", *args]
    if url is not None:
        command += ["--url", url]
    result = subprocess.run(command, capture_output=True, text=True, env=env, timeout=timeout)
    assert "Traceback" not in result.stderr, result.stderr
    return result


def ok_json(*args: str, url: str | None = None) -> Any:
    result = cli(*args, "--json", url=url)
    assert result.returncode == 0, result.stderr
    return json.loads(result.stdout)


def one_line_error(result: subprocess.CompletedProcess, code: int) -> str:
    """The single stderr line of a failed command, after checking its exit code."""
    assert result.returncode == code, (result.returncode, result.stdout, result.stderr)
    lines = result.stderr.splitlines()
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("thresher"), lines
    return lines[0]


def listings(n: int, seed: int, shift_at: int = 400) -> list[tuple[str, dict[str, Any], str]]:
    return ListingTraffic(seed=seed, shift_at=shift_at).batch(n)


def write_jsonl(path: Path, events: list[tuple[str, dict[str, Any], str]]) -> Counter[str]:
    """Both accepted line shapes, alternating; returns the count of each label written."""
    with open(path, "w", encoding="utf-8") as handle:
        for i, (event_id, fields, label) in enumerate(events):
            if i % 2:
                line = {"id": event_id, "label": label, "fields": fields}
            else:
                line = {"id": event_id, "label": label, **fields}
            handle.write(json.dumps(line) + "\n")
    return Counter(label for _, _, label in events)


def labels_body(events: list[tuple[str, dict[str, Any], str]], source: str) -> dict[str, Any]:
    items = [{"id": i, "label": label, "fields": fields} for i, fields, label in events]
    return {"labels": items, "source": source}


@pytest.fixture(scope="module")
def server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Server]:
    running = Server(tmp_path_factory.mktemp("cli") / "data")
    try:
        yield running
    finally:
        assert running.stop() == 0


@pytest.fixture(scope="module")
def definition(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("def") / "model.json"
    path.write_text(json.dumps(DEMO_MODEL))
    return path


def create(server: Server, name: str) -> None:
    status, body = api("POST", server.url + "/api/models", {**DEMO_MODEL, "name": name})
    assert status == 201, body


# -- models, quality, snapshots, rebuild ---------------------------------------------------


def test_models_and_quality_match_the_api(server: Server) -> None:
    create(server, "mq")
    events = listings(600, seed=1)
    status, ack = api("POST", server.url + "/api/models/mq/labels", labels_body(events, "desk"))
    assert status == 200 and ack["applied"] == 600

    listed = {m["name"]: m for m in ok_json("models", url=server.url)["models"]}
    _, model = api("GET", server.url + "/api/models/mq")
    _, quality = api("GET", server.url + "/api/models/mq/quality")
    ours = listed["mq"]
    for key in ("labelled", "mistakes", "offset", "digest", "weights_digest", "rule", "bits"):
        assert ours[key] == model[key], key
    assert ours["mistake_rate"] == quality["mistake_rate"]

    assert ok_json("quality", "mq", url=server.url) == quality
    # The confusion matrix rows are the labels sent, counted here from the data itself.
    truth = Counter(label for _, _, label in events)
    rows = quality["confusion"]["truth_by_predicted"]
    assert [sum(r) for r in rows] == [truth["fine"], truth["fraud"]]
    assert quality["by_source"] == {"desk": 600}

    table = cli("models", url=server.url)
    assert table.returncode == 0, table.stderr
    header, *lines = table.stdout.splitlines()
    assert header.split()[:5] == ["name", "classes", "rule", "bits", "labelled"]
    row = next(line.split() for line in lines if line.startswith("mq "))
    last = quality["mistake_rate"]["last_1000"]
    assert row == ["mq", "fine,fraud", "averaged", "20", "600", f"{100 * last:.2f}%", "600"]

    text = cli("quality", "mq", url=server.url)
    assert text.returncode == 0, text.stderr
    assert f"model mq: 600 labelled, {quality['mistakes']} mistakes" in text.stdout
    fine_row = next(line.split() for line in text.stdout.splitlines() if "truth fine" in line)
    assert fine_row[2:] == [f"{n:,}" for n in rows[0]]
    assert "desk" in text.stdout and "drift: statistic" in text.stdout


def test_snapshot_take_list_restore(server: Server) -> None:
    create(server, "snaps")
    first, later = listings(300, seed=2), listings(500, seed=3)[300:]
    api("POST", server.url + "/api/models/snaps/labels", labels_body(first, "desk"))
    _, before = api("GET", server.url + "/api/models/snaps")

    taken = ok_json("snapshot", "take", "snaps", url=server.url)
    assert taken["offset"] == 300 and taken["bytes"] > 0
    listed = ok_json("snapshot", "list", "snaps", url=server.url)
    _, answer = api("GET", server.url + "/api/models/snaps/snapshots")
    assert listed == answer
    assert taken["generation"] in [s["generation"] for s in listed["snapshots"]]

    api("POST", server.url + "/api/models/snaps/labels", labels_body(later, "desk"))
    _, moved = api("GET", server.url + "/api/models/snaps")
    assert moved["weights_digest"] != before["weights_digest"]

    text = cli("snapshot", "list", "snaps", url=server.url)
    assert text.returncode == 0
    rows = [line.split()[:2] for line in text.stdout.splitlines()]
    assert [str(taken["generation"]), "300"] in rows

    restored = ok_json("snapshot", "restore", "snaps", str(taken["generation"]), url=server.url)
    assert restored["weights_digest"] == before["weights_digest"]
    assert restored["labelled"] == 300 and restored["offset"] == moved["head"]
    again = cli("snapshot", "restore", "snaps", str(taken["generation"]), url=server.url)
    assert again.returncode == 0
    assert f"restored to generation {taken['generation']}" in again.stdout
    assert before["weights_digest"][:16] in again.stdout


def test_rebuild_without_a_source_equals_a_model_that_never_had_it(server: Server) -> None:
    create(server, "poisoned")
    create(server, "clean")
    good = listings(400, seed=4)
    flipped = [(f"bad-{i}", f, "fine" if lab == "fraud" else "fraud") for i, f, lab in good[:150]]
    for start in range(0, 400, 100):
        chunk = good[start : start + 100]
        api("POST", server.url + "/api/models/poisoned/labels", labels_body(chunk, "desk"))
        api("POST", server.url + "/api/models/clean/labels", labels_body(chunk, "desk"))
        bad = flipped[start // 100 * 40 : start // 100 * 40 + 40]
        api("POST", server.url + "/api/models/poisoned/labels", labels_body(bad, "spammy-feed"))
    _, clean = api("GET", server.url + "/api/models/clean")

    rebuilt = ok_json("rebuild", "poisoned", "--exclude-source", "spammy-feed", url=server.url)
    assert rebuilt["excluded_sources"] == ["spammy-feed"]
    assert rebuilt["weights_digest"] == clean["weights_digest"]
    _, answer = api("GET", server.url + "/api/models/poisoned")
    assert answer["weights_digest"] == rebuilt["weights_digest"]

    text = cli("rebuild", "poisoned", "--exclude-source", "spammy-feed", url=server.url)
    assert text.returncode == 0, text.stderr
    assert "rebuilt without spammy-feed" in text.stdout
    everyone = ok_json("rebuild", "poisoned", url=server.url)
    assert everyone["excluded_sources"] == [] and everyone["labelled"] == 400 + 150


# -- failures --------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "args",
    [
        ["quality"],
        ["snapshot"],
        ["snapshot", "restore", "m", "seven"],
        ["models", "--url", "ftp://127.0.0.1:1"],
        ["replay", "events.txt", "--model", "m"],
        ["replay", "events.jsonl", "--model", "m", "--batch", "0"],
        ["replay", "e.jsonl", "--model", "m", "--url", "http://127.0.0.1:1", "--data-dir", "d"],
        ["demo", "--rate", "-5"],
        ["frobnicate"],
    ],
)
def test_bad_usage_exits_2_with_one_line(args: list[str]) -> None:
    one_line_error(cli(*args), 2)


@pytest.mark.parametrize(
    "args", [["models"], ["quality", "m"], ["snapshot", "list", "m"], ["snapshot", "take", "m"],
             ["rebuild", "m", "--exclude-source", "x"], ["replay", "FILE", "--model", "m"]],
)  # fmt: skip
def test_unreachable_server_exits_1_with_one_line(args: list[str], tmp_path: Path) -> None:
    port = free_port()  # nothing listens there
    path = tmp_path / "one.jsonl"
    path.write_text('{"id": "a", "label": "fine", "title": "x"}\n')
    args = [str(path) if a == "FILE" else a for a in args]
    line = one_line_error(cli(*args, url=f"http://127.0.0.1:{port}"), 1)
    assert line == f"thresher: cannot reach http://127.0.0.1:{port}: connection refused"


def test_server_refusals_exit_1_with_the_reason(server: Server) -> None:
    line = one_line_error(cli("quality", "no-such-model", url=server.url), 1)
    assert "no model named 'no-such-model'" in line and "404" in line
    create(server, "refusals")
    line = one_line_error(cli("snapshot", "restore", "refusals", "99", url=server.url), 1)
    assert "no snapshot generation 99" in line


def test_token_from_the_flag_or_the_environment(tmp_path: Path) -> None:
    tokens = tmp_path / "tokens.json"
    made = cli("token", "new", "--name", "ops", "--roles", "admin", "--tokens-file", str(tokens))
    assert made.returncode == 0, made.stderr
    secret = made.stdout.strip()
    guarded = Server(tmp_path / "guarded", "--tokens-file", str(tokens))
    try:
        line = one_line_error(cli("models", url=guarded.url), 1)
        assert "401" in line  # RFC 6750: a bearer token is required
        wrong = one_line_error(cli("models", "--token", "not-the-secret", url=guarded.url), 1)
        assert "401" in wrong
        assert ok_json("models", "--token", secret, url=guarded.url) == {"models": []}
        by_env = cli(
            "models", "--json", env={"THRESHER_TOKEN": secret, "THRESHER_URL": guarded.url}
        )
        assert by_env.returncode == 0 and json.loads(by_env.stdout) == {"models": []}
    finally:
        assert guarded.stop() == 0


# -- replay ----------------------------------------------------------------------------------


def test_replay_online_and_offline_agree_and_rerun_is_all_duplicates(
    server: Server, definition: Path, tmp_path: Path
) -> None:
    events = listings(1200, seed=5, shift_at=600)
    path = tmp_path / "events.jsonl"
    written = write_jsonl(path, events)

    online = ok_json("replay", str(path), "--model", "rp", "--create", str(definition),
                     url=server.url)  # fmt: skip
    assert (online["read"], online["applied"], online["duplicates"]) == (1200, 1200, 0)
    _, model = api("GET", server.url + "/api/models/rp")
    _, quality = api("GET", server.url + "/api/models/rp/quality")
    assert model["labelled"] == 1200 and model["mistakes"] == online["mistakes"]
    assert online["weights_digest"] == model["weights_digest"]
    rows = quality["confusion"]["truth_by_predicted"]
    assert [sum(r) for r in rows] == [written["fine"], written["fraud"]]
    assert quality["by_source"] == {"replay": 1200}

    again = ok_json("replay", str(path), "--model", "rp", url=server.url)
    assert (again["applied"], again["duplicates"], again["mistakes"]) == (0, 1200, 0)
    assert again["weights_digest"] == model["weights_digest"]

    offline_dir = tmp_path / "offline"
    offline = ok_json("replay", str(path), "--model", "rp", "--create", str(definition),
                      "--data-dir", str(offline_dir))  # fmt: skip
    assert (offline["applied"], offline["mistakes"]) == (1200, online["mistakes"])
    assert offline["weights_digest"] == model["weights_digest"]
    assert offline["digest"] == model["digest"]
    rerun = ok_json("replay", str(path), "--model", "rp", "--data-dir", str(offline_dir))
    assert (rerun["applied"], rerun["duplicates"]) == (0, 1200)
    assert list((offline_dir / "models" / "rp" / "snapshots").glob("*.snap"))

    # A server started on the offline directory loads exactly that model.
    reopened = Server(offline_dir)
    try:
        _, loaded = api("GET", reopened.url + "/api/models/rp")
        assert loaded["weights_digest"] == model["weights_digest"]
        line = one_line_error(
            cli("replay", str(path), "--model", "rp", "--data-dir", str(offline_dir)), 1
        )
        assert "in use by a running thresher server" in line
    finally:
        assert reopened.stop() == 0


def test_offline_replay_with_an_applied_window_matches_a_windowed_server(
    definition: Path, tmp_path: Path
) -> None:
    path = tmp_path / "events.jsonl"
    write_jsonl(path, listings(300, seed=7))
    windowed = Server(tmp_path / "windowed", "--applied-window", "100")
    try:
        online = [ok_json("replay", str(path), "--model", "rp", "--create", str(definition),
                          url=windowed.url) for _ in range(2)]  # fmt: skip
    finally:
        assert windowed.stop() == 0
    offline_dir = str(tmp_path / "offline")
    offline = [ok_json("replay", str(path), "--model", "rp", "--create", str(definition),
                       "--data-dir", offline_dir, "--applied-window", "100")
               for _ in range(2)]  # fmt: skip
    # Ids older than the window are trained again on the second run, the same way in both.
    assert online[1]["applied"] > 0 and online[1]["duplicates"] < 300
    for a, b in zip(online, offline, strict=True):
        assert (a["applied"], a["duplicates"], a["mistakes"]) == (
            b["applied"], b["duplicates"], b["mistakes"])  # fmt: skip
        assert a["weights_digest"] == b["weights_digest"]
    line = one_line_error(cli("replay", str(path), "--model", "rp", "--applied-window", "5",
                              url="http://127.0.0.1:1"), 2)  # fmt: skip
    assert "--applied-window goes with --data-dir" in line


def test_an_interrupted_replay_resumes_to_the_same_model(
    server: Server, definition: Path, tmp_path: Path
) -> None:
    events = listings(900, seed=6)
    whole, part = tmp_path / "whole.jsonl", tmp_path / "part.jsonl"
    write_jsonl(whole, events)
    write_jsonl(part, events[:350])
    once = ok_json("replay", str(whole), "--model", "once", "--create", str(definition),
                   "--batch", "128", url=server.url)  # fmt: skip
    first = ok_json("replay", str(part), "--model", "twice", "--create", str(definition),
                    "--batch", "100", url=server.url)  # fmt: skip
    rest = ok_json("replay", str(whole), "--model", "twice", "--batch", "77", url=server.url)
    assert first["applied"] == 350 and (rest["applied"], rest["duplicates"]) == (550, 350)
    assert rest["weights_digest"] == once["weights_digest"]
    assert first["mistakes"] + rest["mistakes"] == once["mistakes"]


def test_ctrl_c_mid_replay_then_a_rerun_finishes_the_same_model(
    server: Server, definition: Path, tmp_path: Path
) -> None:
    events = listings(600, seed=9)
    # 12,000 lines (20 copies under fresh ids), so the run is still going when interrupted.
    copies = [(f"c{k}-{i}", f, label) for k in range(20) for i, f, label in events]
    path = tmp_path / "long.jsonl"
    write_jsonl(path, copies)
    env = {k: v for k, v in os.environ.items() if not k.startswith("THRESHER_")}
    command = [sys.executable, "-m", "thresher.cli", "replay", str(path), "--model", "long",
               "--create", str(definition), "--url", server.url]  # fmt: skip
    proc = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=env)  # fmt: skip
    try:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            status, model = api("GET", server.url + "/api/models/long")
            if status == 200 and model["labelled"] >= 1000:
                break
            time.sleep(0.05)
        proc.send_signal(signal.SIGINT)
        _, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 130, err
    assert "interrupted at line" in err and "Traceback" not in err
    _, partial = api("GET", server.url + "/api/models/long")
    assert 1000 <= partial["labelled"] < len(copies)

    rest = ok_json("replay", str(path), "--model", "long", url=server.url)
    assert rest["duplicates"] == partial["labelled"]
    assert rest["applied"] + rest["duplicates"] == len(copies) == rest["labelled"]
    create(server, "long-once")
    for start in range(0, len(copies), 5000):
        body = labels_body(copies[start : start + 5000], "replay")
        assert api("POST", server.url + "/api/models/long-once/labels", body)[0] == 200
    _, once = api("GET", server.url + "/api/models/long-once")
    assert rest["weights_digest"] == once["weights_digest"]
    assert rest["digest"] == once["digest"]


def test_csv_replay_reads_numbers_like_json_does(server: Server, tmp_path: Path) -> None:
    datasets = pytest.importorskip("sklearn.datasets")
    data = datasets.load_breast_cancer()
    names = [f"f{i}" for i in range(data.data.shape[1])]
    classes = [str(c) for c in data.target_names]  # ["malignant", "benign"]
    body = {"name": "cancer-csv", "classes": classes, "rule": "classic", "bits": 16,
            "features": {"fields": {n: {"kind": "numeric"} for n in names}}}  # fmt: skip
    for name in ("cancer-csv", "cancer-json"):
        assert api("POST", server.url + "/api/models", {**body, "name": name})[0] == 201
    csv_path, json_path = tmp_path / "cancer.csv", tmp_path / "cancer.jsonl"
    with open(csv_path, "w", newline="") as handle, open(json_path, "w") as lines:
        writer = csv.writer(handle)
        writer.writerow(["row", "diagnosis", *names])
        for i, (x, y) in enumerate(zip(data.data, data.target, strict=True)):
            values = [float(v) for v in x]
            writer.writerow([f"r{i}", classes[y], *(repr(v) for v in values)])
            lines.write(json.dumps({"row": f"r{i}", "diagnosis": classes[y],
                                    **dict(zip(names, values, strict=True))}) + "\n")  # fmt: skip
    flags = ["--label-field", "diagnosis", "--id-field", "row"]
    from_csv = ok_json("replay", str(csv_path), "--model", "cancer-csv", *flags, url=server.url)
    from_json = ok_json("replay", str(json_path), "--model", "cancer-json", *flags,
                        url=server.url)  # fmt: skip
    assert from_csv["applied"] == from_json["applied"] == 569  # rows of the data set
    assert from_csv["weights_digest"] == from_json["weights_digest"]
    _, quality = api("GET", server.url + "/api/models/cancer-csv/quality")
    rows = quality["confusion"]["truth_by_predicted"]
    assert [sum(r) for r in rows] == [212, 357]  # malignant, benign: the data set's counts

    text = cli("replay", str(csv_path), "--model", "cancer-csv", *flags, url=server.url)
    assert text.returncode == 0
    assert [line.split()[-1] for line in text.stdout.splitlines()[1:4]] == ["569", "0", "569"]


def test_an_invalid_line_is_reported_by_number(
    server: Server, definition: Path, tmp_path: Path
) -> None:
    events = listings(40, seed=7)
    path = tmp_path / "bad.jsonl"
    write_jsonl(path, events)
    lines = path.read_text().splitlines()
    lines[6] = json.dumps({"id": "odd-7", "label": "maybe", "title": "spare bike"})
    lines[21] = json.dumps({"id": "odd-22", "label": "fine", "fields": {"price": "cheap"}})
    lines[30] = "{this is not json"
    path.write_text("\n".join(lines) + "\n")

    stopped = cli("replay", str(path), "--model", "bad", "--create", str(definition), "--json",
                  url=server.url)  # fmt: skip
    line = one_line_error(stopped, 1)
    assert line == "thresher: line 7: label 'maybe' is not one of 'fine', 'fraud'"
    assert json.loads(stopped.stdout)["applied"] == 6  # the lines before it went in

    lines[6] = json.dumps({"id": "odd-7", "label": "fine", "title": "spare bike"})
    path.write_text("\n".join(lines) + "\n")
    for target in (["--url", server.url], ["--data-dir", str(tmp_path / "off")]):
        result = cli("replay", str(path), "--model", "bad", "--create", str(definition),
                     "--batch", "8", "--json", *target)  # fmt: skip
        line = one_line_error(result, 1)
        assert line.startswith("thresher: line 22: fields.price: a numeric field takes a number")
        assert json.loads(result.stdout)["error"]["line"] == 22

    skipped = cli("replay", str(path), "--model", "bad", "--skip-invalid", "--json",
                  url=server.url)  # fmt: skip
    assert skipped.returncode == 0, skipped.stderr
    summary = json.loads(skipped.stdout)
    assert (summary["read"], summary["invalid"]) == (40, 2)
    assert summary["applied"] + summary["duplicates"] == 38
    reported = sorted(line.split(":")[1] for line in skipped.stderr.splitlines())
    assert reported == [" skipped line 22", " skipped line 31"]


def test_events_without_ids_are_applied_on_every_run(
    server: Server, definition: Path, tmp_path: Path
) -> None:
    path = tmp_path / "anonymous.jsonl"
    with open(path, "w") as handle:
        for _, fields, label in listings(25, seed=8):
            handle.write(json.dumps({"label": label, "fields": fields}) + "\n")
    for run in (1, 2):
        summary = ok_json("replay", str(path), "--model", "anon", "--create", str(definition),
                          url=server.url)  # fmt: skip
        assert (summary["applied"], summary["without_id"], summary["labelled"]) == (
            25, 25, 25 * run)  # fmt: skip
    assert "applied again on every run" in " ".join(cli("replay", "--help").stdout.split())
