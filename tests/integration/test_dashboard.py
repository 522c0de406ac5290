"""Every query of deploy/dashboards/streamrate.json names only exported metrics and labels.

Checked against a live scrape of a running service (real redis-server,
in-process Service with its metrics endpoint on a free port). A histogram's
``_bucket``/``_sum``/``_count`` series count as exported; ``le`` is a label of
the buckets.
"""

from __future__ import annotations

import json
import re
import threading
import urllib.request
from pathlib import Path

import pytest
from prometheus_client import CollectorRegistry
from prometheus_client.parser import text_string_to_metric_families

from streamrate.client import send_events
from streamrate.config import (
    CheckpointSettings,
    MetricsSettings,
    QualitySettings,
    RedisSettings,
    Settings,
    SpaceSettings,
)
from streamrate.service import Service, redis_factory

from .conftest import RedisServer, free_port
from .helpers import wait_for, world_lines

pytestmark = pytest.mark.integration
DASHBOARD = Path(__file__).resolve().parents[2] / "deploy" / "dashboards" / "streamrate.json"
FUNCTIONS = {"sum", "rate", "histogram_quantile", "time", "label_values", "increase", "avg"}
KEYWORDS = {"by", "on", "without", "ignoring", "and", "or", "unless", "group_left", "bool"}


def exprs(doc: object) -> list[str]:
    """Every ``expr`` (and templating query) in the dashboard, wherever it sits."""
    found: list[str] = []
    if isinstance(doc, dict):
        for key, value in doc.items():
            if key in ("expr", "definition") and isinstance(value, str):
                found.append(value)
            else:
                found += exprs(value)
    elif isinstance(doc, list):
        for value in doc:
            found += exprs(value)
    return found


def names_in(expr: str) -> tuple[set[str], set[str]]:
    """(metric names, label names) used by a PromQL expression."""
    text = re.sub(r'"[^"]*"', '""', expr)  # label values and strings
    text = re.sub(r"\[[^\]]*\]", "", text)  # range selectors
    labels: set[str] = set()
    for group in re.findall(r"\{([^}]*)\}", text):
        labels |= set(re.findall(r"([A-Za-z_][A-Za-z0-9_]*)\s*(?:=~|!~|!=|=)", group))
    for group in re.findall(r"\b(?:by|on|without|ignoring)\s*\(([^)]*)\)", text):
        labels |= {x.strip() for x in group.split(",") if x.strip()}
    bare = re.sub(r"\{[^}]*\}", "", text)
    bare = re.sub(r"\b(?:by|on|without|ignoring)\s*\([^)]*\)", "", bare)
    words = set(re.findall(r"\b([A-Za-z_][A-Za-z0-9_:]*)\b", bare))
    metrics = {w for w in words if w not in FUNCTIONS | KEYWORDS}
    # label_values(metric, label): its second argument is a label
    for _metric, label in re.findall(r"label_values\((\w+),\s*(\w+)\)", expr):
        metrics.discard(label)
        labels.add(label)
    return metrics, labels


def test_the_parser_sees_metrics_and_labels() -> None:
    m, lab = names_in('sum by (space, le) (rate(x_bucket{space=~"$space", a="b"}[5m]))')
    assert m == {"x_bucket"} and lab == {"space", "le", "a"}


def test_every_dashboard_query_names_exported_metrics_and_labels(
    redis_server: RedisServer, tmp_path: Path
) -> None:
    port = free_port()
    space = SpaceSettings(
        name="duel", model="elo", batch_count=50, block_ms=20,
        quality=QualitySettings(recent_events=50, reference_events=50, drift_fields=("map",),
                                publish_every_s=0.0),
    )  # fmt: skip
    settings = Settings(
        redis=RedisSettings(url=redis_server.url),
        checkpoint=CheckpointSettings(dir=tmp_path / "ckpt"),
        metrics=MetricsSettings(enabled=True, port=port),
        spaces=(space,),
    )
    svc = Service(settings, redis_factory(settings.redis), CollectorRegistry())
    stop = threading.Event()
    svc.start(stop)
    try:
        lines, events, _ = world_lines(300, seed=5)
        send_events(redis_server.client(), "{sr:duel}:events", lines)
        live = svc.spaces[0].consumer.live
        wait_for(lambda: live.applied == len(events), 60, "events applied")
        body = urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5).read()
    finally:
        stop.set()
        svc.join()
    exported: dict[str, set[str]] = {}
    for fam in text_string_to_metric_families(body.decode()):
        for s in fam.samples:
            exported.setdefault(s.name, set()).update(s.labels)
    queries = exprs(json.loads(DASHBOARD.read_text()))
    assert len(queries) >= 10
    for q in queries:
        metrics, labels = names_in(q)
        assert metrics, q
        for metric in metrics:
            assert metric in exported, f"{metric} (in {q}) is not exported"
        known = set().union(*(exported[m] for m in metrics))
        assert labels <= known, f"labels {labels - known} of {q} are not exported"
