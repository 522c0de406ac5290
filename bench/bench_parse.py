"""Cost of turning one stream payload into a validated MatchEvent.

Run by hand:  python bench/bench_parse.py

Prints microseconds per event for the validating decoder that the service uses
(pydantic's ``validate_json`` on :class:`streamrate.events.MatchEvent`) next to
the cost of merely decoding the same JSON without validation (stdlib ``json``),
measured in the same run, and the ratio between them; then what the consumer
adds per valid event (the time check against the stream id and the content
digest of the retry record) as a ratio to parsing. Last, the writer's batch
decoder (:func:`streamrate.decode.decode_events`, held to the model by
``tests/test_decode.py``) on batches of 100 and 1000 payloads, per event, against
``parse_event`` one payload at a time, with the digests of the batch
(:func:`streamrate.events.event_digests`) against one :func:`event_digest` each;
and the compiled scan of the writer's fast lane (:func:`streamrate.scan.scan_payloads`,
held to the model by ``tests/test_scan.py``: checks, columns and digests in one
pass) against ``decode_events`` plus ``event_digests``, on the same batches.
"""

from __future__ import annotations

import json
import timeit

from streamrate.decode import decode_events
from streamrate.events import MatchEvent, event_digest, event_digests, parse_event, time_problem

SOLO = (
    b'{"match_id": "m-000123", "finished_at": "2026-03-01T18:00:00Z", "first": ["kelvash"],'
    b' "second": ["morvenn"], "score": 1, "context": {"map": "saltflats", "mode": "duel"}}'
)
TEAMS = (
    b'{"match_id": "m-000124", "finished_at": "2026-03-01T18:00:00Z",'
    b' "first": ["kelvash", "tuvrenn", "oskuvar"], "second": ["morvenn", "bravik", "vantor"],'
    b' "score": 0.5, "context": {"map": "glasswood", "mode": "trio", "patch": "1.4"},'
    b' "features": {"bravik": {"training_hours": 12.5, "style_hint": "rush"}}}'
)


def per_event_us(fn: object, number: int = 50_000) -> float:
    best = min(timeit.repeat(fn, number=number, repeat=5))  # type: ignore[arg-type]
    return best / number * 1e6


def main() -> None:
    validator = MatchEvent.__pydantic_validator__
    for name, raw in (("solo", SOLO), ("trio with features", TEAMS)):
        plain = per_event_us(lambda raw=raw: json.loads(raw))
        fast = per_event_us(lambda raw=raw: validator.validate_json(raw))
        full = per_event_us(lambda raw=raw: parse_event(raw))
        ev = parse_event(raw)
        extra = per_event_us(lambda ev=ev: (time_problem(ev, 1_780_000_000_000, 86400.0),
                                            event_digest(ev)))  # fmt: skip
        print(
            f"{name:>20}: json.loads only {plain:5.2f} us | validate_json {fast:5.2f} us "
            f"({fast / plain:4.2f}x) | parse_event (adds size check + messages) {full:5.2f} us"
            f" | consumer's time check + digest {extra:5.2f} us ({extra / full:4.2f}x parse)"
        )

    for name, raw in (("solo", SOLO), ("trio with features", TEAMS)):
        for size in (100, 1000):
            raws = [raw.replace(b"m-0001", f"m-{k:06d}".encode()) for k in range(size)]
            one = per_event_us(lambda raws=raws: [parse_event(x) for x in raws], 50) / size
            batch = per_event_us(lambda raws=raws: decode_events(raws), 50) / size
            evs = [parse_event(x) for x in raws]
            stamps = [e.finished_at.timestamp() for e in evs]
            dig1 = per_event_us(lambda evs=evs: [event_digest(e) for e in evs], 50) / size
            digs = per_event_us(lambda e=evs, t=stamps: event_digests(e, t), 50) / size
            print(
                f"{name:>20}, batch {size:4d}: parse_event {one:5.2f} us | decode_events "
                f"{batch:5.2f} us ({batch / one:4.2f}x) | event_digest {dig1:5.2f} us | "
                f"event_digests {digs:5.2f} us ({digs / dig1:4.2f}x)"
            )

    from streamrate.scan import scan_payloads  # the compiled scan of the common spellings

    for size in (100, 1000):
        raws = [SOLO.replace(b"m-0001", f"m-{k:06d}".encode()) for k in range(size)]
        both = per_event_us(lambda raws=raws: event_digests(*decode_events(raws)), 50) / size
        scan = per_event_us(lambda raws=raws: scan_payloads(raws), 50) / size
        print(
            f"{'solo':>20}, batch {size:4d}: decode_events + event_digests {both:5.2f} us | "
            f"scan_payloads {scan:5.2f} us ({scan / both:4.2f}x)"
        )


if __name__ == "__main__":
    main()
