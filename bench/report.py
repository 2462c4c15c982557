"""The results files: bench/results/latest.md (tables for people) and latest.json (everything)."""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

from .common import fmt


def _met(value: Any) -> str:
    return {True: "yes", False: "**no**"}.get(value, "—")


def table(rows: list[dict[str, Any]]) -> str:
    """The figures table in Markdown."""
    lines = [
        "| figure | thresher | peer / floor | ratio | target | met |",
        "|---|---:|---:|---:|---|---|",
    ]
    for item in rows:
        unit = item.get("unit", "")
        peer = fmt(item.get("peer"), unit)
        if item.get("peer_name") and item.get("peer") is not None:
            peer = f"{peer} ({item['peer_name']})"
        ratio = item.get("ratio")
        ratio_text = "—" if ratio is None or not math.isfinite(ratio) else f"{ratio:.2f}x"
        lines.append(
            f"| {item['figure']} | {fmt(item.get('value'), unit)} | {peer} | {ratio_text} | "
            f"{item.get('target') or '—'} | {_met(item.get('met'))} |"
        )
    return "\n".join(lines)


def header(machine: dict[str, Any]) -> str:
    m = machine
    return (
        f"Mode **{m['mode']}** ({m['repeats']} repeat(s) per figure, medians quoted), "
        f"{m['date']}, commit {m['commit'] or 'unknown'}.  \n"
        f"Machine: {m['cores']} cores ({m['cpu_model']}), Python {m['python']}, numpy "
        f"{m['numpy']}, scikit-learn {m['scikit_learn']}, aiohttp {m['aiohttp']}, "
        f"{m.get('wrk') or 'wrk'}.  \n"
        f"Every server under test runs in its own process pinned to CPU {m['server_cpu']}; wrk "
        f"and the bench process are pinned to CPU {m['load_cpu']} (os.sched_setaffinity). "
        "In-process figures run on CPU "
        f"{m['server_cpu']}. Rerun with `python -m bench` (`--quick` for a short pass)."
    )


def _notes(rows: list[dict[str, Any]]) -> str:
    return "\n".join(f"- **{r['figure']}**: {r['note']}" for r in rows if r.get("note"))


def _hotspots(spots: list[dict[str, Any]]) -> str:
    if not spots:
        return "No figure missed its target by enough to profile, or profiling was off."
    parts = []
    for spot in spots:
        title = f"### {spot['figure']} — {spot['shortfall']:.1f}x short of target"
        if spot.get("error"):
            parts.append(f"{title}\n\nProfiling failed: {spot['error']}")
            continue
        lines = [
            title,
            "",
            f"py-spy, {spot['samples']} samples of the `{spot['workload']}` workload.",
            "",
            "| self time | function | | total time | thresher function |",
            "|---:|---|---|---:|---|",
        ]
        own, total = spot.get("self", []), spot.get("total", [])
        for i in range(max(len(own), len(total))):
            a = own[i] if i < len(own) else ("", 0.0)
            b = total[i] if i < len(total) else ("", 0.0)
            a_share = f"{a[1]:.0%}" if a[0] else ""
            b_share = f"{b[1]:.0%}" if b[0] else ""
            lines.append(f"| {a_share} | `{a[0]}` | | {b_share} | `{b[0]}` |".replace("``", ""))
        gc = spot.get("gc")
        if gc:
            lines += [
                "",
                f"Garbage collector during the {gc['seconds']:.0f} s profiled run (p99 "
                f"{gc['p99_ms']:.1f} ms): {gc['gen2_count']} full (generation 2) collections, "
                f"longest {gc['gen2_max_ms']:.0f} ms, {gc['gen2_total_ms']:.0f} ms in all; "
                f"{gc['young_count']} young collections, longest {gc['young_max_ms']:.0f} ms, "
                f"{gc['young_total_ms']:.0f} ms in all.",
            ]
        parts.append("\n".join(lines))
    return "\n\n".join(parts)


def markdown(result: dict[str, Any]) -> str:
    return "\n\n".join(
        [
            "# thresher benchmark results",
            header(result["machine"]),
            table(result["rows"]),
            "## Notes\n\n" + _notes(result["rows"]),
            "## Hot spots of the worst misses\n\n" + _hotspots(result.get("hotspots", [])),
            f"Total bench time {result['elapsed_s']:.0f} s.\n",
        ]
    )


def write(result: dict[str, Any], directory: Path) -> tuple[Path, Path]:
    directory.mkdir(parents=True, exist_ok=True)
    md, js = directory / "latest.md", directory / "latest.json"
    md.write_text(markdown(result), encoding="utf-8")
    js.write_text(json.dumps(result, indent=2, default=str) + "\n", encoding="utf-8")
    return md, js
