"""The board's quality panel reads back what the service's quality metrics export."""

from __future__ import annotations

import math

from prometheus_client import CollectorRegistry, generate_latest

from streamrate.quality import MonitorSettings, QualityMonitor
from streamrate.quality_metrics import QualityMetrics
from streamrate.web.quality import read_quality


def test_read_quality_matches_the_registry() -> None:
    reg = CollectorRegistry()
    qm = QualityMetrics(reg)
    mon = QualityMonitor(MonitorSettings(recent_n=50, reference_n=50, drift_fields=("map",)))
    for i in range(120):
        for model, p in (("elo", 0.6), ("blade_chest", 0.7)):
            mon.add(
                model,
                p if i % 3 else 1 - p,
                float(i % 2),
                {"map": "saltflats" if i < 60 else "ember"},
            )
    qm.publish("duel", mon)
    qm.publish("other", mon)
    got = read_quality(generate_latest(reg).decode(), "duel")
    assert [m["model"] for m in got["models"]] == ["blade_chest", "elo"]
    for m in got["models"]:
        lbl = {"space": "duel", "model": m["model"], "window": "recent", "group": "all"}
        for field, name in (("log_loss", "streamrate_quality_log_loss"),
                            ("ece", "streamrate_quality_ece"),
                            ("slope", "streamrate_quality_calibration_slope")):  # fmt: skip
            assert m[field] == reg.get_sample_value(name, lbl)
        assert [b["bin"] for b in m["bins"]] == list(range(10))
        for b in m["bins"]:
            blbl = {**lbl, "bin": str(b["bin"])}
            n = reg.get_sample_value("streamrate_quality_bin_events", blbl)
            assert b["n"] == n
            for field, name in (("forecast", "streamrate_quality_bin_forecast_ratio"),
                                ("observed", "streamrate_quality_bin_observed_ratio")):  # fmt: skip
                want = reg.get_sample_value(name, blbl)
                assert b[field] == want if n else (b[field] is None and math.isnan(want or 0.0))
        # each model forecast two values in the recent window: two non-empty bins
        assert sum(1 for b in m["bins"] if b["n"]) == 2
        ref = {**lbl, "window": "reference"}
        assert m["reference_log_loss"] == reg.get_sample_value("streamrate_quality_log_loss", ref)
    features = {(r["model"], r["feature"]) for r in got["psi"]}
    assert ("elo", "map") in features and ("elo", "p_win") in features
    for r in got["psi"]:
        want = reg.get_sample_value(
            "streamrate_drift_psi", {"space": "duel", "model": r["model"], "feature": r["feature"]}
        )
        assert r["psi"] == want or (r["psi"] is None and math.isnan(want or math.nan))
    assert {(c["model"], c["direction"]) for c in got["change"]} == {
        (m, d) for m in ("elo", "blade_chest") for d in ("up", "down")
    }
