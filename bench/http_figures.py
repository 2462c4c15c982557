"""Figures 4-6 and the p99 part of 7: thresher over HTTP against the peer and the floor.

Every server runs in its own process pinned to the server CPU; wrk (one thread, keep-alive,
32 connections) and this process run on the other CPU. Runs alternate between servers, each
preceded by a warm-up run, so a noisy neighbour hits every side alike.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from pathlib import Path
from typing import Any

from . import openloop, wrk
from .common import Mode, cpus, median, missing_row, model_body, on_cpu, row
from .servers import Server, ServerFailed, event_loop

CONNECTIONS = 32
BATCH = 100
MODEL = "bench"
SCORE = f"/api/models/{MODEL}/score"
LABELS = f"/api/models/{MODEL}/labels"
TRAIN = 2000  # labels a model learns before it is measured
SNAPSHOT_TRAIN = 5000

Case = tuple[Server, str, Path]


def bodies(tmp: Path) -> dict[str, Path]:
    """The three bodies files: one-event scores, 100-event scores, 100-label batches."""
    return {
        "score1": wrk.score_bodies(tmp / "score1.jsonl", per_request=1, lines=1000, seed=2),
        "score100": wrk.score_bodies(tmp / "score100.jsonl", per_request=BATCH, lines=40, seed=3),
        "labels100": wrk.label_bodies(tmp / "labels100.jsonl", per_request=BATCH, lines=40, seed=4),
    }


def measure_cases(
    cases: dict[str, Case], mode: Mode, cpu: dict[str, list[float]] | None = None
) -> dict[str, list[wrk.Load] | str]:
    """Each case's loads over the repeats, in alternation; a failing case keeps its reason.

    ``cpu``, when given, gets each case's server CPU microseconds per request of every measured
    run: steadier than requests per second when other work shares the machine.
    """
    out: dict[str, list[wrk.Load] | str] = {name: [] for name in cases}
    for _ in range(mode.repeats):
        for name, (server, path, body) in cases.items():
            done = out[name]
            if isinstance(done, str):
                continue
            try:
                url = server.base + path
                if mode.warmup:
                    wrk.run(url, body, connections=CONNECTIONS, seconds=mode.warmup)
                before = server.cpu_seconds()
                load = wrk.measured(url, body, connections=CONNECTIONS, seconds=mode.duration,
                                    warmup=0)  # fmt: skip
                used = server.cpu_seconds() - before
                done.append(load)
                if cpu is not None and used > 0:
                    cpu.setdefault(name, []).append(used / load.requests * 1e6)
            except wrk.LoadFailed as error:
                out[name] = f"{error}; server log: {server.log_tail(3)}"
    return out


def _stat(loads: list[wrk.Load], pick: Callable[[wrk.Load], float]) -> tuple[float, list[float]]:
    values = [pick(load) for load in loads]
    return median(values), values


def _pair_row(
    figure: str,
    got: dict[str, list[wrk.Load] | str],
    ours: str,
    theirs: str,
    pick: Callable[[wrk.Load], float],
    unit: str,
    **kwargs: Any,
) -> dict[str, Any]:
    a, b = got[ours], got[theirs]
    if isinstance(a, str) or isinstance(b, str):
        return missing_row(figure, a if isinstance(a, str) else str(b))
    value, samples = _stat(a, pick)
    peer, peer_samples = _stat(b, pick)
    return row(figure, value, unit, peer=peer, samples=samples, peer_samples=peer_samples, **kwargs)


def run(mode: Mode, tmp: Path) -> list[dict[str, Any]]:
    """Rows for figures 4, 5 and 6."""
    server_cpu, load_cpu = cpus()
    files = bodies(tmp)
    with (
        on_cpu(load_cpu),
        Server("thresher", server_cpu) as ours,
        Server("sklearn", server_cpu) as peer,
        Server("floor", server_cpu) as bare,
        Server("thresher", server_cpu, options=("--flush", "interval")) as lazy,
    ):
        for server in (ours, lazy):
            server.post("/api/models", model_body(MODEL))
            server.train(MODEL, TRAIN)
        cases: dict[str, Case] = {
            "ours1": (ours, SCORE, files["score1"]),
            "floor1": (bare, SCORE, files["score1"]),
            "peer1": (peer, SCORE, files["score1"]),
            "ours100": (ours, SCORE, files["score100"]),
            "peer100": (peer, SCORE, files["score100"]),
            "ours_labels": (ours, LABELS, files["labels100"]),
            "peer_labels": (peer, LABELS, files["labels100"]),
            "lazy_labels": (lazy, LABELS, files["labels100"]),
        }
        cpu: dict[str, list[float]] = {}
        got = measure_cases(cases, mode, cpu)
        paced = measure_paced(got, {"ours1": ours, "floor1": bare}, files["score1"], mode)
    conns = f"{CONNECTIONS} connections, keep-alive, wrk on its own CPU, servers on {event_loop()}"
    peer1 = got["peer1"]
    peer1_text = (
        f"{median([x.per_second for x in peer1]):,.0f} req/s"
        if not isinstance(peer1, str)
        else "failed"
    )
    rows = [
        _pair_row(
            "4a. HTTP one-event scoring",
            got,
            "ours1",
            "floor1",
            lambda x: x.per_second,
            "req/s",
            peer_name="bare aiohttp JSON floor",
            target=("ratio>=", 0.6),
            note=f"{conns}; the scikit-learn peer did {peer1_text}; {_cpu_note(cpu)}",
        ),
        _pair_row(
            "4b. HTTP one-event scoring p99",
            got,
            "ours1",
            "floor1",
            lambda x: x.p99_ms,
            "ms",
            peer_name="floor p99",
            target=("value<=", 5.0),
            note=_p50_note(got, "ours1", "floor1") + f"; {conns}; wrk keeps all "
            f"{CONNECTIONS} requests in flight, so mean latency is {CONNECTIONS} / throughput "
            "(Little's law) and the p99 follows 4a's requests/s; 4c measures latency below "
            "saturation",
        ),
        *paced_rows(paced),
        _pair_row(
            "5a. HTTP score, 100-event batches",
            got,
            "ours100",
            "peer100",
            lambda x: x.per_second * BATCH,
            "events/s",
            peer_name="sklearn in aiohttp",
            target=("ratio>=", 2.0),
            note=conns,
        ),
        _pair_row(
            "5b. HTTP labels, 100-label batches",
            got,
            "ours_labels",
            "peer_labels",
            lambda x: x.per_second * BATCH,
            "labels/s",
            peer_name="sklearn in aiohttp",
            target=("ratio>=", 2.0),
            note=f"thresher fsyncs before answering (flush always); the peer keeps nothing "
            f"on disk; {conns}",
        ),
    ]
    labels = got["ours_labels"]
    if isinstance(labels, str):
        rows.append(missing_row("6. labels/s, flush always, 32 connections", labels))
    else:
        value, samples = _stat(labels, lambda x: x.per_second * BATCH)
        p99 = median([x.p99_ms for x in labels])
        rows.append(
            row(
                "6. labels/s, flush always, 32 connections",
                value,
                "labels/s",
                target=("value>=", 20_000),
                note=f"{BATCH} labels per request, each with a unique id and its fields "
                f"(the runs of 5b); request p99 {p99:.1f} ms",
                samples=samples,
            )
        )
    lazy = got["lazy_labels"]
    if isinstance(lazy, str):
        rows.append(missing_row("6b. labels/s, flush interval (for comparison)", lazy))
    else:
        value, samples = _stat(lazy, lambda x: x.per_second * BATCH)
        rows.append(
            row(
                "6b. labels/s, flush interval (for comparison)",
                value,
                "labels/s",
                note="as 6 with --flush interval (fsync every 50 ms): shows how much of 6 is "
                "waiting for fsync rather than work",
                samples=samples,
            )
        )
    return rows


PACED_SHARE = 0.5  # open-loop rate: this share of thresher's closed-loop one-event capacity


def measure_paced(
    got: dict[str, list[wrk.Load] | str], servers: dict[str, Server], body: Path, mode: Mode
) -> dict[str, list[openloop.Paced]] | str:
    """Open-loop one-event runs of thresher and the floor at half thresher's capacity."""
    closed = got["ours1"]
    if isinstance(closed, str):
        return closed
    rate = PACED_SHARE * median([load.per_second for load in closed])
    out: dict[str, list[openloop.Paced]] = {name: [] for name in servers}
    try:
        for _ in range(mode.repeats):
            for name, server in servers.items():
                url = server.base + SCORE
                run = openloop.paced(
                    url, body, rate=rate, seconds=mode.duration, connections=CONNECTIONS
                )
                out[name].append(run)
    except wrk.LoadFailed as error:
        return str(error)
    return out


