"""Check the exported per-bin reliability gauges against a batch reliability curve."""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt
import pytest
from prometheus_client import CollectorRegistry

from streamrate.calibration import ECE_BINS, bin_index, reliability_curve

BIN_METRICS = (
    "streamrate_quality_bin_forecast_ratio",
    "streamrate_quality_bin_observed_ratio",
    "streamrate_quality_bin_events",
)


def exported_bins(reg: CollectorRegistry, labels: dict[str, str]) -> list[tuple[float, ...]]:
    """``(forecast, observed, events)`` of bins "0".."9" as exported (each must exist)."""
    rows = []
    for i in range(ECE_BINS):
        lbl = {**labels, "bin": str(i)}
        got = [reg.get_sample_value(name, lbl) for name in BIN_METRICS]
        assert all(v is not None for v in got), f"bin {i} of {labels} not exported"
        rows.append(tuple(float(v) for v in got if v is not None))
    return rows


def assert_bins_equal_batch(
    reg: CollectorRegistry, labels: dict[str, str], p: npt.ArrayLike, y: npt.ArrayLike
) -> None:
    """The ten bins exported under ``labels`` equal :func:`reliability_curve` of ``(p, y)``:
    the non-empty bins, in order, carry its means and counts; the others 0 events and NaN."""
    rows = exported_bins(reg, labels)
    curve = reliability_curve(p, y)
    full = sorted(set(bin_index(p).tolist()))  # which bins the curve's entries belong to
    assert [i for i, r in enumerate(rows) if r[2] > 0] == full
    for k, i in enumerate(full):
        fc, ob, n = rows[i]
        assert fc == pytest.approx(curve.mean_forecast[k], rel=1e-12, abs=1e-15)
        assert ob == pytest.approx(curve.mean_outcome[k], rel=1e-12, abs=1e-15)
        assert n == curve.count[k]
        assert i / ECE_BINS - 1e-12 <= fc <= (i + 1) / ECE_BINS + 1e-12  # inside its own bin
    for i, (fc, ob, n) in enumerate(rows):
        if i not in full:
            assert n == 0 and math.isnan(fc) and math.isnan(ob)
    assert sum(r[2] for r in rows) == np.asarray(p).size
