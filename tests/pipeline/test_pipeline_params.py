import tomllib
from pathlib import Path

import pytest

from lasecyto.exceptions import InputError
from lasecyto.pipeline import DEFAULT_PARAMETERS, load_recipe, resolve_parameters

RECIPE = Path(__file__).resolve().parents[2] / "pipelines" / "fabry_perot_timelapse.toml"
RECIPES = sorted(RECIPE.parent.glob("*.toml"))


def test_shipped_recipe_equals_the_defaults():
    # the recipe file documents the defaults; the two must not drift apart
    with open(RECIPE, "rb") as fh:
        recipe = tomllib.load(fh)
    assert recipe == DEFAULT_PARAMETERS


@pytest.mark.parametrize("path", RECIPES, ids=lambda p: p.name)
def test_every_recipe_is_valid_complete_per_stage_and_commented(path):
    # a recipe of an experiment type holds the stages that type uses: every stage it names lists
    # every key of that stage, the values resolve without a problem, and every key line has a comment
    assert {p.name for p in RECIPES} >= {"fabry_perot_timelapse.toml", "sphere_timelapse.toml",
                                         "pump_threshold_series.toml", "pattern_timelapse.toml"}
    with open(path, "rb") as fh:
        recipe = tomllib.load(fh)
    for stage, values in recipe.items():
        assert set(values) == set(DEFAULT_PARAMETERS[stage]), f"{path.name}: [{stage}] is incomplete"
    resolve_parameters(recipe, source=path.name)
    for line in path.read_text().splitlines():
        if "=" in line.split("#", 1)[0] and not line.lstrip().startswith(("#", "[")):
            assert "#" in line.split("=", 1)[1], f"{path.name}: no comment on '{line}'"


def test_overrides_apply_in_order():
    p = resolve_parameters({"lines": {"snr_min": 7}}, {"lines": {"snr_min": 8.5}})
    assert p["lines"]["snr_min"] == 8.5
    assert isinstance(p["lines"]["snr_min"], float)
    assert DEFAULT_PARAMETERS["lines"]["snr_min"] == 5.0  # defaults untouched


def test_every_problem_is_reported_at_once():
    with pytest.raises(InputError) as info:
        resolve_parameters({"lines": {"snr_mn": 3, "shape": 4}, "colour": {}}, source="exp.toml")
    msg = str(info.value)
    assert "\n" not in msg
    assert msg.startswith("exp.toml")
    assert "lines.snr_mn: unknown parameter" in msg
    assert "lines.shape: expected a string, found 4" in msg
    assert "colour: unknown stage" in msg


def test_missing_recipe_file(tmp_path):
    with pytest.raises(InputError, match="recipe not found"):
        load_recipe(tmp_path / "nope.toml")
