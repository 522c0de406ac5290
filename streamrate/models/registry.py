"""Built-in models by name, and building a model from a name plus settings.

Modules are imported on first use so that one family's import cost (a compiled
kernel, say) is only paid by those who use it.
"""

from __future__ import annotations

import importlib
from typing import Any

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
    """Build a model by name; unknown settings fail with a message naming them."""
    cls = model_class(kind)
    try:
        return cls(**settings)
    except TypeError as exc:
        raise ConfigError(f"model {kind!r}: {exc}") from exc


def model_from_state(state: ModelState) -> Model:
    return model_class(state.kind).from_state(state)
