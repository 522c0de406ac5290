"""Moved to :mod:`streamrate.watch.drift`; this module keeps old imports working."""

from streamrate.watch.drift import *  # noqa: F403
