"""A blocking Server-Sent Events reader for tests and benchmarks (http.client, no extras)."""

from __future__ import annotations

import http.client
import json
from dataclasses import dataclass
from typing import Any


@dataclass
class Event:
    event: str
    data: str
    id: str | None

    def json(self) -> Any:
        return json.loads(self.data)


class SSEReader:
    """One SSE connection; :meth:`next` returns the next event (comments skipped)."""

    def __init__(
        self, port: int, path: str, headers: dict[str, str] | None = None, timeout_s: float = 10
    ) -> None:
        self.conn = http.client.HTTPConnection("127.0.0.1", port, timeout=timeout_s)
        self.conn.request("GET", path, headers=headers or {})
        self.resp = self.conn.getresponse()
        self.status = self.resp.status
        self.last_id: str | None = None

    def next(self) -> Event:
        name, data, eid = "message", [], None
        while True:
            raw = self.resp.fp.readline()
            if not raw:
                raise EOFError("the stream ended")
            line = raw.decode().rstrip("\n")
            if not line:
                if data or eid is not None:
                    if eid is not None:
                        self.last_id = eid
                    return Event(name, "\n".join(data), eid)
                continue
            field, _, value = line.partition(":")
            value = value.removeprefix(" ")
            if field == "event":
                name = value
            elif field == "data":
                data.append(value)
            elif field == "id":
                eid = value

    def next_of(self, kind: str) -> Event:
        while True:
            ev = self.next()
            if ev.event == kind:
                return ev

    def close(self) -> None:
        self.conn.close()
