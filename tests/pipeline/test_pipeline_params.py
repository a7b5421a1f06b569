import importlib.resources
import shutil
import tomllib
from pathlib import Path

import pytest

from lasecyto.exceptions import InputError
from lasecyto.pipeline import (DEFAULT_PARAMETERS, builtin_recipes, check_experiment, find_recipe, load_recipe,
                               resolve_parameters)

ROOT = Path(__file__).resolve().parents[2]
RECIPE = ROOT / "pipelines" / "fabry_perot_timelapse.toml"


def test_shipped_recipe_equals_the_defaults():
    # the recipe file documents the defaults; the two must not drift apart
    with open(RECIPE, "rb") as fh:
        recipe = tomllib.load(fh)
    assert recipe == DEFAULT_PARAMETERS


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


# ---- built-in recipes, recipe lookup and validation of manifest + recipe together ----


def test_packaged_recipes_equal_the_user_facing_copies():
    # pipelines/ is what users read; the package ships the same files (tools/sync_recipes.py copies them)
    top = {p.name: p.read_bytes() for p in (ROOT / "pipelines").glob("*.toml")}
    packaged = {p.name + ".toml": p.read_bytes() for p in map(Path, builtin_recipes().values())}
    packaged = {name[:-5]: data for name, data in packaged.items()}
    assert sorted(packaged) == sorted(top), "run tools/sync_recipes.py"
    for name, data in top.items():
        assert packaged[name] == data, f"{name} differs from the packaged copy: run tools/sync_recipes.py"


def test_recipes_are_package_data():
    # found after a non-editable install: the wheel's package data must include them
    with open(ROOT / "pyproject.toml", "rb") as fh:
        project = tomllib.load(fh)
    assert "recipes/*.toml" in project["tool"]["setuptools"]["package-data"]["lasecyto.pipeline"]
    root = importlib.resources.files("lasecyto.pipeline") / "recipes"
    assert (root / "fabry_perot_timelapse.toml").is_file()


def test_every_builtin_recipe_is_valid():
    for name, path in builtin_recipes().items():
        resolve_parameters(load_recipe(path), source=str(path))
        assert find_recipe(name) == path == find_recipe(name + ".toml")


def test_recipe_lookup(tmp_path):
    mine = tmp_path / "mine.toml"
    mine.write_text("[lines]\nsnr_min = 6.0\n")
    assert find_recipe("mine.toml", base_dir=tmp_path) == mine
    assert load_recipe("fabry_perot_timelapse") == DEFAULT_PARAMETERS
    with pytest.raises(InputError) as info:
        find_recipe("no_such_recipe", base_dir=tmp_path)
    assert "fabry_perot_timelapse" in str(info.value)  # the message lists the built-in names


@pytest.fixture()
def manifest_copy(small_experiment, tmp_path):
    dst = tmp_path / "experiment"
    shutil.copytree(small_experiment.parent, dst)
    return dst / small_experiment.name


def _with(manifest, experiment_extra="", tail=""):
    text = manifest.read_text().replace("[experiment]\n", "[experiment]\n" + experiment_extra, 1)
    manifest.write_text(text + tail)
    return manifest


def test_manifest_names_its_recipe_and_overrides_it(manifest_copy):
    (manifest_copy.parent / "strict.toml").write_text("[lines]\nsnr_min = 7.0\n[tracks]\nmax_gap_frames = 5\n")
    m = _with(manifest_copy, 'recipe = "strict.toml"\n', "\n[parameters.tracks]\nmax_gap_frames = 2\n")
    plan = check_experiment(m)
    assert plan.recipe == manifest_copy.parent / "strict.toml" and plan.recipe_origin == "manifest"
    assert plan.parameters["lines"]["snr_min"] == 7.0         # from the recipe
    assert plan.parameters["tracks"]["max_gap_frames"] == 2   # the manifest overrides the recipe
    # --recipe wins over the manifest's recipe; the manifest's [parameters] still apply
    plan = check_experiment(m, recipe="fabry_perot_timelapse")
    assert plan.recipe_origin == "command line"
    assert plan.parameters["lines"]["snr_min"] == DEFAULT_PARAMETERS["lines"]["snr_min"]
    assert plan.parameters["tracks"]["max_gap_frames"] == 2


def test_builtin_recipe_by_name_in_the_manifest(manifest_copy):
    plan = check_experiment(_with(manifest_copy, 'recipe = "fabry_perot_timelapse"\n'))
    assert plan.recipe == builtin_recipes()["fabry_perot_timelapse"]
    assert plan.parameters == DEFAULT_PARAMETERS


def test_every_problem_of_manifest_and_recipe_at_once(manifest_copy):
    recipe = manifest_copy.parent / "bad_recipe.toml"
    recipe.write_text('[lines]\nsnr_min = "high"\n[tracks]\nmax_gap = 3\n')
    m = _with(manifest_copy, 'recipe = "bad_recipe.toml"\n',
              '\n[parameters.lasing]\nmax_fwhm_px = true\n[parameters.colour]\nred = 1\n')
    text = m.read_text().replace('dish = "B"\nstack', 'dish = "Z"\nstack', 1)  # a cell in an unknown dish
    m.write_text(text)
    with pytest.raises(InputError) as info:
        check_experiment(m)
    msg = str(info.value)
    assert "\n" not in msg
    assert msg.startswith("5 problems")
    # each problem names its file, its key, what was expected and what was found
    assert f"{m}: " in msg and " in the manifest: " in msg
    assert "cells[3].dish: unknown dish (expected one of ['A', 'B'], found 'Z')" in msg
    assert f"{recipe}: lines.snr_min: expected a finite number, found 'high'" in msg
    assert f"{recipe}: tracks.max_gap: unknown parameter (expected one of" in msg
    assert f"{m}: parameters.lasing.max_fwhm_px: expected a finite number, found True" in msg
    assert f"{m}: parameters.colour: unknown stage (expected one of" in msg


def test_missing_recipe_named_in_the_manifest(manifest_copy):
    m = _with(manifest_copy, 'recipe = "nowhere.toml"\n')
    with pytest.raises(InputError) as info:
        check_experiment(m)
    msg = str(info.value)
    assert str(m) in msg and "experiment.recipe" in msg and "recipe not found" in msg
