"""The command line as a newcomer meets it: help, version, names, and one-line errors."""

from __future__ import annotations

import re
import socket
import subprocess
import sys
from pathlib import Path

import pytest
from prometheus_client import CollectorRegistry, start_http_server
from typer.testing import CliRunner

import streamrate
from streamrate.challengers import format_compare
from streamrate.cli import app
from streamrate.config import Settings, load_settings
from streamrate.evaluate import Report, format_table
from streamrate.metrics import ServiceMetrics

ROOT = Path(__file__).resolve().parents[1]
COMMANDS = [
    "schema", "simulate", "replay", "serve", "send", "ask", "watch", "promote", "compare",
    "demo", "health", "warm",
]  # fmt: skip
runner = CliRunner()


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _one_line_error(res: object, *parts: str) -> None:
    out = str(getattr(res, "output", ""))
    assert getattr(res, "exit_code", None) == 2, out
    assert "Traceback" not in out
    errors = [line for line in out.splitlines() if line.startswith("error: ")]
    assert len(errors) == 1, out
    for part in parts:
        assert part in errors[0], errors[0]


def test_version() -> None:
    res = runner.invoke(app, ["--version"])
    assert res.exit_code == 0 and res.output.strip() == f"streamrate {streamrate.__version__}"


@pytest.mark.parametrize("command", ["", *COMMANDS])
def test_help_shows_no_python_types(command: str) -> None:
    res = runner.invoke(app, [command, "--help"] if command else ["--help"])
    assert res.exit_code == 0, res.output
    # typer's own rendering of types: <str>, <list[str]>, <path>; {file} for arguments
    assert not re.search(r"<[A-Za-z_\[\], |]+>|\{[a-z_]+\}|list\[|NoneType", res.output), res.output


@pytest.mark.parametrize("command", ["send", "ask", "watch", "promote", "compare", "health"])
def test_client_commands_take_a_settings_file(command: str) -> None:
    res = runner.invoke(app, [command, "--help"])
    assert "-c, --config FILE" in res.output
    if command != "health":  # health reads the metrics page, not Redis
        assert "--redis-url URL" in res.output


def test_team_sizes_have_one_name() -> None:
    for command in ("simulate", "ask"):
        res = runner.invoke(app, [command, "--help"])
        assert "--team-size" in res.output and "--teams" not in res.output
    # The earlier spelling still parses (hidden); here it fails only at the missing server.
    url = f"redis://127.0.0.1:{_free_port()}/0"
    for spelling in ("--teams", "--team-size"):
        res = runner.invoke(app, ["ask", "--lobby", "a,b", spelling, "1,1", "--redis-url", url])
        assert res.exit_code == 2 and "No such option" not in res.output, res.output


def test_replay_and_compare_print_columns_in_the_same_order() -> None:
    ci = {"mean": 0.0, "low": -0.1, "high": 0.1}
    member = {"n": 10, "log_loss": 0.6, "brier": 0.2, "accuracy": 0.6, "ece": 0.03, "active": True}
    compare = format_compare(
        {
            "reference": "a",
            "active": "a",
            "events": 10,
            "members": {"a": member, "b": {**member, "active": False, "log_loss_diff_ci": ci}},
        }
    ).splitlines()[0]
    rep = Report(
        models={
            "a": {
                "n": 10, "log_loss": 0.6, "brier": 0.2, "accuracy": 0.6, "ece": 0.03,
                "calibration_slope": 1.0, "calibration_intercept": 0.0, "log_loss_diff_ci": None,
            }
        },
        reference="a", scored=10, total=10,
    )  # fmt: skip
    replay = format_table(rep).splitlines()[0]
    shared = ["n", "log_loss", "brier", "acc", "ece"]

    def order(head: str) -> list[str]:
        words = re.findall(r"[a-z_]+", head)
        return [w for w in words if w in shared]

    assert order(compare) == order(replay) == shared


def test_metrics_are_on_by_default_on_loopback_outside_the_exporter_ports() -> None:
    for metrics in (Settings().metrics, load_settings(ROOT / "configs" / "service.toml").metrics):
        assert metrics.enabled and metrics.bind == "127.0.0.1"
        # 9090-9094: Prometheus' own components; 9100-9999: the exporter range of the
        # Prometheus default port allocations list (from memory); 9464 was our old default.
        assert not 9090 <= metrics.port <= 9999


