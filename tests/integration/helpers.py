"""Shared pieces of the integration tests: event files with junk and retries, references."""

from __future__ import annotations

import json
import random
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

from streamrate.checkpoint import Checkpoint, decode_checkpoint
from streamrate.events import MatchEvent, event_to_json
from streamrate.models.base import Model
from streamrate.models.registry import build_model
from streamrate.simulate import simulate, world_spec

MODEL = "blade_chest"
MODEL_SETTINGS = {"dims": 8, "context": "stacked"}

JUNK = [
    "{not json",
    '{"match_id": "x-1"}',
    '{"match_id": "x-2", "finished_at": "2026-03-01T00:00:00Z", "first": ["a"],'
    ' "second": ["b"], "score": 3}',
    '{"match_id": "x-3", "finished_at": "2026-03-01T00:00:00", "first": ["a"],'
    ' "second": ["b"], "score": 1}',
    '{"match_id": "x-4", "finished_at": "2026-03-01T00:00:00Z", "first": ["a"],'
    ' "second": ["a"], "score": 1}',
    "[]",
    "null",
]


def world_lines(matches: int, seed: int) -> tuple[list[str], list[MatchEvent], int]:
    """Lines of an event file: valid events, junk, and producer retries of earlier events.

    Returns (lines, unique valid events in order, number of junk lines).
    """
    events = simulate(world_spec("cyclic", matches=matches, entities=60, seed=seed)).events
    rng = random.Random(seed)
    lines = [event_to_json(ev) for ev in events]
    junk = 0
    for k in range(matches // 100):
        at = rng.randrange(1, len(lines))
        if k % 2:
            lines.insert(at, JUNK[k % len(JUNK)])
            junk += 1
        else:  # a retry of some earlier event, later in the stream
            src = rng.randrange(0, max(at - 1, 1))
            if lines[src] in JUNK:
                lines.insert(at, JUNK[0])
                junk += 1
            else:
                lines.insert(at, lines[src])
    return lines, events, junk


def reference(events: list[MatchEvent]) -> Model:
    """The uninterrupted run: each unique event learned once, in order."""
    model = build_model(MODEL, **MODEL_SETTINGS)
    for ev in events:
        model.learn(ev)
    return model


def assert_same_state(got: Checkpoint, want: Model) -> None:
    ref = want.to_state()
    assert got.state.kind == ref.kind
    assert set(got.state.arrays) == set(ref.arrays)
    for name, arr in ref.arrays.items():
        a = np.asarray(got.state.arrays[name])
        if arr.dtype.kind in "iub":
            np.testing.assert_array_equal(a, arr, err_msg=name)
        else:
            np.testing.assert_allclose(a, arr, rtol=1e-9, atol=1e-12, err_msg=name)


# How long a test waits for a service to become ready. Readiness includes the first
# compile of the model kernels, which takes minutes on a busy machine with an empty
# kernel cache (a fresh CI machine): the wait is bounded by the test's own timeout in
# practice, never by a guess at compile time.
READY_WAIT_S = 540.0


def wait_for(cond: Callable[[], bool], timeout_s: float, what: str) -> None:
    deadline = time.monotonic() + timeout_s
    while not cond():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.05)


def file_checkpoint(directory: Path, space: str) -> Checkpoint | None:
    path = directory / f"{space}.ckpt.npz"
    if not path.exists():
        return None
    return decode_checkpoint(path.read_bytes(), keep=1_000_000, window_s=1e12)


def write_toml(path: Path, url: str, ckpt_dir: Path, store: str = "file", **space: object) -> None:
    sp = {
        "name": "duel",
        "model": MODEL,
        "batch_count": 50,
        "block_ms": 100,
        "checkpoint_every_events": 300,
        "checkpoint_every_s": 0.3,
        "dedupe_window_s": 1e9,
        **space,
    }
    body = [
        f"[redis]\nurl = {json.dumps(url)}\nreconnect_max_s = 0.5\n",
        f"[checkpoint]\nstore = {json.dumps(store)}\ndir = {json.dumps(str(ckpt_dir))}\n",
        "[metrics]\nenabled = false\n",  # on by default; tests must not share a port
        "[[spaces]]",
    ]
    body += [f"{k} = {json.dumps(v)}" for k, v in sp.items()]
    body.append("[spaces.model_settings]")
    body += [f"{k} = {json.dumps(v)}" for k, v in MODEL_SETTINGS.items()]
    path.write_text("\n".join(body) + "\n")


def serve(cfg: Path, log: Path, role: str) -> subprocess.Popen[bytes]:
    """``streamrate serve --config cfg --role role`` in a subprocess, output appended to ``log``."""
    with open(log, "ab") as fh:
        return subprocess.Popen(
            [sys.executable, "-m", "streamrate", "serve", "--config", str(cfg), "--role", role],
            stdout=fh,
            stderr=subprocess.STDOUT,
        )


def render_toml(tables: dict[str, dict[str, object]], spaces: list[dict[str, object]]) -> str:
    """A settings file: ``tables`` first, then each space with the shared ``MODEL_SETTINGS``."""
    lines = []
    for table, values in tables.items():
        lines.append(f"[{table}]")
        lines += [f"{k} = {json.dumps(v)}" for k, v in values.items()]
    for space in spaces:
        lines.append("[[spaces]]")
        lines += [f"{k} = {json.dumps(v)}" for k, v in space.items()]
        lines.append("[spaces.model_settings]")
        lines += [f"{k} = {json.dumps(v)}" for k, v in MODEL_SETTINGS.items()]
    return "\n".join(lines) + "\n"
