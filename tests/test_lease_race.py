"""A renewal in flight while the same writer takes its lease again is not a lost lease.

The writer takes the lease once to start and once more when its consumer
starts (a new epoch), while its renewal thread already runs. A renewal that read
the value before the second take would compare the old value with the new one.
"""

from __future__ import annotations

import threading
from typing import Any

import fakeredis

from streamrate.config import LeaseSettings
from streamrate.stream.lease import RENEW, Lease


class HeldRenewal:
    """A client whose RENEW script waits at the server's door until ``go`` is set."""

    def __init__(self) -> None:
        self.r = fakeredis.FakeRedis()
        self.at_door, self.go = threading.Event(), threading.Event()

    def eval(self, script: str, numkeys: int, *args: Any) -> Any:
        if script == RENEW:
            self.at_door.set()
            assert self.go.wait(10)
        return self.r.eval(script, numkeys, *args)

    def get(self, key: str) -> Any:
        return self.r.get(key)


def test_a_take_during_a_renewal_does_not_lose_the_lease() -> None:
    client = HeldRenewal()
    lease = Lease(client, "{sr:duel}:lease", "{sr:duel}:epoch", LeaseSettings(), holder="w")
    assert lease.take() == 1
    renewal = threading.Thread(target=lease.renew)
    renewal.start()
    assert client.at_door.wait(10)
    took: list[int] = []
    second = threading.Thread(target=lambda: took.append(lease.take()))
    second.start()
    second.join(0.3)  # the take gets its chance to run before the renewal reaches Redis
    client.go.set()
    renewal.join(10)
    second.join(10)
    assert took == [2]
    assert not lease.lost and lease.value == "w 2"
    assert client.get("{sr:duel}:lease") == b"w 2"
