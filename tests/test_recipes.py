"""Model recipes: lookup, validation with clear errors, prior descriptions."""
from __future__ import annotations

import math
from pathlib import Path

import pytest

from smootharea.recipes import (STRUCTURES, RecipeError, available_recipes, load_recipe,
                                parse_recipe)

SHIPPED = ("exchangeable", "icar", "bym", "bym2", "poisson_gamma")


@pytest.mark.parametrize("name", SHIPPED)
def test_every_shipped_recipe_loads_and_describes_each_prior(name):
    recipe = load_recipe(name)
    assert recipe.name == name and recipe.structure in STRUCTURES
    lines = recipe.describe_priors()
    assert len(lines) == len(recipe.priors)
    assert all(line.split(":")[0] in recipe.priors for line in lines)
    assert recipe.to_dict()["priors"].keys() == recipe.priors.keys()


def test_shipped_names_are_listed():
    assert set(SHIPPED) <= set(available_recipes())


def test_default_sigma_prior_is_the_pc_exponential():
    # Simpson et al. 2017 (Statistical Science 32): P(sigma > U) = a gives
    # Exponential(rate -ln(a)/U); U = 1, a = 0.01 -> rate 4.605 (METHODS.md section 3).
    recipe = load_recipe("bym2")
    assert recipe.priors["sigma"].exponential_rate == pytest.approx(-math.log(0.01))
    # Riebler et al. 2016 default for phi: P(phi < 0.5) = 2/3.
    phi = recipe.priors["phi"].params
    assert phi["threshold"] == 0.5 and phi["probability_below"] == pytest.approx(2 / 3)
    assert "P(sigma > 1) = 0.01" in recipe.describe_priors()[2]


def _write(folder: Path, text: str, name: str = "mine.toml") -> Path:
    path = folder / name
    path.write_text(text, encoding="utf-8")
    return path


EXCHANGEABLE = """
[recipe]
name = "mine"
structure = "exchangeable"
[priors.intercept]
kind = "normal"
mean = 0
sd = 2
[priors.coefficients]
kind = "normal"
mean = 0
sd = 1
[priors.sigma]
kind = "fixed"
value = 0.5
"""


def test_recipe_path_is_relative_to_the_job_folder(tmp_path):
    (tmp_path / "recipes").mkdir()
    _write(tmp_path / "recipes", EXCHANGEABLE)
    recipe = load_recipe("recipes/mine.toml", base_dir=tmp_path)
    assert recipe.priors["sigma"].kind == "fixed"
    assert recipe.priors["sigma"].params["value"] == 0.5
    assert recipe.sampler.target_accept == 0.8  # default when [sampler] is absent
    assert "fixed at 0.5" in recipe.describe_priors()[2]


def test_unknown_key_names_file_and_key(tmp_path):
    path = _write(tmp_path, EXCHANGEABLE.replace("sd = 2", "sd = 2\nwidth = 3"))
    with pytest.raises(RecipeError, match=r"mine\.toml.*'width'"):
        load_recipe(str(path))


def test_missing_prior_is_named(tmp_path):
    text = EXCHANGEABLE.split("[priors.sigma]")[0]
    with pytest.raises(RecipeError, match=r"\[priors\.sigma\]"):
        load_recipe(str(_write(tmp_path, text)))


def test_prior_not_allowed_for_structure_is_rejected(tmp_path):
    text = EXCHANGEABLE + '[priors.phi]\nkind = "pc_mixing"\nthreshold = 0.5\nprobability_below = 0.6\n'
    with pytest.raises(RecipeError, match="'phi'"):
        load_recipe(str(_write(tmp_path, text)))


@pytest.mark.parametrize("bad, message", [
    ("sd = -2", "'sd' must be positive"),
    ('sd = "two"', "'sd' must be a finite number"),
])
def test_bad_values_are_explained(tmp_path, bad, message):
    path = _write(tmp_path, EXCHANGEABLE.replace("sd = 2", bad))
    with pytest.raises(RecipeError, match=message):
        load_recipe(str(path))


def test_bad_structure_and_target_accept(tmp_path):
    with pytest.raises(RecipeError, match="structure must be one of"):
        parse_recipe({"recipe": {"name": "x", "structure": "car"}}, source="x.toml")
    text = EXCHANGEABLE + "[sampler]\ntarget_accept = 1.5\n"
    with pytest.raises(RecipeError, match="target_accept"):
        load_recipe(str(_write(tmp_path, text)))


def test_unknown_name_lists_the_shipped_recipes():
    with pytest.raises(RecipeError, match="bym2"):
        load_recipe("no_such_recipe")


def test_override_keeps_validation():
    recipe = load_recipe("exchangeable").with_prior("sigma", "fixed", value=0.01)
    assert recipe.priors["sigma"].params["value"] == 0.01
    with pytest.raises(RecipeError, match="tail_probability"):
        recipe.with_prior("sigma", "pc_sd", upper=1.0, tail_probability=2.0)
