"""Malformed entries of many kinds land in the dead-letter stream; the rest is applied."""

from __future__ import annotations

import itertools
import json
import tempfile
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry
from typer.testing import CliRunner

from streamrate.checkpoint import FileCheckpointStore, decode_checkpoint
from streamrate.cli import app
from streamrate.config import Settings, SpaceSettings
from streamrate.consumer import Consumer
from streamrate.events import event_to_json
from streamrate.metrics import ServiceMetrics
from streamrate.models.registry import build_model
from streamrate.simulate import simulate, world_spec

from .conftest import RedisServer
from .helpers import MODEL, MODEL_SETTINGS, assert_same_state, reference

pytestmark = pytest.mark.integration
EVENTS = simulate(world_spec("plain", matches=120, entities=12, seed=2)).events
_prefix = itertools.count()

GOOD = json.loads(event_to_json(EVENTS[0]))


def _spoil(key: str, value: Any) -> bytes:
    return json.dumps({**GOOD, "match_id": "bad", key: value}).encode()


_text = st.text(max_size=40)
malformed = st.one_of(
    st.binary(max_size=60).filter(lambda b: not b.strip().startswith(b"{")),
    _text.map(lambda s: s.encode()),
    st.sampled_from([b"", b"{}", b"[]", b"null", b"{not json", b'{"match_id": 1}']),
    st.one_of(st.floats(allow_nan=False), st.text(max_size=5), st.booleans())
    .filter(lambda v: v not in (0, 0.5, 1) or isinstance(v, bool))
    .map(lambda v: _spoil("score", v)),
    st.sampled_from(["2026-03-01T00:00:00", "yesterday", "", "2026-13-01T00:00:00Z"]).map(
        lambda v: _spoil("finished_at", v)
    ),
    st.sampled_from([[], [""], ["a b"], ["x" * 65], [1], "kelvash", None]).map(
        lambda v: _spoil("first", v)
    ),
    st.just(_spoil("second", GOOD["first"])),
    st.just(_spoil("surprise", 1)),
    st.just(_spoil("context", {"map": float("inf")})),
    st.just(b"{" + b'"pad": "' + b"x" * 20_000 + b'"}'),
)
# An entry either carries a bad 'event' payload or lacks the field altogether.
entry = st.one_of(
    malformed.map(lambda raw: {b"event": raw}),
    malformed.map(lambda raw: {b"payload": raw}),
)


def drain(c: Consumer) -> None:
    """Step until a read of new entries comes back empty."""
    while True:
        reading_new = c.cursor == ">"
        if c.step() == 0 and reading_new:
            return


def _consumer(server: RedisServer, prefix: str, ckpt_dir: str) -> Consumer:
    space = SpaceSettings(
        name="duel", model=MODEL, batch_count=17, checkpoint_every_events=40, block_ms=5
    )
    settings = Settings(prefix=prefix, spaces=(space,))
    keys = settings.keys(space)
    return Consumer(
        server.client(),
        space,
        keys,
        FileCheckpointStore(ckpt_dir, "duel"),
        ServiceMetrics(CollectorRegistry(), ["duel"]),
        lambda: build_model(MODEL, **MODEL_SETTINGS),
    )


