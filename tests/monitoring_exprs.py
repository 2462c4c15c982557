"""Every PromQL expression shipped in deploy/: the Grafana dashboard's and the rule files'.

Tests import this to check the expressions statically (names, parse) and to run each one
through a real Prometheus server's query API. Dashboard variables are filled in the way
Grafana would: ``$model`` becomes ``.*`` (the "All" value) or one escaped model name,
``$__rate_interval`` becomes ``1m`` and ``$__interval`` ``15s``.
"""

from __future__ import annotations

import json
import re
from pathlib import Path
from typing import Any

import yaml

REPO = Path(__file__).resolve().parent.parent
PROMETHEUS_DIR = REPO / "deploy" / "prometheus"
DASHBOARD = REPO / "deploy" / "grafana" / "thresher-dashboard.json"
RULE_FILES = ("thresher-recording.rules.yml", "thresher-alerts.rules.yml")

# Grafana's built-in interval variables, at the values a 15s scrape gives them.
FIXED_VARIABLES = {"__rate_interval": "1m", "__interval": "15s", "__range": "1h"}
# $name, ${name}, ${name:format} and the old [[name]] form.
_VARIABLE = re.compile(r"\$\{(\w+)(?::\w+)?\}|\$(\w+)|\[\[(\w+)\]\]")
_REGEX_META = re.compile(r"([\\.^$|?*+()\[\]{}])")
_STRING = re.compile(r'"(?:[^"\\]|\\.)*"|\'(?:[^\'\\]|\\.)*\'|`[^`]*`')
# A metric name of ours (thresher_...) or a recorded one (it holds a colon).
_METRIC = re.compile(r"(?<![\w:])(thresher_\w+|[A-Za-z_]\w*:[\w:]+)")


def load_rule_groups(name: str) -> list[dict[str, Any]]:
    """The ``groups`` of one rule file in deploy/prometheus."""
    data = yaml.safe_load((PROMETHEUS_DIR / name).read_text(encoding="utf-8"))
    return list(data["groups"])


def rules(kind: str) -> list[dict[str, Any]]:
    """Every rule of one kind (``record`` or ``alert``) across both rule files."""
    found = []
    for name in RULE_FILES:
        for group in load_rule_groups(name):
            found.extend(rule for rule in group["rules"] if kind in rule)
    return found


def recording_rule_names() -> set[str]:
    """The names of every recorded series."""
    return {rule["record"] for rule in rules("record")}


def load_dashboard() -> dict[str, Any]:
    """The provisioned dashboard, parsed."""
    return dict(json.loads(DASHBOARD.read_text(encoding="utf-8")))


def model_matcher(model: str | None) -> str:
    """What Grafana puts for ``$model`` inside ``=~"..."``: All, or one name regex-escaped."""
    if model is None:
        return ".*"
    escaped = _REGEX_META.sub(r"\\\1", model)
    # The regex sits inside a double-quoted PromQL string, whose own escapes come on top.
    return escaped.replace("\\", "\\\\").replace('"', '\\"')


def substitute(expr: str, model: str | None = None) -> str:
    """Fill the dashboard variables in one expression; unknown variables are an error."""
    values = dict(FIXED_VARIABLES, model=model_matcher(model))

    def fill(match: re.Match[str]) -> str:
        name = match.group(1) or match.group(2) or match.group(3)
        if name not in values:
            raise ValueError(f"unknown dashboard variable ${name} in {expr!r}")
        return values[name]

    return _VARIABLE.sub(fill, expr)


def dashboard_expressions(model: str | None = None) -> list[tuple[str, str]]:
    """(origin, expr) for every panel target, annotation and query variable of the dashboard."""
    board = load_dashboard()
    found: list[tuple[str, str]] = []
    for panel in board.get("panels", []):
        for target in panel.get("targets", []):
            origin = f"dashboard panel {panel['title']!r} target {target['refId']}"
            found.append((origin, substitute(target["expr"], model)))
    for annotation in board.get("annotations", {}).get("list", []):
        if "expr" in annotation:
            origin = f"dashboard annotation {annotation['name']!r}"
            found.append((origin, substitute(annotation["expr"], model)))
    for variable in board.get("templating", {}).get("list", []):
        if variable.get("type") != "query":
            continue
        # label_values(metric, label) is Grafana's, not PromQL; this asks Prometheus the same.
        match = re.fullmatch(r"label_values\((\w+),\s*(\w+)\)", variable["definition"])
        if match is None:
            raise ValueError(f"variable {variable['name']} has an unexpected query")
        metric, label = match.groups()
        found.append((f"dashboard variable {variable['name']!r}", f"count by ({label}) ({metric})"))
    return found


def rule_expressions() -> list[tuple[str, str]]:
    """(origin, expr) for every recording and alert rule, in file order."""
    found: list[tuple[str, str]] = []
    for name in RULE_FILES:
        for group in load_rule_groups(name):
            for rule in group["rules"]:
                label = f"record {rule['record']}" if "record" in rule else f"alert {rule['alert']}"
                found.append((f"{name}: {label}", str(rule["expr"]).strip()))
    return found


def all_expressions(model: str | None = None) -> list[tuple[str, str]]:
    """Every PromQL expression in deploy/ as (origin, expr); ``model`` picks one model."""
    return dashboard_expressions(model) + rule_expressions()


def metric_names(expr: str) -> set[str]:
    """The thresher_* and recorded (colon) metric names an expression reads."""
    without_strings = _STRING.sub('""', expr)
    return set(_METRIC.findall(without_strings))


def documented_metric_names(developers_md: Path = REPO / "DEVELOPERS.md") -> set[str]:
    """Metric names listed under "Metric names" in DEVELOPERS.md, with histogram series."""
    text = developers_md.read_text(encoding="utf-8")
    match = re.search(r"^## Metric names.*?(?=^## )", text, flags=re.S | re.M)
    if match is None:
        raise ValueError(f"{developers_md} has no '## Metric names' section")
    section = match.group(0)
    names = set(re.findall(r"`(thresher_\w+)`", section))
    for histogram in re.findall(r"`(thresher_\w+)`\s*\(histogram", section):
        names |= {f"{histogram}_bucket", f"{histogram}_sum", f"{histogram}_count"}
    return names
