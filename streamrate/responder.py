"""Moved to :mod:`streamrate.serve.responder`; this module keeps old imports working."""

from streamrate.serve.responder import *  # noqa: F403
