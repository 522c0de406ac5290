"""Moved to :mod:`streamrate.serve.livefeed`; this module keeps old imports working."""

from streamrate.serve.livefeed import *  # noqa: F403
