"""Built-in models by name, and building a model from a name plus settings.

Modules are imported on first use so that one family's import cost (a compiled
kernel, say) is only paid by those who use it.
"""

from __future__ import annotations

import contextlib
import functools
import importlib
import inspect
import typing
from typing import Any

from pydantic import TypeAdapter, ValidationError
from pydantic.errors import PydanticSchemaGenerationError

from streamrate.errors import ConfigError
from streamrate.models.base import Model, ModelState

# name -> "module:Class"; the name is also the model's ``kind`` in saved states.
BUILTIN: dict[str, str] = {
    "elo": "streamrate.models.elo:Elo",
    "glicko2": "streamrate.models.glicko2:Glicko2",
    "trueskill": "streamrate.models.trueskill:TrueSkill",
    "head_to_head": "streamrate.models.head_to_head:HeadToHead",
    "logistic_batch": "streamrate.models.logistic_batch:LogisticBatch",
    "bradley_terry": "streamrate.models.matchup:BradleyTerry",
    "blade_chest": "streamrate.models.matchup:BladeChest",
    "blade_chest_dist": "streamrate.models.matchup:BladeChestDistance",
    "bayes_strength": "streamrate.models.bayes_strength:BayesStrength",
    "kalman_strength": "streamrate.models.kalman_strength:KalmanStrength",
    "margin_strength": "streamrate.models.margin_strength:MarginStrength",
    "mixture": "streamrate.models.mixture:Mixture",
    "recalibrated": "streamrate.recalibrate:Recalibrated",
    "challengers": "streamrate.challengers:ChallengerSet",
}


def model_class(kind: str) -> type[Model]:
    try:
        target = BUILTIN[kind]
    except KeyError:
        known = ", ".join(sorted(BUILTIN))
        raise ConfigError(f"unknown model {kind!r}; built-in models: {known}") from None
    module, _, cls = target.partition(":")
    return getattr(importlib.import_module(module), cls)  # type: ignore[no-any-return]


def build_model(kind: str, **settings: Any) -> Model:
    """Build a model by name; an unknown or mistyped setting fails with a message naming it.

    >>> try:
    ...     build_model("elo", kk=16)
    ... except ConfigError as exc:
    ...     print(str(exc).split("; ")[0])
    unknown setting 'kk' for model elo
    """
    cls = model_class(kind)
    _check_settings(kind, cls, settings)
    try:
        return cls(**settings)
    except ConfigError:
        raise
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"model {kind}: {exc}") from exc


def _check_settings(kind: str, cls: type[Model], settings: dict[str, Any]) -> None:
    """Names against the constructor's parameters, values against their annotations."""
    params: list[str] = []
    hints: dict[str, Any] = {}
    for klass in cls.__mro__:  # a subclass taking **settings passes them on to its base
        if klass is object or "__init__" not in vars(klass):
            continue
        init = vars(klass)["__init__"]
        sig = inspect.signature(init).parameters.values()
        params += [
            p.name
            for p in sig
            if p.name != "self" and p.kind in (p.POSITIONAL_OR_KEYWORD, p.KEYWORD_ONLY)
        ]
        # An annotation that cannot be resolved only means no type check for it.
        with contextlib.suppress(NameError, TypeError):
            hints = {**typing.get_type_hints(init), **hints}
        if not any(p.kind == p.VAR_KEYWORD for p in sig):
            break
    for name in settings:
        if name not in params:
            known = ", ".join(dict.fromkeys(params)) or "none"
            raise ConfigError(f"unknown setting {name!r} for model {kind}; known: {known}")
    for name, value in settings.items():
        hint = hints.get(name)
        if hint is None:
            continue
        try:
            _adapter(hint).validate_python(value)
        except ValidationError as exc:
            why = exc.errors(include_url=False)[0]["msg"]
            raise ConfigError(f"model {kind}: setting {name}={value!r}: {why}") from None
        except PydanticSchemaGenerationError:
            continue


@functools.cache
def _adapter(hint: Any) -> TypeAdapter[Any]:
    return TypeAdapter(hint)


def model_from_state(state: ModelState) -> Model:
    return model_class(state.kind).from_state(state)
