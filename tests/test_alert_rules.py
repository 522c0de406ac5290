"""The Prometheus alerting rules: valid for the real promtool, unit-tested, and naming
only metrics that the service really exports."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from pathlib import Path
from typing import Any

import pytest
import yaml
from prometheus_client import CollectorRegistry

from streamrate import health
from streamrate.metrics import ServiceMetrics
from streamrate.quality import MonitorSettings, QualityMonitor
from streamrate.quality_metrics import QualityMetrics

PROM_DIR = Path(__file__).resolve().parent.parent / "deploy" / "prometheus"
RULES = PROM_DIR / "streamrate-alerts.yml"
RULE_TESTS = sorted((PROM_DIR / "tests").glob("*.yml"))


def _promtool() -> str:
    path = shutil.which("promtool")
    if path is None:
        if os.environ.get("CI"):
            pytest.fail("promtool is missing on CI; .ci/run installs Debian's prometheus package")
        pytest.skip("promtool not installed (apt-get install prometheus)")
    return path


def _run(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [_promtool(), *args], cwd=PROM_DIR, capture_output=True, text=True, timeout=120
    )


def _alerts() -> dict[str, dict[str, Any]]:
    doc = yaml.safe_load(RULES.read_text(encoding="utf-8"))
    return {r["alert"]: r for g in doc["groups"] for r in g["rules"] if "alert" in r}


def test_rules_pass_promtool_check() -> None:
    out = _run("check", "rules", RULES.name)
    assert out.returncode == 0, out.stdout + out.stderr
    assert f"SUCCESS: {len(_alerts())} rules found" in out.stdout


def test_prometheus_config_passes_promtool_check() -> None:
    out = _run("check", "config", "prometheus.yml")
    assert out.returncode == 0, out.stdout + out.stderr


def test_rule_unit_tests_pass_promtool() -> None:
    assert RULE_TESTS, "no promtool unit tests found"
    out = _run("test", "rules", *(str(p.relative_to(PROM_DIR)) for p in RULE_TESTS))
    assert out.returncode == 0, out.stdout + out.stderr


def test_every_alert_is_tested_firing_and_not_firing() -> None:
    firing: set[str] = set()
    quiet: set[str] = set()
    for path in RULE_TESTS:
        for case in yaml.safe_load(path.read_text(encoding="utf-8"))["tests"]:
            for check in case.get("alert_rule_test", []):
                (firing if check.get("exp_alerts") else quiet).add(check["alertname"])
    alerts = set(_alerts())
    assert alerts - firing == set(), "alerts never tested firing"
    assert alerts - quiet == set(), "alerts never tested quiet"


def test_every_alert_explains_itself() -> None:
    for name, rule in _alerts().items():
        assert rule["labels"]["severity"] in {"warning", "critical"}, name
        assert rule["annotations"]["summary"] and rule["annotations"]["description"], name


def _exported_names() -> set[str]:
    """Every sample name the service's two metric sets can export."""
    reg = CollectorRegistry()
    ServiceMetrics(reg, spaces=["duel"])
    qm = QualityMetrics(reg)
    mon = QualityMonitor(MonitorSettings(recent_n=2, reference_n=2))
    for y in (1.0, 0.0, 1.0, 1.0, 0.0):
        mon.add("elo", 0.6, y)
    qm.publish("duel", mon)
    suffixes = {"counter": ("_total",), "histogram": ("_bucket", "_sum", "_count"), "gauge": ("",)}
    names = set()
    for family in reg.collect():
        for s in suffixes.get(family.type, ("",)):
            names.add(family.name + s)
    return names


def test_rules_and_rule_tests_use_only_exported_metric_names() -> None:
    exported = _exported_names()
    used = set()
    for rule in _alerts().values():
        used |= set(re.findall(r"\bstreamrate_[a-z_]+", rule["expr"]))
    for path in RULE_TESTS:
        for case in yaml.safe_load(path.read_text(encoding="utf-8"))["tests"]:
            for series in case.get("input_series", []):
                used |= set(re.findall(r"^streamrate_[a-z_]+", series["series"]))
    assert used, "no metric names found in the rules"
    assert used - exported == set(), "rules name metrics the service does not export"


def test_health_report_uses_the_alert_levels() -> None:
    # `streamrate health` marks a line "bad" at the level where the matching alert
    # fires; both must move together.
    levels = {
        "StreamrateCalibrationDegraded": health.ECE_ALERT,
        "StreamrateLogLossAboveCoinFlip": health.LOG_LOSS_ALERT,
        "StreamrateDistributionDrift": health.PSI_MAJOR,
        "StreamrateConsumerLagging": health.LAG_ALERT_ENTRIES,
        "StreamrateDeadLetterRateHigh": health.DEAD_LETTER_ALERT_SHARE,
        "StreamrateCheckpointTooOld": health.CHECKPOINT_ALERT_AGE_S,
        "StreamrateQueryErrors": health.QUERY_ERROR_ALERT_SHARE,
        "StreamrateConsumerFailing": health.LOOP_ERROR_STREAK_ALERT,
    }
    alerts = _alerts()
    for name, level in levels.items():
        first = re.search(r">\s*([0-9.]+)", alerts[name]["expr"])
        assert first is not None, name
        assert float(first.group(1)) == pytest.approx(level), name
    guard = re.search(r"window_events >= (\d+)", alerts["StreamrateCalibrationDegraded"]["expr"])
    assert guard is not None and int(guard.group(1)) == health.MIN_WINDOW_EVENTS