def _write_config(path: Path, port: int, enabled: bool = True) -> Path:
    path.write_text(
        "[redis]\nurl = \"redis://127.0.0.1:1/0\"\n"
        f"[metrics]\nenabled = {str(enabled).lower()}\nbind = \"127.0.0.1\"\nport = {port}\n"
    )  # fmt: skip
    return path


def test_health_finds_the_metrics_address_in_the_settings(tmp_path: Path) -> None:
    port = _free_port()
    registry = CollectorRegistry()
    ServiceMetrics(registry, ["duel", "squad"])
    server, thread = start_http_server(port, addr="127.0.0.1", registry=registry)
    try:
        cfg = _write_config(tmp_path / "s.toml", port)
        res = runner.invoke(app, ["health", "-c", str(cfg), "--space", "duel"])
    finally:
        server.shutdown()
        thread.join(5)
    assert res.exit_code == 0, res.output
    assert "consumer lag" in res.stdout and "squad" not in res.stdout
    assert res.stdout.strip().splitlines()[-1].startswith("overall: ")


def test_health_against_a_closed_port_says_what_to_check(tmp_path: Path) -> None:
    cfg = _write_config(tmp_path / "s.toml", _free_port())
    res = runner.invoke(app, ["health", "-c", str(cfg)])
    _one_line_error(res, "is the service running with metrics enabled?", f"metrics.port in {cfg}")
    off = runner.invoke(app, ["health", "-c", str(_write_config(tmp_path / "o.toml", 1, False))])
    _one_line_error(off, "metrics are off")


def test_errors_of_the_tree_are_one_line_anywhere(tmp_path: Path) -> None:
    # health does not catch errors itself: the command group's guard does.
    res = runner.invoke(app, ["health", "-c", str(tmp_path / "missing.toml")])
    _one_line_error(res, "cannot read settings file")
    bad = tmp_path / "bad.toml"
    bad.write_text("[metrics]\nport = 'x'\n")
    _one_line_error(runner.invoke(app, ["health", "-c", str(bad)]), "metrics.port")


@pytest.fixture(scope="module")
def events_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("w") / "q.jsonl"
    res = runner.invoke(app, ["simulate", "--matches", "60", "--entities", "8", "-o", str(out)])
    assert res.exit_code == 0, res.output
    return out


@pytest.mark.parametrize(
    ("spec", "expected"),
    [
        ("blade_chest:dimz=4", "unknown setting 'dimz' for model blade_chest; known: dims,"),
        ("blade_chest:dims=abc", "setting dims='abc': Input should be a valid integer"),
        ("recalibrated:method=bogus", "setting method='bogus'"),
        ("elo:k=abc", "setting k='abc'"),
        ('recalibrated:base=blade_chest,base_settings={"dimz":1}', "unknown setting 'dimz'"),
    ],
)
def test_bad_model_settings_are_one_line(events_file: Path, spec: str, expected: str) -> None:
    _one_line_error(runner.invoke(app, ["replay", str(events_file), "-m", spec]), expected)


def test_metrics_port_in_use_is_one_line_at_serve_start(tmp_path: Path) -> None:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        cfg = _write_config(tmp_path / "s.toml", port)
        proc = subprocess.run(
            [sys.executable, "-m", "streamrate", "serve", "-c", str(cfg)],
            capture_output=True,
            text=True,
            timeout=120,
            cwd=tmp_path,
        )
    assert proc.returncode == 2, proc.stderr
    assert "Traceback" not in proc.stderr
    (line,) = [x for x in proc.stderr.splitlines() if x.startswith("error: ")]
    assert f"127.0.0.1:{port} is in use" in line and "metrics.port" in line


def test_warm_compiles_and_says_where_the_cache_is() -> None:
    res = runner.invoke(app, ["warm"])
    assert res.exit_code == 0, res.output
    assert "model kernels ready" in res.stdout and "cache:" in res.stdout
