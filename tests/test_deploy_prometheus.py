"""The monitoring files in deploy/: checked by the real promtool, and by reading them.

The outside reference is Debian's promtool (``promtool check config``, ``check rules`` and
``test rules`` run as subprocesses); the metric names come from the contract in DEVELOPERS.md.
"""

from __future__ import annotations

import re
import subprocess
from pathlib import Path
from typing import Any

import pytest
import yaml

from conftest import require_binary
from monitoring_exprs import (
    DASHBOARD,
    PROMETHEUS_DIR,
    REPO,
    RULE_FILES,
    all_expressions,
    dashboard_expressions,
    documented_metric_names,
    load_dashboard,
    metric_names,
    model_matcher,
    recording_rule_names,
    rule_expressions,
    rules,
    substitute,
)

RULE_TESTS = sorted((PROMETHEUS_DIR / "tests").glob("*.yml"))
SEVERITIES = {"critical", "warning", "info"}


def promtool(*args: str) -> subprocess.CompletedProcess[str]:
    """Run promtool from the repository root and keep its output for the failure message."""
    binary = require_binary("promtool")
    return subprocess.run(
        [binary, *args], cwd=REPO, capture_output=True, text=True, timeout=120, check=False
    )


def assert_ok(result: subprocess.CompletedProcess[str]) -> None:
    """Fail with promtool's own words when it did not exit 0."""
    output = f"$ {' '.join(result.args)}\n{result.stdout}\n{result.stderr}"
    assert result.returncode == 0, output


# --- promtool ----------------------------------------------------------------------------


@pytest.mark.prometheus
def test_scrape_config_is_valid() -> None:
    result = promtool("check", "config", "deploy/prometheus/prometheus.yml")
    assert_ok(result)
    # check config also loads the rule files it names: both must have been found.
    assert "2 rule files found" in result.stdout + result.stderr


@pytest.mark.prometheus
@pytest.mark.parametrize("name", RULE_FILES)
def test_rule_file_is_valid(name: str) -> None:
    assert_ok(promtool("check", "rules", f"deploy/prometheus/{name}"))


@pytest.mark.prometheus
@pytest.mark.parametrize("path", RULE_TESTS, ids=[p.name for p in RULE_TESTS])
def test_rule_unit_tests_pass(path: Path) -> None:
    result = promtool("test", "rules", str(path.relative_to(REPO)))
    assert_ok(result)
    assert "SUCCESS" in result.stdout + result.stderr


@pytest.mark.prometheus
@pytest.mark.parametrize("model", [None, "listings", "ads.v2(eu)"])
def test_dashboard_expressions_parse(tmp_path: Path, model: str | None) -> None:
    """promtool's parser reads every dashboard query once its variables are filled in."""
    exprs = dashboard_expressions(model)
    rules_doc = {
        "groups": [
            {
                "name": "dashboard-parse-check",
                "rules": [
                    {"record": f"dashboard_check_{i}", "expr": expr}
                    for i, (_, expr) in enumerate(exprs)
                ],
            }
        ]
    }
    path = tmp_path / "dashboard.rules.yml"
    path.write_text(yaml.safe_dump(rules_doc, sort_keys=False), encoding="utf-8")
    result = promtool("check", "rules", str(path))
    assert_ok(result)
    assert f"SUCCESS: {len(exprs)} rules found" in result.stdout + result.stderr


# --- the rule files, read --------------------------------------------------------------


def test_every_alert_has_annotations_and_severity() -> None:
    alerts = rules("alert")
    assert len(alerts) >= 8
    for alert in alerts:
        name = alert["alert"]
        annotations = alert.get("annotations", {})
        for key in ("summary", "description", "runbook"):
            assert str(annotations.get(key, "")).strip(), f"{name} has no {key}"
        assert alert.get("labels", {}).get("severity") in SEVERITIES, name
        runbook = annotations["runbook"]
        for part in ("What it means:", "What to check:", "What to do:"):
            assert part in runbook, f"{name} runbook lacks {part!r}"
        # The runbook is the text itself, not a pointer to somewhere else.
        assert not re.search(r"https?://", runbook), name
        assert len(re.findall(r"[.!?](\s|$)", runbook)) >= 6, f"{name} runbook is too short"


def test_the_required_alerts_exist() -> None:
    names = {alert["alert"] for alert in rules("alert")}
    assert names >= {
        "ThresherMistakeRateSurge",
        "ThresherDriftAlarm",
        "ThresherLabelsStopped",
        "ThresherSnapshotStale",
        "ThresherReplicaLagging",
        "ThresherServerErrors",
        "ThresherOverloaded",
        "ThresherHashSpaceFull",
    }


def _alert_checks() -> list[dict[str, Any]]:
    checks = []
    for path in RULE_TESTS:
        doc = yaml.safe_load(path.read_text(encoding="utf-8"))
        for group in doc["tests"]:
            checks.extend(group.get("alert_rule_test", []))
    return checks


def test_every_alert_is_unit_tested_firing_and_quiet() -> None:
    checks = _alert_checks()
    for alert in rules("alert"):
        name = alert["alert"]
        mine = [c for c in checks if c["alertname"] == name]
        firing = [c for c in mine if c.get("exp_alerts")]
        quiet = [c for c in mine if not c.get("exp_alerts")]
        assert firing, f"no promtool test sees {name} fire"
        assert quiet, f"no promtool test sees {name} stay quiet"
        for check in firing:
            for expected in check["exp_alerts"]:
                assert expected["exp_labels"]["severity"] == alert["labels"]["severity"], name
                assert expected["exp_annotations"].get("summary"), name


