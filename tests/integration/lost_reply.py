"""A Redis connection whose reply to one command is lost after the server ran it.

``cut_after_send(marker)`` makes a ``redis.Connection`` class: the first command
whose bytes hold ``marker`` is sent and run by the server, its reply read and
thrown away, and the caller gets a :class:`redis.ConnectionError`, as when a
network cut falls between the command and its reply. Give it to a client with
``connection_class`` (single server or cluster nodes alike).
"""

from __future__ import annotations

from typing import Any

import redis


def cut_after_send(marker: bytes) -> type[redis.Connection]:
    state = {"armed": True, "cuts": 0}

    class CutAfterSend(redis.Connection):
        cut = state

        def send_packed_command(self, command: Any, check_health: bool = True) -> None:
            super().send_packed_command(command, check_health)
            data = b"".join(bytes(c) for c in command) if isinstance(command, list) else command
            if state["armed"] and marker in bytes(data):
                state["armed"] = False
                self._lose_next = True

        def read_response(self, *args: Any, **kwargs: Any) -> Any:
            if getattr(self, "_lose_next", False):
                self._lose_next = False
                super().read_response(*args, **kwargs)  # the server ran the command
                self.disconnect()
                state["cuts"] += 1
                raise redis.ConnectionError("the reply was lost (test)")
            return super().read_response(*args, **kwargs)

    return CutAfterSend
