"""Structured logs: one JSON object per line, with the fields the README states."""

from __future__ import annotations

import io
import json
import logging
import threading

import pytest
from hypothesis import given
from hypothesis import strategies as st
from typer.testing import CliRunner

from streamrate.cli import app
from streamrate.logs import FIELDS, JsonFormatter, setup_logging


def _capture(fmt: str) -> tuple[logging.Logger, io.StringIO]:
    setup_logging("INFO", fmt)  # type: ignore[arg-type]
    buf = io.StringIO()
    handler = logging.getLogger().handlers[0]
    assert isinstance(handler, logging.StreamHandler)
    handler.setStream(buf)
    return logging.getLogger("streamrate.test"), buf


@pytest.fixture(autouse=True)
def _restore_root() -> object:
    root = logging.getLogger()
    handlers, level = list(root.handlers), root.level
    yield
    root.handlers[:] = handlers
    root.setLevel(level)


def test_json_lines_carry_the_stated_fields_and_the_space_of_the_thread() -> None:
    log, buf = _capture("json")

    def work() -> None:
        log.info("resuming after %s", "17-0")
        try:
            raise ValueError("the model refused an event")
        except ValueError:
            log.exception("loop error")

    t = threading.Thread(target=work, name="consumer-duel")
    t.start()
    t.join()
    log.warning("outside any space", extra={"space": "ranked"})
    log.info("no space here")
    lines = [json.loads(x) for x in buf.getvalue().splitlines()]
    assert len(lines) == 4  # one object per line, the traceback inside its line
    assert lines[0]["message"] == "resuming after 17-0" and lines[0]["space"] == "duel"
    assert set(lines[0]) == set(FIELDS) - {"exception"}
    assert lines[1]["level"] == "ERROR" and "the model refused an event" in lines[1]["exception"]
    assert lines[1]["logger"] == "streamrate.test"
    assert lines[2]["space"] == "ranked" and lines[3]["space"] is None
    assert all(x["time"].endswith("Z") and x["time"][10] == "T" for x in lines)


def test_text_format_stays_the_default_plain_line() -> None:
    log, buf = _capture("text")
    log.info("hello %d", 3)
    assert buf.getvalue().rstrip().endswith("INFO streamrate.test: hello 3")


@given(st.text(max_size=200))
def test_any_message_is_one_parseable_line(text: str) -> None:
    rec = logging.LogRecord("streamrate.x", logging.INFO, __file__, 1, "%s", (text,), None)
    line = JsonFormatter().format(rec)
    assert "\n" not in line and json.loads(line)["message"] == text


def test_an_unknown_log_format_is_one_clear_line_and_exit_2() -> None:
    res = CliRunner().invoke(app, ["serve", "--log-format", "yaml"])
    assert res.exit_code == 2
    assert res.output.strip().count("\n") == 0 and "log_format" in res.output