def test_recording_rule_names_follow_level_metric_operations() -> None:
    names = recording_rule_names()
    assert len(names) >= 10
    for name in names:
        parts = name.split(":")
        assert len(parts) == 3 and all(parts), name
        assert parts[1].startswith("thresher_"), name


def test_rule_expressions_read_only_known_metrics() -> None:
    known = documented_metric_names() | recording_rule_names()
    for origin, expr in rule_expressions():
        used = metric_names(expr)
        # Only the scrape-health alert reads Prometheus' own series instead of ours.
        assert used or expr == 'up{job="thresher"} == 0', f"{origin} reads no thresher metric"
        assert used <= known, f"{origin} reads unknown {sorted(used - known)}"


# --- the dashboard, read ---------------------------------------------------------------


def test_dashboard_is_provisioning_ready() -> None:
    board = load_dashboard()
    assert board["uid"] == "thresher-overview"
    assert 36 <= board["schemaVersion"] <= 41
    variables = {v["name"]: v for v in board["templating"]["list"]}
    assert variables["datasource"]["type"] == "datasource"
    assert variables["datasource"]["query"] == "prometheus"
    model = variables["model"]
    assert model["definition"] == "label_values(thresher_labelled_total, model)"
    assert model["multi"] is True and model["includeAll"] is True
    assert model["datasource"]["uid"] == "${datasource}"
    ids = [p["id"] for p in board["panels"]]
    assert len(ids) == len(set(ids)), "panel ids repeat"


def test_dashboard_panels_do_not_overlap() -> None:
    cells: dict[tuple[int, int], str] = {}
    for panel in load_dashboard()["panels"]:
        pos = panel["gridPos"]
        assert pos["x"] + pos["w"] <= 24, panel["title"]
        for x in range(pos["x"], pos["x"] + pos["w"]):
            for y in range(pos["y"], pos["y"] + pos["h"]):
                assert (x, y) not in cells, f"{panel['title']} overlaps {cells[(x, y)]}"
                cells[(x, y)] = panel["title"]


def test_dashboard_targets_use_the_datasource_variable_and_known_metrics() -> None:
    known = documented_metric_names() | recording_rule_names()
    board = load_dashboard()
    for panel in board["panels"]:
        title = panel["title"]
        assert panel.get("targets"), f"panel {title!r} has no targets"
        assert panel["datasource"]["uid"] == "${datasource}", title
        ref_ids = [t["refId"] for t in panel["targets"]]
        assert len(ref_ids) == len(set(ref_ids)), title
        for target in panel["targets"]:
            assert target["datasource"] == {"type": "prometheus", "uid": "${datasource}"}, title
            used = metric_names(target["expr"])
            assert used, f"panel {title!r} target {target['refId']} reads no thresher metric"
            assert used <= known, f"panel {title!r} reads unknown {sorted(used - known)}"
    annotations = [a for a in board["annotations"]["list"] if "expr" in a]
    assert any("thresher_drift_alarms_total" in a["expr"] for a in annotations)
    for annotation in annotations:
        assert annotation["datasource"]["uid"] == "${datasource}"
        assert metric_names(annotation["expr"]) <= known


def test_dashboard_shows_the_required_views() -> None:
    exprs = " ".join(expr for _, expr in dashboard_expressions())
    for needle in (
        "thresher_mistake_rate",
        'error=~"false_positive|false_negative"',
        "served_minus_progressive",
        "sum by (source) (rate(thresher_labels_applied_total",
        "histogram_quantile(0.5,",
        "histogram_quantile(0.99,",
        "thresher_snapshot_timestamp_seconds",
        "thresher_replica_lag_labels",
        "thresher_hash_load_ratio",
    ):
        assert needle in exprs, needle


# --- the expression helper ---------------------------------------------------------------


def test_substitute_fills_grafana_variables() -> None:
    expr = 'rate(x{model=~"$model"}[$__rate_interval]) + y{model=~"${model}"}[$__interval]'
    assert substitute(expr) == 'rate(x{model=~".*"}[1m]) + y{model=~".*"}[15s]'
    assert substitute('m{model=~"$model"}', "listings") == 'm{model=~"listings"}'


def test_model_names_are_escaped_as_a_regex_inside_a_string() -> None:
    # RE2 needs "\." for a literal dot; the PromQL string literal doubles the backslash.
    assert model_matcher("ads.v2") == "ads\\\\.v2"
    assert model_matcher(None) == ".*"
    expr = substitute('m{model=~"$model"}', "a(b)")
    assert expr == 'm{model=~"a\\\\(b\\\\)"}'


def test_substitute_rejects_an_unknown_variable() -> None:
    with pytest.raises(ValueError, match=r"\$region"):
        substitute('m{region="$region"}')


def test_metric_names_skip_string_literals() -> None:
    expr = 'sum(rate(thresher_http_responses_total{route="/api/thresher_fake:x"}[5m]))'
    assert metric_names(expr) == {"thresher_http_responses_total"}
    assert metric_names("job:thresher_a_per_b:ratio_rate5m > 0.01") == {
        "job:thresher_a_per_b:ratio_rate5m"
    }


def test_all_expressions_lists_dashboard_and_rules() -> None:
    found = all_expressions("listings")
    origins = [origin for origin, _ in found]
    assert len(origins) == len(set(origins)), "origins repeat"
    assert sum(o.startswith("dashboard panel") for o in origins) >= 15
    assert sum(o.startswith("dashboard annotation") for o in origins) == 1
    assert sum(": record " in o for o in origins) == len(rules("record"))
    assert sum(": alert " in o for o in origins) == len(rules("alert"))
    for origin, expr in found:
        assert "$" not in expr, origin
    assert DASHBOARD.is_file()
