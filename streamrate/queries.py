"""Moved to :mod:`streamrate.serve.queries`; this module keeps old imports working."""

from streamrate.serve.queries import *  # noqa: F403
