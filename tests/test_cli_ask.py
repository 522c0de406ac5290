"""`ask` and `watch`: bad input is one clear line and exit 2, before any Redis is needed."""

from __future__ import annotations

import pytest
from typer.testing import CliRunner

from streamrate.cli import app
from streamrate.client import format_reply

NOWHERE = ["--redis-url", "redis://127.0.0.1:1/0"]  # never reached: input is checked first


@pytest.mark.parametrize(
    ("args", "needle"),
    [
        (["watch", "kelvash:kelvash"], "an entity cannot be on both sides: kelvash"),
        (["watch", "kelvash"], "write first,ids:second,ids"),
        (["ask", "kelvash", "kelvash"], "an entity cannot be on both sides: kelvash"),
        (["ask", "--lobby", "a,b,c"], "cannot be split evenly: give --team-size"),
        (["ask", "--lobby", "a,b,c,d", "--teams", "3,3"], "adding up to the 4 ids"),
        (["ask", "--lobby", "a,b", "--teams", "x"], "write two sizes"),
        (["ask"], "give FIRST and SECOND"),
    ],
)
def test_bad_input_is_one_line_and_exit_2(args: list[str], needle: str) -> None:
    res = CliRunner().invoke(app, [*args, *NOWHERE])
    assert res.exit_code == 2, res.output
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and needle in lines[0], lines
    assert "Traceback" not in res.output and "http" not in res.stderr


def test_no_service_is_one_line_and_exit_2() -> None:
    res = CliRunner().invoke(app, ["ask", "kelvash", "morvenn", *NOWHERE])
    assert res.exit_code == 2 and len(res.stderr.strip().splitlines()) == 1


def test_pairing_output_names_entities_never_seen() -> None:
    reply = {"ok": True, "kind": "pairing", "p_first_wins": 0.508, "p_draw": None,
             "seen": {"kelvash": 12, "ghost": 0}, "model": "elo",
             "model_version": "5-0"}  # fmt: skip
    text = format_reply(reply)
    assert "never seen: ghost (newcomer estimate)" in text and "never seen: kelvash" not in text


def test_lobby_output_says_what_exact_and_heuristic_mean() -> None:
    base = {"ok": True, "kind": "lobby", "model": "elo", "model_version": "5-0",
            "split": {"first": ["a", "d"], "second": ["b", "c"], "p_first_wins": 0.5}}  # fmt: skip
    exact = format_reply({**base, "method": "exact", "surrogate_gap": None, "gap_bound": 0.0})
    assert "[exact] = exact: every split was scored with the model" in exact
    heur = format_reply({**base, "method": "heuristic", "surrogate_gap": 0.01, "gap_bound": 0.2})
    assert "[heuristic] = heuristic: teams balanced by each player's mean strength" in heur
