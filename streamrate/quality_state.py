"""Moved to :mod:`streamrate.watch.quality_state`; this module keeps old imports working."""

from streamrate.watch.quality_state import *  # noqa: F403
