"""The query side: answering questions about a live model.

``queries`` (the request/reply protocol, its JSON Schema, lobby splits),
``livefeed`` (the watch list and live messages) and ``responder`` (the
pub/sub responder threads of a space: intake, fair queue, CPU budget).
"""
