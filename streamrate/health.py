"""Moved to :mod:`streamrate.watch.health`; this module keeps old imports working."""

from streamrate.watch.health import *  # noqa: F403
