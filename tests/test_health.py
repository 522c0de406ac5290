"""``streamrate health``: verdicts from a metrics page, a live endpoint and a checkpoint."""

from __future__ import annotations

import math
import socket
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
from prometheus_client import CollectorRegistry, generate_latest, start_http_server
from typer.testing import CliRunner

from streamrate.calibration import sigmoid
from streamrate.checkpoint import Checkpoint, encode_checkpoint
from streamrate.cli import app
from streamrate.dedupe import SeenIds
from streamrate.events import MatchEvent
from streamrate.health import BAD, NA, OK, WATCH, fetch_metrics, from_checkpoint, from_metrics_text
from streamrate.metrics import ServiceMetrics
from streamrate.models.elo import Elo
from streamrate.quality import MonitorSettings, QualityMonitor
from streamrate.quality_metrics import QualityMetrics

NOW = 1_800_000_000.0


def _registry() -> CollectorRegistry:
    """duel: healthy. trio: lagging, dead-lettering, stale checkpoint, over-confident."""
    reg = CollectorRegistry()
    sm = ServiceMetrics(reg, spaces=["duel", "trio"])
    qm = QualityMetrics(reg)
    for space, lag, dead, age_s, errors in (("duel", 3, 2, 30, 0), ("trio", 50_000, 80, 4000, 9)):
        sm.lag.labels(space=space).set(lag)
        sm.events.labels(space=space, outcome="applied").inc(2000)
        sm.events.labels(space=space, outcome="dead_lettered").inc(dead)
        sm.checkpoint_time.labels(space=space).set(NOW - age_s)
        sm.queries.labels(space=space, kind="pairing", outcome="ok").inc(100)
        sm.queries.labels(space=space, kind="pairing", outcome="error").inc(errors)
    rng = np.random.default_rng(0)
    for space, scale in (("duel", 1.0), ("trio", 3.0)):
        mon = QualityMonitor(MonitorSettings(recent_n=1000, reference_n=1000))
        z = rng.normal(0, 1.2, 2000)
        y = (rng.random(2000) < sigmoid(z)).astype(float)
        for p, outcome in zip(sigmoid(scale * z), y, strict=True):
            mon.add("elo", float(p), float(outcome), {})
        qm.publish(space, mon)
    return reg


def _verdicts(lines: list) -> dict[tuple[str, str], str]:
    return {(x.space, x.what): x.verdict for x in lines}


def test_verdicts_from_a_metrics_page() -> None:
    lines = from_metrics_text(generate_latest(_registry()).decode(), now_s=NOW)
    v = _verdicts(lines)
    assert v[("duel", "consumer lag")] == OK and v[("trio", "consumer lag")] == BAD
    assert v[("duel", "dead-lettered share")] == OK  # 2 of 2002
    assert v[("trio", "dead-lettered share")] == BAD  # 80 of 2080
    assert v[("duel", "checkpoint age")] == OK and v[("trio", "checkpoint age")] == BAD
    assert v[("duel", "query error share")] == OK and v[("trio", "query error share")] == BAD
    assert v[("duel", "elo ECE")] == OK and v[("trio", "elo ECE")] == BAD
    assert v[("duel", "elo calibration slope")] == OK
    assert v[("trio", "elo calibration slope")] == WATCH  # about 1/3
    assert v[("duel", "elo log loss")] == OK
    assert v[("duel", "elo PSI p_win")] in (OK, WATCH)
    by_key = {(x.space, x.what): x for x in lines}
    assert by_key[("trio", "dead-lettered share")].value == pytest.approx(80 / 2080)
    assert by_key[("duel", "checkpoint age")].value == pytest.approx(30)


def test_a_window_with_few_events_is_not_judged() -> None:
    reg = CollectorRegistry()
    mon = QualityMonitor(MonitorSettings(recent_n=1000))
    for i in range(50):
        mon.add("elo", 0.99, float(i % 2))  # terrible, but only 50 events
    QualityMetrics(reg).publish("duel", mon)
    v = _verdicts(from_metrics_text(generate_latest(reg).decode(), now_s=NOW))
    assert v[("duel", "elo ECE")] == NA and v[("duel", "elo log loss")] == NA


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def test_reads_a_live_metrics_endpoint_on_loopback() -> None:
    port = _free_port()
    server, thread = start_http_server(port, addr="127.0.0.1", registry=_registry())
    try:
        text = fetch_metrics(f"http://127.0.0.1:{port}/metrics")
    finally:
        server.shutdown()
        thread.join(5)
    assert _verdicts(from_metrics_text(text, now_s=NOW))[("trio", "consumer lag")] == BAD


def _checkpoint_file(tmp_path: Path, written_at_s: float, dead: int) -> Path:
    model = Elo()
    t0 = datetime(2026, 3, 1, tzinfo=UTC)
    names = ["kelvash", "morvenn", "tuvrenn", "oskuvar", "bravik", "vantor"]
    for i in range(30):
        model.learn(
            MatchEvent(
                match_id=f"q-{i}",
                finished_at=t0 + timedelta(minutes=i),
                first=(names[i % 6],),
                second=(names[(i + 1) % 6],),
                score=float(i % 2),
            )
        )
    ck = Checkpoint(
        model.to_state(), "1700-0", 30, SeenIds(100, 3600.0),
        {"applied": 30, "dead_lettered": dead, "duplicate": 0}, written_at_s,
    )  # fmt: skip
    path = tmp_path / "duel.ckpt.npz"
    path.write_bytes(encode_checkpoint(ck))
    return path


def test_verdicts_from_a_checkpoint(tmp_path: Path) -> None:
    path = _checkpoint_file(tmp_path, NOW - 60, dead=0)
    lines = from_checkpoint(path, now_s=NOW)
    v = _verdicts(lines)
    assert v[("duel", "model elo")] == OK and v[("duel", "checkpoint age")] == OK
    values = {x.what: x.value for x in lines}
    assert values["entities known"] == 6 and values["model elo"] == 30
    stale = _verdicts(from_checkpoint(_checkpoint_file(tmp_path, NOW - 5000, 3), now_s=NOW))
    assert stale[("duel", "checkpoint age")] == WATCH  # maybe just an idle stream
    assert stale[("duel", "dead-lettered share")] == BAD  # 3 of 33


def test_cli_health_from_checkpoint_writes_plot_and_exit_codes(tmp_path: Path) -> None:
    path = _checkpoint_file(tmp_path, NOW - 60, dead=0)
    png = tmp_path / "health.png"
    runner = CliRunner()
    ok = runner.invoke(app, ["health", "--checkpoint", str(path), "--plot", str(png)])
    assert ok.exit_code == 0, ok.output
    assert "dead-lettered share" in ok.output
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    bad = runner.invoke(app, ["health", "--checkpoint", str(_checkpoint_file(tmp_path, NOW, 9))])
    assert bad.exit_code == 1
    gone = runner.invoke(app, ["health", "--url", f"http://127.0.0.1:{_free_port()}/metrics"])
    assert gone.exit_code == 2 and "cannot read metrics" in gone.output


def test_nan_values_are_not_judged() -> None:
    text = (
        "# TYPE streamrate_drift_psi gauge\n"
        'streamrate_drift_psi{space="duel",model="elo",feature="map"} NaN\n'
    )
    (line,) = from_metrics_text(text, now_s=NOW)
    assert math.isnan(line.value) and line.verdict == NA
