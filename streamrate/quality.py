"""Moved to :mod:`streamrate.watch.quality`; this module keeps old imports working."""

from streamrate.watch.quality import *  # noqa: F403
