"""Monitoring a live model: how good its probabilities are and whether the world moved.

``quality`` (rolling log loss, Brier, calibration per window and group),
``quality_state`` (their part of the checkpoint), ``drift`` (PSI, the
Page-Hinkley change detector), ``quality_metrics`` (their Prometheus gauges,
the observer the writer calls) and ``health`` (the report read back from the
metrics page or a checkpoint).
"""
