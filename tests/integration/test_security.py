"""The service under the shipped least-privilege Redis users, and over verified TLS.

The ACL comes from deploy/redis/users.conf, rendered by deploy/redis/render-users.sh
with a fresh password per role. The service runs as ``streamrate``, events are
sent as ``producer`` and questions asked as ``asker``; at the end Redis' own
``ACL LOG`` must hold no refused command: the users are sufficient. Then each
role is shown to be refused what it does not need.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
from pathlib import Path

import pytest
import redis
from prometheus_client import CollectorRegistry
from typer.testing import CliRunner

from streamrate.checkpoint import decode_checkpoint
from streamrate.cli import app
from streamrate.config import load_settings
from streamrate.events import Matchup, event_to_json
from streamrate.service import Service, redis_factory
from tests.integration.helpers import READY_WAIT_S

from .conftest import SecureRedisServer
from .helpers import MODEL, MODEL_SETTINGS, reference, render_toml, wait_for, world_lines

pytestmark = pytest.mark.integration
EVENTS_KEY, CKPT_KEY, DEAD_KEY = "{sr:duel}:events", "{sr:duel}:ckpt", "{sr:duel}:dead"


def _toml(path: Path, body: dict[str, dict[str, object]], space: dict[str, object]) -> Path:
    path.write_text(render_toml(body, [space]))
    return path


def _space() -> dict[str, object]:
    return {
        "name": "duel",
        "model": MODEL,
        "batch_count": 50,
        "block_ms": 100,
        "checkpoint_every_events": 100,
        "checkpoint_every_s": 0.3,
        "dedupe_window_s": 1e9,
        "claim_idle_ms": 1000,  # the periodic look for orphans (XPENDING) runs too
        "retention_s": 1e9,  # and the stream trim (XTRIM MINID)
    }


def _role_config(
    server: SecureRedisServer, tmp_path: Path, role: str, **redis_extra: object
) -> Path:
    redis_table: dict[str, object] = {
        "url": server.url,
        "username": role,
        "password_file": str(server.passwords[role]),
        "reconnect_max_s": 0.5,
        **redis_extra,
    }
    checkpoint = {"store": "redis", "dir": str(tmp_path / "ckpt")}
    metrics = {"enabled": False}  # on by default; tests must not share a port
    tables = {"redis": redis_table, "checkpoint": checkpoint, "metrics": metrics}
    return _toml(tmp_path / f"{role}.toml", tables, _space())


def _ask_json(runner: CliRunner, cfg: Path, *args: str) -> dict[str, object]:
    res = runner.invoke(app, ["ask", "--config", str(cfg), "--json", *args])
    assert res.exit_code in (0, 1), res.output
    out: dict[str, object] = json.loads(res.output)
    return out


def _refused(client: redis.Redis, *command: str) -> bool:
    try:
        client.execute_command(*command)
    except redis.exceptions.NoPermissionError:
        return True
    finally:
        client.close()
    return False


def test_the_service_runs_as_the_shipped_least_privilege_users(
    acl_redis: SecureRedisServer, tmp_path: Path
) -> None:
    lines, events, junk = world_lines(300, seed=21)
    data = tmp_path / "matches.jsonl"
    data.write_text("\n".join(lines) + "\n")
    serve_cfg = _role_config(acl_redis, tmp_path, "streamrate")
    asker_cfg = _role_config(acl_redis, tmp_path, "asker")
    # The producer's password comes from the environment instead of a file.
    producer_cfg = _role_config(acl_redis, tmp_path, "producer", password_env="SR_TEST_PW")
    producer_cfg.write_text(producer_cfg.read_text().replace("password_file = ", "# "))
    producer_env = {"SR_TEST_PW": acl_redis.password("producer")}
    admin = acl_redis.client("admin")
    log_path = tmp_path / "serve.log"
    with open(log_path, "wb") as log_file:
        proc = subprocess.Popen(
            [sys.executable, "-m", "streamrate", "serve", "--config", str(serve_cfg)],
            stdout=subprocess.DEVNULL,
            stderr=log_file,
        )
    watcher: subprocess.Popen[str] | None = None
    try:
        runner = CliRunner()
        res = runner.invoke(app, ["send", str(data), "--config", str(producer_cfg)],
                            env=producer_env)  # fmt: skip
        assert res.exit_code == 0, res.output
        assert f"sent {len(lines)} entries" in res.output
        wait_for(lambda: admin.pubsub_numsub("{sr:duel}:q")[0][1] > 0, 60, "the responder")
        wait_for(lambda: _ask_json(runner, asker_cfg, "x", "y").get("applied") == len(events),
                 60, "all events applied")  # fmt: skip
        a, b = events[-1].first[0], events[-1].second[0]
        rep = _ask_json(runner, asker_cfg, a, b)
        want = reference(events).predict(Matchup(first=(a,), second=(b,)))
        assert rep["ok"] is True
        assert rep["p_first_wins"] == pytest.approx(want.p_win, rel=1e-9)
        assert admin.xlen(DEAD_KEY) == junk  # dead letters written as the service user

        # The live feed, followed as the asker through `streamrate watch`.
        watcher = subprocess.Popen(
            [sys.executable, "-m", "streamrate", "watch", f"{a}:{b}", "--config", str(asker_cfg)],
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        seen: list[str] = []
        assert watcher.stdout is not None and watcher.stderr is not None
        threading.Thread(target=lambda s=watcher.stdout: seen.extend(s), daemon=True).start()
        errs: list[str] = []
        threading.Thread(target=lambda s=watcher.stderr: errs.extend(s), daemon=True).start()
        wait_for(lambda: any("watching" in e for e in errs), 60, "the watcher to subscribe")
        extra = json.loads(event_to_json(events[-1]))
        extra.update(match_id="acl-extra-1", first=[a], second=[b])
        more = tmp_path / "more.jsonl"
        more.write_text(json.dumps(extra) + "\n")
        res = runner.invoke(app, ["send", str(more), "--config", str(producer_cfg)],
                            env=producer_env)  # fmt: skip
        assert res.exit_code == 0, res.output
        wait_for(lambda: any("acl-extra-1" in line for line in seen), 30, "a live message")

        os.kill(proc.pid, signal.SIGTERM)
        assert proc.wait(60) == 0
    finally:
        for p in (proc, watcher):
            if p is not None and p.poll() is None:
                os.kill(p.pid, signal.SIGKILL)
                p.wait()
    # The final checkpoint went to Redis with SET, as the service user.
    blob = admin.get(CKPT_KEY)
    assert blob is not None
    ck = decode_checkpoint(blob, keep=1_000_000, window_s=1e12)
    assert ck.applied == len(events) + 1
    assert admin.xpending(EVENTS_KEY, "streamrate")["pending"] == 0

    # Nothing any role did was refused: the users are sufficient.
    assert admin.acl_log() == []

    # Nothing shows the password; the start-up line says who and how.
    log_text = log_path.read_text()
    assert "as user streamrate with a password, without TLS" in log_text
    for role in ("streamrate", "producer", "asker", "admin"):
        assert acl_redis.password(role) not in log_text

    # ... and each role is refused what it does not need.
    assert _refused(acl_redis.client("producer"), "XRANGE", EVENTS_KEY, "-", "+")
    assert _refused(acl_redis.client("producer"), "XADD", DEAD_KEY, "*", "f", "v")
    assert _refused(acl_redis.client("producer"), "PUBLISH", "{sr:duel}:q", "{}")
    assert _refused(acl_redis.client("asker"), "XADD", EVENTS_KEY, "*", "event", "{}")
    assert _refused(acl_redis.client("asker"), "GET", CKPT_KEY)
    assert _refused(acl_redis.client("streamrate"), "GET", "elsewhere")
    assert _refused(acl_redis.client("streamrate"), "XDEL", EVENTS_KEY, "0-1")
    assert _refused(acl_redis.client("streamrate"), "KEYS", "*")
    assert _refused(acl_redis.client("streamrate"), "FLUSHALL")
    assert _refused(acl_redis.client("streamrate"), "CONFIG", "GET", "*")
    assert _refused(acl_redis.client("streamrate"), "PUBLISH", "elsewhere", "x")
    with pytest.raises(redis.AuthenticationError):  # the default user is off
        redis.Redis(port=acl_redis.port, socket_timeout=5).ping()


def _tls_overrides(server: SecureRedisServer, role: str, **tls: object) -> list[str]:
    assert server.certs is not None
    c = server.certs
    values: dict[str, object] = {
        "url": server.url,
        "username": role,
        "password_file": server.passwords[role],
        "tls_ca_file": c.ca,
        "tls_cert_file": c.client_cert,
        "tls_key_file": c.client_key,
        **tls,
    }
    sets = []
    for k, v in values.items():
        if v is not None:
            text = json.dumps(v) if isinstance(v, bool) else str(v)
            sets += ["--set", f"redis.{k}={text}"]
    return sets


def test_service_over_tls_with_verified_certificates(
    tls_redis: SecureRedisServer, tmp_path: Path
) -> None:
    lines, events, _junk = world_lines(200, seed=22)
    data = tmp_path / "matches.jsonl"
    data.write_text("\n".join(lines) + "\n")
    space = ["--set", "spaces.0.model=" + MODEL, "--set", "spaces.0.block_ms=50",
             "--set", "spaces.0.dedupe_window_s=1e9",
             "--set", "spaces.0.model_settings=" + json.dumps(MODEL_SETTINGS)]  # fmt: skip
    overrides = [o for o in _tls_overrides(tls_redis, "streamrate") if o != "--set"]
    settings = load_settings(
        None,
        [*overrides, *space[1::2], f"checkpoint.dir={tmp_path}", "metrics.enabled=false"],
    )
    assert settings.redis.tls_verify  # verification is on without asking for it
    service = Service(settings, redis_factory(settings.redis), CollectorRegistry())
    stop = threading.Event()
    service.start(stop)
    try:
        assert service.spaces[0].ready.wait(READY_WAIT_S)
        wait_for(service.spaces[0].listening.is_set, 30, "the responder")
        runner = CliRunner()
        res = runner.invoke(app, ["send", str(data), *_tls_overrides(tls_redis, "producer")])
        assert res.exit_code == 0, res.output
        asker = ["ask", "--json", *_tls_overrides(tls_redis, "asker")]
        wait_for(lambda: service.spaces[0].consumer.live.applied == len(events), 60, "applied")
        a, b = events[-1].first[0], events[-1].second[0]
        res = runner.invoke(app, [*asker, a, b])
        assert res.exit_code == 0, res.output
        want = reference(events).predict(Matchup(first=(a,), second=(b,)))
        assert json.loads(res.output)["p_first_wins"] == pytest.approx(want.p_win, rel=1e-9)

        # A CA that did not sign the server's certificate: refused, one clear line.
        certs = tls_redis.certs
        assert certs is not None
        wrong_ca = _tls_overrides(tls_redis, "asker", tls_ca_file=certs.other_ca)
        res = runner.invoke(app, ["ask", a, b, *wrong_ca])
        assert res.exit_code == 2
        assert res.output.count("\n") == 1
        assert res.output.startswith(f"error: TLS handshake with {tls_redis.url} failed")
        assert "certificate verify failed" in res.output
        # The host name is checked too: the certificate names 127.0.0.1, not localhost.
        other_host = tls_redis.url.replace("127.0.0.1", "localhost")
        res = runner.invoke(app, ["ask", a, b,
                                  *_tls_overrides(tls_redis, "asker", url=other_host)])  # fmt: skip
        assert res.exit_code == 2, res.output
        assert "Hostname mismatch, certificate is not valid for 'localhost'" in res.output
        # Both refusals come from verification: with it off the same settings connect.
        unverified = _tls_overrides(
            tls_redis, "asker", tls_ca_file=certs.other_ca, url=other_host, tls_verify=False
        )
        res = runner.invoke(app, ["ask", a, b, *unverified])
        assert res.exit_code == 0, res.output
        # The server asks for a client certificate: without one, no entry.
        res = runner.invoke(app, ["ask", a, b, *_tls_overrides(
            tls_redis, "asker", tls_cert_file=None, tls_key_file=None)])  # fmt: skip
        assert res.exit_code == 2
    finally:
        stop.set()
        service.join()
    assert tls_redis.client("admin").acl_log() == []


def test_serve_stops_at_once_on_a_certificate_it_cannot_verify(
    tls_redis: SecureRedisServer, tmp_path: Path
) -> None:
    """No retry can fix a wrong CA: `serve` exits 2 with one line, it does not spin."""
    assert tls_redis.certs is not None
    sets = _tls_overrides(tls_redis, "streamrate", tls_ca_file=tls_redis.certs.other_ca)
    out = subprocess.run(
        [sys.executable, "-m", "streamrate", "serve", *sets,
         "--set", f"checkpoint.dir={tmp_path}"],
        capture_output=True, text=True, timeout=60,
    )  # fmt: skip
    assert out.returncode == 2, out.stderr
    last = out.stderr.strip().splitlines()[-1]
    assert last.startswith("error: TLS handshake with") and "certificate verify failed" in last
    assert tls_redis.password("streamrate") not in out.stderr
