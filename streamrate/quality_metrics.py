"""Moved to :mod:`streamrate.watch.quality_metrics`; this module keeps old imports working."""

from streamrate.watch.quality_metrics import *  # noqa: F403