def paced_rows(paced: dict[str, list[openloop.Paced]] | str) -> list[dict[str, Any]]:
    """Row 4c: the p99 a client sees at a fixed rate below saturation."""
    figure = "4c. HTTP one-event scoring p99 at half load (open loop)"
    if isinstance(paced, str):
        return [missing_row(figure, paced)]
    ours, floor = paced["ours1"], paced["floor1"]
    rate = ours[0].rate
    return [
        row(
            figure,
            median([x.p99_ms for x in ours]),
            "ms",
            peer=median([x.p99_ms for x in floor]),
            peer_name="floor p99 at the same rate",
            target=("value<=", 5.0),
            note=f"{rate:,.0f} req/s offered on a fixed schedule ({PACED_SHARE:.0%} of 4a's "
            f"capacity) over {CONNECTIONS} keep-alive connections; latency is the time from "
            f"send to answer plus any wait for a free connection after the due time "
            f"(coordinated omission counted), not the client's own timer lateness "
            f"(bench/openloop.py); p50 "
            f"{median([x.p50_ms for x in ours]):.2f} ms, floor p50 "
            f"{median([x.p50_ms for x in floor]):.2f} ms; the client's own send lateness (left "
            f"out) p99 "
            f"{median([x.late_ms for x in ours]):.2f} ms",
            samples=[x.p99_ms for x in ours],
            peer_samples=[x.p99_ms for x in floor],
        )
    ]


