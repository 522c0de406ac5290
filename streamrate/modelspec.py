"""Which models to run, from a command-line string or a TOML file.

A command-line spec is ``[LABEL=]KIND[:KEY=VALUE,KEY=VALUE...]``:

* ``elo`` - the built-in ``elo`` with its default settings, labelled ``elo``;
* ``blade_chest:dims=16,lr=0.05`` - two settings replaced;
* ``wide=blade_chest:dims=32`` - the same kind under the label ``wide`` (labels
  keep two variants of one kind apart in a report).

A value is read as JSON when it parses (``16``, ``0.05``, ``true``, ``"x"``,
``[1, 2]``) and as a plain string otherwise.

A TOML file has one table per model under ``models``; the table name is the
label and ``kind`` defaults to it::

    [models.elo]
    k = 24.0

    [models.wide]
    kind = "blade_chest"
    dims = 32

>>> parse_model_spec("wide=blade_chest:dims=32,lr=0.05")
ModelSpec(label='wide', kind='blade_chest', settings={'dims': 32, 'lr': 0.05})
"""

from __future__ import annotations

import json
import tomllib
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from streamrate.errors import ConfigError
from streamrate.models.base import Model


@dataclass(frozen=True)
class ModelSpec:
    """A label, a built-in model kind and the settings to build it with."""

    label: str
    kind: str
    settings: dict[str, Any] = field(default_factory=dict)

    def build(self) -> Model:
        from streamrate.models.registry import build_model

        return build_model(self.kind, **self.settings)


def _value(text: str) -> Any:
    try:
        return json.loads(text)
    except json.JSONDecodeError:
        return text


def parse_model_spec(text: str) -> ModelSpec:
    """Read ``[LABEL=]KIND[:KEY=VALUE,...]`` (see the module docstring)."""
    head, sep, tail = text.strip().partition(":")
    label, eq, kind = head.partition("=")
    if not eq:
        label, kind = head, head
    label, kind = label.strip(), kind.strip()
    if not kind or not label:
        raise ConfigError(f"model {text!r}: expected [LABEL=]KIND[:KEY=VALUE,...]")
    settings: dict[str, Any] = {}
    if sep:
        for part in tail.split(","):
            if not part.strip():
                continue
            key, eq, raw = part.partition("=")
            key = key.strip()
            if not eq or not key:
                raise ConfigError(f"model {text!r}: setting {part.strip()!r} is not KEY=VALUE")
            if key in settings:
                raise ConfigError(f"model {text!r}: setting {key!r} is given twice")
            settings[key] = _value(raw.strip())
    return ModelSpec(label, kind, settings)


def specs_from_toml(path: Path | str) -> list[ModelSpec]:
    """The models of a TOML file, in file order (see the module docstring)."""
    try:
        with open(path, "rb") as fh:
            doc = tomllib.load(fh)
    except OSError as exc:
        raise ConfigError(f"cannot read model config {path}: {exc}") from exc
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML: {exc}") from exc
    models = doc.get("models")
    if not isinstance(models, dict) or not models:
        raise ConfigError(f"{path}: expected at least one [models.LABEL] table")
    extra = set(doc) - {"models"}
    if extra:
        raise ConfigError(f"{path}: unknown top-level key {sorted(extra)[0]!r}")
    out = []
    for label, table in models.items():
        if not isinstance(table, dict):
            raise ConfigError(f"{path}: models.{label} must be a table")
        settings = dict(table)
        kind = settings.pop("kind", label)
        if not isinstance(kind, str):
            raise ConfigError(f"{path}: models.{label}.kind must be a string")
        out.append(ModelSpec(label, kind, settings))
    return out


# A challenger set with default settings only repeats its first member.
_NOT_ON_THEIR_OWN = frozenset({"challengers"})


def builtin_specs() -> list[ModelSpec]:
    """Every built-in model with its default settings, labelled by kind."""
    from streamrate.models.registry import BUILTIN

    return [ModelSpec(kind, kind) for kind in BUILTIN if kind not in _NOT_ON_THEIR_OWN]


def unique_specs(specs: Iterable[ModelSpec]) -> list[ModelSpec]:
    """Check that labels are distinct (a report is keyed by label)."""
    out: list[ModelSpec] = []
    seen: set[str] = set()
    for spec in specs:
        if spec.label in seen:
            raise ConfigError(f"model label {spec.label!r} is used twice; use LABEL=KIND")
        seen.add(spec.label)
        out.append(spec)
    return out
