"""`streamrate simulate` and `streamrate replay` through the typer test runner."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from streamrate.cli import app
from streamrate.errors import ConfigError
from streamrate.modelspec import ModelSpec, parse_model_spec, specs_from_toml

runner = CliRunner()
KEYS = {
    "kind",
    "settings",
    "n",
    "log_loss",
    "brier",
    "accuracy",
    "ece",
    "calibration_slope",
    "calibration_intercept",
    "floor_log_loss",
    "log_loss_diff_ci",
}


@pytest.fixture(scope="module")
def world_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("w") / "quill.jsonl"
    res = runner.invoke(
        app,
        ["simulate", "--world", "cyclic", "--entities", "16", "--matches", "1200",
         "--seed", "77", "--out", str(out)],
    )  # fmt: skip
    assert res.exit_code == 0, res.output
    assert "floor" in res.stderr
    return out


def test_simulate_writes_events_and_truth(world_file: Path) -> None:
    lines = world_file.read_text().splitlines()
    assert len(lines) == 1200
    truth = json.loads(Path(f"{world_file}.truth.json").read_text())
    assert truth["world"]["styles"] == 3 and len(truth["expected_score"]) == 1200


def test_simulate_is_reproducible(tmp_path: Path) -> None:
    args = ["simulate", "--matches", "200", "--entities", "10", "--seed", "3", "--no-truth"]
    runner.invoke(app, [*args, "--out", str(tmp_path / "a.jsonl")])
    runner.invoke(app, [*args, "--out", str(tmp_path / "b.jsonl")])
    assert (tmp_path / "a.jsonl").read_bytes() == (tmp_path / "b.jsonl").read_bytes()
    assert not (tmp_path / "a.jsonl.truth.json").exists()


def test_simulate_bad_knob_is_a_clean_error(tmp_path: Path) -> None:
    res = runner.invoke(app, ["simulate", "--draw-rate", "1.5", "--out", str(tmp_path / "x.jsonl")])
    assert res.exit_code == 2 and "draw_rate" in res.stderr


def test_replay_json_schema(world_file: Path) -> None:
    res = runner.invoke(
        app,
        ["replay", str(world_file), "--model", "elo", "--model", "hot=elo:k=48", "--json"],
    )
    assert res.exit_code == 0, res.stderr
    doc = json.loads(res.stdout)
    assert list(doc) == ["elo", "hot"]
    for row in doc.values():
        assert set(row) >= KEYS
        assert row["n"] == 1200
        assert 0.0 < row["log_loss"] < 1.0 and 0.0 <= row["ece"] <= 1.0
        assert row["floor_log_loss"] < row["log_loss"]
    assert doc["elo"]["log_loss_diff_ci"] is None
    ci = doc["hot"]["log_loss_diff_ci"]
    assert ci["versus"] == "elo" and ci["resamples"] == 2000 and ci["level"] == 0.95
    assert doc["hot"]["settings"] == {"k": 48}


def test_replay_table_and_burn_in_count(world_file: Path) -> None:
    res = runner.invoke(app, ["replay", str(world_file), "-m", "elo", "--burn-in", "1000"])
    assert res.exit_code == 0, res.stderr
    assert "scored 200 of 1200 events" in res.stdout
    assert "floor (true probabilities)" in res.stdout


def test_replay_burn_in_date(world_file: Path) -> None:
    # The cyclic preset spans 60 days from 2026-03-01: half way is 2026-03-31.
    res = runner.invoke(
        app, ["replay", str(world_file), "-m", "elo", "--burn-in", "2026-03-31", "--json"]
    )
    assert res.exit_code == 0, res.stderr
    n = json.loads(res.stdout)["elo"]["n"]
    assert 450 < n < 750
    res = runner.invoke(app, ["replay", str(world_file), "-m", "elo", "--burn-in", "2027-01-01"])
    assert res.exit_code == 2 and "no event to score" in res.stderr


def test_replay_bad_line_names_the_line(tmp_path: Path, world_file: Path) -> None:
    lines = world_file.read_text().splitlines()[:5]
    lines[3] = lines[3].replace('"first":[', '"first":[42,')
    bad = tmp_path / "bad.jsonl"
    bad.write_text("\n".join(lines) + "\n")
    res = runner.invoke(app, ["replay", str(bad), "-m", "elo"])
    assert res.exit_code == 2
    assert "bad.jsonl:4: first" in res.stderr


def test_replay_unknown_model_and_missing_file(world_file: Path, tmp_path: Path) -> None:
    res = runner.invoke(app, ["replay", str(world_file), "-m", "nonesuch"])
    assert res.exit_code == 2 and "unknown model 'nonesuch'" in res.stderr
    res = runner.invoke(app, ["replay", str(world_file)])
    assert res.exit_code == 2 and "no models" in res.stderr
    res = runner.invoke(app, ["replay", str(tmp_path / "none.jsonl"), "-m", "elo"])
    assert res.exit_code == 2 and "cannot read" in res.stderr


def test_replay_plot_writes_png(world_file: Path, tmp_path: Path) -> None:
    pytest.importorskip("matplotlib")
    png = tmp_path / "rel.png"
    res = runner.invoke(
        app, ["replay", str(world_file), "-m", "elo", "-m", "glicko2", "--plot", str(png)]
    )
    assert res.exit_code == 0, res.stderr
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert png.stat().st_size > 10_000


def test_replay_config_file(world_file: Path, tmp_path: Path) -> None:
    toml = tmp_path / "m.toml"
    toml.write_text('[models.elo]\nk = 20.0\n\n[models.slow]\nkind = "elo"\nk = 8.0\n')
    res = runner.invoke(app, ["replay", str(world_file), "--config", str(toml), "--json"])
    assert res.exit_code == 0, res.stderr
    doc = json.loads(res.stdout)
    assert doc["slow"]["kind"] == "elo" and doc["slow"]["settings"] == {"k": 8.0}


def test_shipped_configs_build() -> None:
    root = Path(__file__).resolve().parent.parent / "configs"
    for f in (root / "default.toml", root / "blade_chest.toml"):
        for spec in specs_from_toml(f):
            spec.build()


def test_model_spec_syntax() -> None:
    assert parse_model_spec("elo") == ModelSpec("elo", "elo", {})
    assert parse_model_spec("blade_chest:dims=16,lr=0.05,draws=true,context=map") == ModelSpec(
        "blade_chest", "blade_chest", {"dims": 16, "lr": 0.05, "draws": True, "context": "map"}
    )
    assert parse_model_spec("w=blade_chest:dims=32").label == "w"
    for bad in ("elo:k", "elo:k=1,k=2", "=elo", ":k=1"):
        with pytest.raises(ConfigError):
            parse_model_spec(bad)


_names = st.from_regex(r"[a-z][a-z0-9_]{0,11}", fullmatch=True)
_values = st.one_of(
    st.integers(-(10**6), 10**6),
    st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False),
    st.booleans(),
    st.from_regex(r"[a-z][a-z_]{0,7}", fullmatch=True).filter(
        lambda s: s not in ("true", "false", "null")
    ),
)


@settings(max_examples=80, deadline=None)
@given(_names, _names, st.dictionaries(_names, _values, max_size=5))
def test_model_spec_round_trips(label: str, kind: str, params: dict[str, object]) -> None:
    body = ",".join(
        f"{k}={json.dumps(v) if not isinstance(v, str) else v}" for k, v in params.items()
    )
    spec = parse_model_spec(f"{label}={kind}:{body}")
    assert spec == ModelSpec(label, kind, params)


def test_all_models_runs_every_builtin_but_the_challenger_wrapper(world_file: Path) -> None:
    from streamrate.models.registry import BUILTIN

    res = runner.invoke(app, ["replay", str(world_file), "--all-models", "--json"])
    assert res.exit_code == 0, res.output
    report = json.loads(res.stdout)
    assert set(report) == set(BUILTIN) - {"challengers"}
    assert all(report[k]["n"] == 1200 for k in report)
