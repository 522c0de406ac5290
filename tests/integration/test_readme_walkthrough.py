"""The README's service walk-through, pasted in order, against a real redis-server.

The commands are read from README.md between ``<!-- walkthrough:start -->`` and
``<!-- walkthrough:end -->`` and run as written, in a scratch folder holding a copy
of ``configs/service.toml`` whose Redis URL and metrics port point at this test's
own server and a free port. ``streamrate`` runs as ``python -m streamrate``; a line
ending in ``&`` runs in the background, and the test waits for the log line its
comment names, as a reader would; ``kill %1`` stops it by its PID; a line whose
comment says Ctrl-C runs until it has printed something, then gets SIGINT.
"""

from __future__ import annotations

import os
import re
import shlex
import signal
import socket
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import pytest

from .conftest import RedisServer

pytestmark = pytest.mark.integration

ROOT = Path(__file__).resolve().parents[2]
SHIPPED_URL = "redis://127.0.0.1:6379/0"
TIMEOUT_S = 180.0  # a first compile on a busy two-core machine; the test waits on output


@dataclass(frozen=True)
class Step:
    argv: list[str]
    comment: str
    background: bool


def walkthrough() -> list[Step]:
    text = (ROOT / "README.md").read_text("utf-8")
    block = re.search(
        r"<!-- walkthrough:start -->\n```sh\n(.*?)```\n<!-- walkthrough:end -->", text, re.S
    )
    assert block, "README.md has no walk-through block"
    steps = []
    for line in block.group(1).splitlines():
        command, _, comment = line.partition("  #")
        command = command.strip()
        background = command.endswith("&")
        steps.append(Step(shlex.split(command.rstrip("&")), comment.strip(), background))
    return steps


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _scratch(tmp_path: Path, url: str) -> Path:
    work = tmp_path / "work"
    (work / "configs").mkdir(parents=True)
    shipped = (ROOT / "configs" / "service.toml").read_text("utf-8")
    assert SHIPPED_URL in shipped and re.search(r"(?m)^port = 8564\b", shipped)
    copy = shipped.replace(SHIPPED_URL, url)
    copy = re.sub(r"(?m)^port = 8564\b", f"port = {_free_port()}", copy)
    (work / "configs" / "service.toml").write_text(copy, "utf-8")
    return work


def _argv(step: Step) -> list[str]:
    assert step.argv[0] == "streamrate", step.argv
    return [sys.executable, "-m", "streamrate", *step.argv[1:]]


def _wait_for_text(path: Path, text: str, proc: subprocess.Popen[bytes]) -> None:
    deadline = time.monotonic() + TIMEOUT_S
    while text not in path.read_text("utf-8", errors="replace"):
        assert proc.poll() is None, path.read_text("utf-8", errors="replace")
        assert time.monotonic() < deadline, f"no {text!r} in {path.name}"
        time.sleep(0.1)


# What each command of the walk-through must print (the README says the same).
EXPECT = [
    (("simulate",), r"wrote quillrock\.jsonl"),
    (("send",), r"sent 3000 entries to \{sr:duel\}:events"),
    (("ask", "--lobby"), r"\S+ \+ \S+  vs  \S+ \+ \S+: P\(first wins\) = 0\.\d{3} \[exact\]"),
    (
        ("ask",),
        r"P\(first wins\) = 0\.\d{3}  seen: nevjor: \d+, murnyeb: \d+  \(model recalibrated",
    ),
    # "watch" when a quality figure is past a warning level; both exit 0
    (("health",), r"(?m)^duel +consumer lag .*\n(?:.*\n)*overall: (ok|watch)$"),
]


def _expected(step: Step) -> str:
    for words, pattern in EXPECT:
        if all(w in step.argv for w in words):
            return pattern
    raise AssertionError(f"the test does not know what {step.argv} should print")


def test_readme_service_walkthrough_runs_as_written(
    redis_server: RedisServer, tmp_path: Path
) -> None:
    steps = walkthrough()
    assert [s.argv[:2] for s in steps][:3] == [
        ["streamrate", "simulate"],
        ["streamrate", "serve"],
        ["streamrate", "send"],
    ]
    work = _scratch(tmp_path, redis_server.url)
    env = dict(os.environ)
    service: subprocess.Popen[bytes] | None = None
    log = work / "serve.log"
    try:
        for step in steps:
            if step.argv == ["kill", "%1"]:
                assert service is not None
                os.kill(service.pid, signal.SIGTERM)
                assert service.wait(60) == 0, log.read_text()
                assert "final checkpoint" in log.read_text()
                service = None
            elif step.background:
                ready = re.search(r'logs "(.+?)(?: \.\.\.)?" when ready', step.comment)
                assert ready, step.comment
                with open(log, "wb") as fh:
                    service = subprocess.Popen(_argv(step), cwd=work, env=env, stderr=fh)
                _wait_for_text(log, ready.group(1), service)
            elif "Ctrl-C" in step.comment:
                out = work / "follow.log"
                with open(out, "wb") as fh:
                    proc = subprocess.Popen(_argv(step), cwd=work, env=env, stderr=fh, stdout=fh)
                _wait_for_text(out, "watching", proc)
                proc.send_signal(signal.SIGINT)
                assert proc.wait(30) == 0, out.read_text()
                assert "error" not in out.read_text()
            else:
                res = subprocess.run(
                    _argv(step), cwd=work, env=env, capture_output=True, text=True,
                    timeout=TIMEOUT_S,
                )  # fmt: skip
                both = res.stdout + res.stderr
                assert res.returncode == 0, (step.argv, both)
                assert re.search(_expected(step), both), (step.argv, both)
        assert service is None, "the walk-through leaves the service running"
    finally:
        if service is not None and service.poll() is None:
            os.kill(service.pid, signal.SIGKILL)
            service.wait(10)
