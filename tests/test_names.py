"""The invented world's names read as invented: no real word, given name, tier or brand."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest

from streamrate.simulate import PRESETS, STYLE_NAMES, handles, world_spec

README = Path(__file__).resolve().parents[1] / "README.md"


def _words(text: str) -> list[str]:
    return text.split()


# A short deny-list written from memory (no outside source): common given names,
# common English words (animals, titles, roles a game might use), rank tiers of
# competitive ladders, and company or brand names. Words of four letters or more
# must not appear anywhere in a name; shorter ones must not be the whole name.
GIVEN_NAMES = _words("""
anna maria john james david michael sarah emma olivia liam noah lucas mia leo max sam
alex tom kate eva ivan oscar hugo lena nora ella ava luna morvenn tuvrenn bravik karl
erik lars nils sven ingrid astrid freya elsa otto hans mark paul peter anne jane mary
lisa lucy rosa vera zoe yara ines omar ali ahmed chen wei yuki kenji hiro raj priya
""")
ENGLISH_WORDS = _words("""
the and man king queen star fire storm wolf hawk tiger dragon shadow ghost ninja hero
kelvash falcon raven eagle owl fox bear lion snake viper cobra motor rotor dunkel
lancer warden trickster sapper drifter herald seer knight hunter mage rogue tank
healer sniper blade chest lord lady duke baron saint devil demon angel god love hate
kill dead death blood sex war gun bomb
""")
RANK_TIERS = _words("""
bronze silver gold platinum diamond master grandmaster champion legend guardian
crusader archon ancient divine immortal iron radiant ascendant elite emerald onyx
""")
BRANDS = _words("""
sony nike apple google amazon tesla intel nokia kodak rolex lego ikea adidas puma
umbro oracle cisco visa shell ford honda audi volvo fiat canon nikon epson xerox uber
netflix valve riot blizzard sega atari nintendo xbox steam twitch discord yahoo
samsung lenovo asus acer dell bosch siemens bayer nestle pepsi cola mars zara gucci
prada rolls jeep opel seat skoda lada dacia kia mazda suzuki yamaha vespa
""")
DENY = GIVEN_NAMES + ENGLISH_WORDS + RANK_TIERS + BRANDS


def denied(name: str) -> list[str]:
    low = name.lower()
    return [w for w in DENY if (w in low if len(w) >= 4 else low == w)]


def readme_worlds() -> list[tuple[str, dict[str, int]]]:
    """Every ``streamrate simulate`` command shown in the README, plus the demo's world."""
    worlds: list[tuple[str, dict[str, int]]] = [("cyclic", {"entities": 40, "seed": 7})]
    for line in re.findall(r"streamrate simulate ([^\n&|]*)", README.read_text("utf-8")):
        preset = re.search(r"--world\s+(\w+)", line)
        knobs = {
            k.replace("-", "_"): int(v)
            for k, v in re.findall(r"--(seed|entities|matches)\s+(\d+)", line)
        }
        worlds.append((preset.group(1) if preset else "plain", knobs))
    return worlds


def test_the_readme_shows_simulated_worlds() -> None:
    assert len(readme_worlds()) >= 4


@pytest.mark.parametrize("preset", sorted(PRESETS))
def test_handles_and_styles_of_every_world_are_invented(preset: str) -> None:
    worlds = [(preset, {})] + [w for w in readme_worlds() if w[0] == preset]
    for name, knobs in worlds:
        spec = world_spec(name, **{k: v for k, v in knobs.items() if k != "matches"})
        for handle in handles(spec.entities, np.random.default_rng(spec.seed)):
            assert not denied(handle), f"{name} seed {spec.seed}: {handle} {denied(handle)}"
    for style in STYLE_NAMES:
        assert not denied(style), f"play style {style}: {denied(style)}"


def test_the_deny_list_catches_what_it_should() -> None:
    assert denied("goldfish") == ["gold"] and denied("Max") == ["max"]
    assert denied("maxwell") == [] and denied("vashquon") == []


def test_handles_are_generated_from_the_seed_not_fixed() -> None:
    a = handles(6, np.random.default_rng(1))
    b = handles(6, np.random.default_rng(2))
    assert len(set(a)) == 6 and not set(a) & set(b)
    assert handles(6, np.random.default_rng(1)) == a
    assert all(re.fullmatch(r"[a-z]+", h) for h in handles(2000, np.random.default_rng(3)))
    assert len(set(handles(2000, np.random.default_rng(3)))) == 2000
