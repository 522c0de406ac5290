"""Operational metrics: naming, help text, pre-initialised labels, the HTTP endpoint."""

from __future__ import annotations

import socket
import urllib.request

from prometheus_client import CollectorRegistry

from streamrate.metrics import EVENT_OUTCOMES, QUERY_KINDS, ServiceMetrics, serve_metrics


def _families(reg: CollectorRegistry) -> list:  # type: ignore[type-arg]
    return [m for m in reg.collect() if m.name.startswith("streamrate_")]


def test_names_follow_the_prometheus_conventions() -> None:
    # prometheus.io docs, "Metric and label naming" (common practice): a prefix for
    # the application, base units (seconds) as a suffix, counters ending in _total.
    reg = CollectorRegistry()
    ServiceMetrics(reg, ["duel"])
    fams = _families(reg)
    assert len(fams) >= 12
    # Besides base units: "_errors" counts like "_entries"; "_state" is an enumeration
    # (1 for the current value of its `state` label); "_up" is 1 or 0 (common practice).
    units = ("_seconds", "_entries", "_total", "_errors", "_state", "_up")
    for fam in fams:
        assert fam.documentation.strip(), fam.name
        parts = fam.name.split("_")
        assert parts[0] == "streamrate" and len(parts) >= 3, fam.name
        if fam.type == "counter":
            assert all(s.name.endswith(("_total", "_created")) for s in fam.samples), fam.name
        else:
            assert fam.name.endswith(units) or fam.name.endswith("_timestamp_seconds"), fam.name


def test_every_label_value_exists_before_the_first_event() -> None:
    reg = CollectorRegistry()
    ServiceMetrics(reg, ["duel", "squad"])
    for space in ("duel", "squad"):
        for outcome in EVENT_OUTCOMES:
            labels = {"space": space, "outcome": outcome}
            assert reg.get_sample_value("streamrate_consumer_events_total", labels) == 0.0
        for kind in QUERY_KINDS:
            labels = {"space": space, "kind": kind, "outcome": "error"}
            assert reg.get_sample_value("streamrate_query_requests_total", labels) == 0.0
        assert reg.get_sample_value("streamrate_consumer_lag_entries", {"space": space}) == 0.0


def test_http_endpoint_serves_the_injected_registry() -> None:
    reg = CollectorRegistry()
    m = ServiceMetrics(reg, ["duel"])
    m.events.labels(space="duel", outcome="applied").inc(7)
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    serve_metrics(reg, "127.0.0.1", port)
    body = urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5).read().decode()
    assert 'streamrate_consumer_events_total{outcome="applied",space="duel"} 7.0' in body
