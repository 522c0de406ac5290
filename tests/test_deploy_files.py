"""Deployment files checked by their own tools: the systemd unit, the runbook per alert."""

from __future__ import annotations

import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

ROOT = Path(__file__).resolve().parents[1]
UNIT = ROOT / "deploy" / "systemd" / "streamrate@.service"
ALERTS = ROOT / "deploy" / "prometheus" / "streamrate-alerts.yml"
INSTALL_PYTHON = "/opt/streamrate/venv/bin/python"


def unit_lines(path: Path = UNIT) -> dict[str, list[str]]:
    """``Key=value`` lines of a unit by key (a key may repeat), comments left out."""
    out: dict[str, list[str]] = {}
    for line in path.read_text().splitlines():
        if line.strip() and not line.startswith(("#", ";", "[")):
            key, _, value = line.partition("=")
            out.setdefault(key.strip(), []).append(value.strip())
    return out


def test_systemd_analyze_verifies_the_unit(tmp_path: Path) -> None:
    tool = shutil.which("systemd-analyze")
    if tool is None:
        pytest.skip("systemd-analyze is not installed (apt-get install systemd)")
    # The unit names the install's interpreter, which this machine does not have:
    # point it at ours, change nothing else.
    unit = tmp_path / "streamrate@duel.service"
    unit.write_text(UNIT.read_text().replace(INSTALL_PYTHON, sys.executable))
    res = subprocess.run([tool, "verify", str(unit)], capture_output=True, text=True, timeout=60)
    assert res.returncode == 0 and "streamrate@duel" not in res.stderr, res.stderr
    # ... and verify does fail on a broken unit (so the check above can fail).
    broken = tmp_path / "streamrate@bad.service"
    broken.write_text(unit.read_text().replace("Restart=on-failure", "Restart=sometimes"))
    bad = subprocess.run([tool, "verify", str(broken)], capture_output=True, text=True, timeout=60)
    assert "sometimes" in bad.stderr


def test_the_unit_runs_unprivileged_from_a_read_only_install() -> None:
    u = unit_lines()
    assert u["User"] == ["streamrate"] and u["Restart"] == ["on-failure"]
    assert u["ProtectSystem"] == ["strict"] and u["NoNewPrivileges"] == ["yes"]
    env = dict(e.split("=", 1) for e in u["Environment"])
    assert env["NUMBA_CACHE_DIR"].startswith("/var/cache/streamrate")
    assert u["CacheDirectory"] == ["streamrate"] and u["StateDirectory"] == ["streamrate"]
    assert "redis.password_file=%d/redis-password" in u["ExecStart"][0]
    assert u["LoadCredential"] == ["redis-password:/etc/streamrate/redis-password"]
    assert u["RestartPreventExitStatus"] == ["2"]  # refused settings: restarting cannot help


def _runbook() -> dict[str, str]:
    """README's runbook: section title -> text, for the ### sections under '## Runbook'."""
    text = (ROOT / "README.md").read_text()
    start = text.index("\n## Runbook")
    end = text.find("\n## ", start + 1)
    body = text[start : end if end > 0 else None]
    parts = re.split(r"\n### ", body)[1:]
    return {p.split("\n", 1)[0].strip(): p.split("\n", 1)[1] for p in parts}


def test_every_alert_has_a_runbook_section_saying_what_it_means_and_what_to_do() -> None:
    rules = yaml.safe_load(ALERTS.read_text())
    alerts = [r["alert"] for g in rules["groups"] for r in g["rules"] if "alert" in r]
    assert len(alerts) >= 15
    book = _runbook()
    missing = [a for a in alerts if a not in book]
    assert not missing, f"no runbook section for {missing}"
    for name in alerts:
        assert "**Means:**" in book[name] and "**Do:**" in book[name], name
    assert set(book) <= set(alerts), "a runbook section names no alert"