def _cpu_note(cpu: dict[str, list[float]]) -> str:
    """Server CPU per request, thresher against the floor: what 4a's ratio is made of."""
    ours, floor = cpu.get("ours1"), cpu.get("floor1")
    if not ours or not floor:
        return "server CPU per request not measured"
    a, b = median(ours), median(floor)
    return (
        f"server CPU per request {a:.0f} µs, floor {b:.0f} µs (ratio {b / a:.2f}x, medians; "
        "steadier than req/s when other work shares the machine)"
    )


def _p50_note(got: dict[str, list[wrk.Load] | str], ours: str, theirs: str) -> str:
    a, b = got[ours], got[theirs]
    if isinstance(a, str) or isinstance(b, str):
        return "p50 not measured"
    return (
        f"p50 thresher {median([x.p50_ms for x in a]):.2f} ms, "
        f"floor {median([x.p50_ms for x in b]):.2f} ms"
    )


def snapshot_p99(mode: Mode, tmp: Path) -> list[dict[str, Any]]:
    """Figure 7c: scoring p99 at bits=24 while snapshots are taken in a loop, and without."""
    figure = "7c. scoring p99 during snapshots, bits=24"
    server_cpu, load_cpu = cpus()
    # Without ids: a filling event cache slows every later run (its garbage-collection pauses
    # grow, see the hot spots of 4b), which would skew quiet runs against busy ones.
    body = wrk.score_bodies(tmp / "snap-score1.jsonl", per_request=1, lines=1000, seed=5, ids=False)
    url_path = SCORE
    quiet: list[wrk.Load] = []
    busy: list[wrk.Load] = []
    taken: list[int] = []
    options = ("--snapshot-interval", "0", "--snapshot-every", "0")
    try:
        with on_cpu(load_cpu), Server("thresher", server_cpu, options=options) as ours:
            ours.post("/api/models", model_body(MODEL, bits=24))
            ours.train(MODEL, SNAPSHOT_TRAIN)
            ours.post(f"/api/models/{MODEL}/snapshots", {})
            url = ours.base + url_path
            for repeat in range(mode.repeats):
                # Alternate which run goes first, so drift over time favours neither side.
                for snapshotting in (False, True) if repeat % 2 == 0 else (True, False):
                    if not snapshotting:
                        quiet.append(
                            wrk.measured(url, body, connections=CONNECTIONS,
                                         seconds=mode.duration, warmup=mode.warmup)
                        )  # fmt: skip
                        continue
                    busy.append(_during_snapshots(ours, url, body, mode, taken))
    except (ServerFailed, wrk.LoadFailed) as error:
        return [missing_row(figure, str(error))]
    if any(load.errors for load in busy):
        errors = sum(load.errors for load in busy)
        return [missing_row(figure, f"{errors} scoring requests failed during snapshots")]
    with_p99, with_samples = _stat(busy, lambda x: x.p99_ms)
    without_p99, without_samples = _stat(quiet, lambda x: x.p99_ms)
    return [
        row(
            figure,
            with_p99,
            "ms",
            peer=without_p99,
            peer_name="p99 without snapshots",
            target=("ratio<=", 3.0),
            note=f"one-event scoring without ids, {CONNECTIONS} connections, model trained on "
            f"{SNAPSHOT_TRAIN} labels; POST /snapshots back to back, {median(taken):.0f} "
            f"snapshots per {mode.duration} s run",
            samples=with_samples,
            peer_samples=without_samples,
        )
    ]


def _during_snapshots(
    server: Server, url: str, body: Path, mode: Mode, taken: list[int]
) -> wrk.Load:
    """A warm-up run, then a measured one while a thread posts snapshots back to back."""
    wrk.run(url, body, connections=CONNECTIONS, seconds=mode.warmup)
    stop = threading.Event()
    count = [0]
    looper = threading.Thread(target=_snapshot_loop, args=(server, stop, count))
    looper.start()
    try:
        return wrk.run(url, body, connections=CONNECTIONS, seconds=mode.duration)
    finally:
        stop.set()
        looper.join()
        taken.append(count[0])


def _snapshot_loop(server: Server, stop: threading.Event, count: list[int]) -> None:
    while not stop.is_set():
        server.post(f"/api/models/{MODEL}/snapshots", {})
        count[0] += 1
