"""Every recipe in pipelines/ is valid, lists whole stages and comments every key."""

import tomllib
from pathlib import Path

import pytest

from lasecyto.pipeline import DEFAULT_PARAMETERS, load_recipe, resolve_parameters

RECIPES = sorted((Path(__file__).resolve().parents[2] / "pipelines").glob("*.toml"))


@pytest.mark.parametrize("path", RECIPES, ids=lambda p: p.name)
def test_recipe_is_valid_and_complete(path):
    recipe = load_recipe(path)
    resolve_parameters(recipe, source=str(path))  # raises on an unknown stage or key or a wrong type
    for stage, values in recipe.items():
        assert set(values) == set(DEFAULT_PARAMETERS[stage]), f"{path.name} [{stage}] lists only some keys"
    for line in path.read_text().splitlines():
        if "=" in line and not line.lstrip().startswith("#"):
            assert "#" in line, f"{path.name}: key without a comment: {line}"


def test_pattern_recipe_judges_patterns():
    with open(RECIPES[[p.name for p in RECIPES].index("pattern_timelapse.toml")], "rb") as fh:
        recipe = tomllib.load(fh)
    assert recipe["flags"]["feature"] == "pc_change" and recipe["flags"]["min_effect"] > 0
    assert "lines" not in recipe and "calibration" not in recipe
