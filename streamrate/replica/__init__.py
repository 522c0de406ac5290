"""Replicas: following the writer's applied log, answering from a copy of the model.

:class:`LocalReader` is the in-process reader for Python callers.
"""

from streamrate.replica.reader import Answer, BatchAnswer, LocalReader

__all__ = ["Answer", "BatchAnswer", "LocalReader"]