@settings(max_examples=25)
@given(bad=st.lists(entry, min_size=1, max_size=12), cuts=st.lists(st.integers(0, 40), max_size=12))
def test_malformed_entries_are_dead_lettered_with_reasons(
    shared_redis: RedisServer, bad: list[dict[bytes, bytes]], cuts: list[int]
) -> None:
    prefix = f"dl{next(_prefix)}"
    with tempfile.TemporaryDirectory() as ckpt_dir:
        c = _consumer(shared_redis, prefix, ckpt_dir)
        r = shared_redis.client()
        valid = EVENTS[:40]
        entries: list[dict[bytes, bytes]] = [{b"event": event_to_json(e).encode()} for e in valid]
        for fields, at in zip(bad, cuts + [0] * len(bad), strict=False):
            entries.insert(min(at, len(entries)), fields)
        ids = [r.xadd(c.keys.events, f) for f in entries]
        bad_ids = {sid for sid, f in zip(ids, entries, strict=True) if f in bad}
        c.recover()
        drain(c)
        c.checkpoint()
        dead = r.xrange(c.keys.dead)
        assert {f[b"dead.source_id"] for _, f in dead} == bad_ids
        by_id = dict(zip(ids, entries, strict=True))
        cap = c.space.dead_max_payload_bytes
        for _, f in dead:
            original = by_id[f[b"dead.source_id"]]
            assert f[b"dead.reason"]
            # Values past the payload limit are kept cut, with their original length.
            assert {k: v for k, v in f.items() if not k.startswith(b"dead.")} == {
                k: v[:cap] for k, v in original.items()
            }
            for k, v in original.items():
                if len(v) > cap:
                    assert f[b"dead.length." + k] == str(len(v)).encode()
        assert c.counters == {"applied": 40, "dead_lettered": len(bad), "duplicate": 0}
        assert r.xpending(c.keys.events, "streamrate")["pending"] == 0
        ck = c.store.load()
        assert ck is not None
        assert_same_state(decode_checkpoint(ck, 10**6, 1e12), reference(valid))
        r.delete(c.keys.events, c.keys.dead)


def test_dead_letters_command_lists_and_resends_after_a_fix(
    redis_server: RedisServer, tmp_path: Path
) -> None:
    """An event dated an hour ahead is set aside under a 60 s future limit; after the
    limit is raised, `streamrate dead-letters --resend` sends it back and it is applied."""
    runner = CliRunner()
    url = redis_server.url
    r = redis_server.client()
    space = SpaceSettings(name="duel", model=MODEL, block_ms=5, future_limit_s=60)
    keys = Settings(spaces=(space,)).keys(space)
    ahead = dict(GOOD, match_id="ahead", finished_at=(
        datetime.now(UTC) + timedelta(hours=1)).isoformat())  # fmt: skip
    r.xadd(keys.events, {b"event": json.dumps(ahead).encode()})
    r.xadd(keys.events, {b"event": b'{"match_id": "broken"'})
    r.xadd(keys.events, {b"event": b"z" * 10_000})

    def run(sp: SpaceSettings) -> Consumer:
        c = Consumer(r, sp, keys, FileCheckpointStore(tmp_path, "duel"),
                     ServiceMetrics(CollectorRegistry(), ["duel"]),
                     lambda: build_model(MODEL, **MODEL_SETTINGS))  # fmt: skip
        c.recover()
        drain(c)
        c.checkpoint()
        return c

    assert run(space).counters["dead_lettered"] == 3
    res = runner.invoke(app, ["dead-letters", "--redis-url", url, "--json", "--limit", "10"])
    assert res.exit_code == 0, res.output
    rows = [json.loads(line) for line in res.output.splitlines()]
    assert [row["truncated"] for row in rows] == [True, False, False]
    assert rows[2]["reason"].startswith("finished_at: ")
    assert rows[2]["excerpt"].startswith('{"first": ')
    text = runner.invoke(app, ["dead-letters", "--redis-url", url, "--limit", "1"])
    assert text.exit_code == 0 and rows[0]["id"] in text.output and "[truncated]" in text.output
    res = runner.invoke(app, ["dead-letters", "--redis-url", url, "--resend", rows[2]["id"]])
    assert res.exit_code == 0, res.output
    assert "re-sent 1 entries to {sr:duel}:events" in res.output
    fixed = run(space.model_copy(update={"future_limit_s": 86_400.0}))
    assert fixed.counters["applied"] == 1
    res = runner.invoke(app, ["dead-letters", "--redis-url", url, "--resend-all"])
    assert "re-sent 1 entries" in res.output and "kept truncated, not re-sent" in res.output
    assert run(space).counters["dead_lettered"] == 4  # the broken one, set aside again
    missing = runner.invoke(app, ["dead-letters", "--redis-url", url, "--resend", "1-1"])
    assert missing.exit_code == 1 and "no such dead letter" in missing.output
