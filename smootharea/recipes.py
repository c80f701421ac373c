"""Model recipes: declarative TOML files naming a random-effect structure, its priors
and sampler defaults.

A recipe is found by path (relative to the job's folder) or by bare name, looked up
first in the repository's top-level ``models/`` folder (checkouts, editable installs)
and then in ``smootharea/recipes_shipped`` (wheels force-include ``models/`` there).
Every key is checked here, once; the model builder trusts a loaded :class:`Recipe`.
"""
from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path
from types import MappingProxyType
from typing import Any, Mapping

STRUCTURES = ("exchangeable", "icar", "bym", "bym2", "poisson_gamma")

# Which priors each structure needs (and accepts).
PRIORS_BY_STRUCTURE: dict[str, tuple[str, ...]] = {
    "exchangeable": ("intercept", "coefficients", "sigma"),
    "icar": ("intercept", "coefficients", "sigma"),
    "bym": ("intercept", "coefficients", "sigma_spatial", "sigma_unstructured"),
    "bym2": ("intercept", "coefficients", "sigma", "phi"),
    "poisson_gamma": ("relative_risk",),
}

# Which prior kinds each parameter may take, and the numeric keys each kind needs.
KINDS_BY_PARAMETER: dict[str, tuple[str, ...]] = {
    "intercept": ("normal",),
    "coefficients": ("normal",),
    "sigma": ("pc_sd", "fixed"),
    "sigma_spatial": ("pc_sd", "fixed"),
    "sigma_unstructured": ("pc_sd", "fixed"),
    "phi": ("pc_mixing", "fixed"),
    "relative_risk": ("gamma",),
}
KIND_KEYS: dict[str, tuple[str, ...]] = {
    "normal": ("mean", "sd"),
    "pc_sd": ("upper", "tail_probability"),
    "pc_mixing": ("threshold", "probability_below"),
    "fixed": ("value",),
    "gamma": ("shape", "rate"),
}
SAMPLER_KEYS = {"target_accept": 0.8, "low_rank_mass_matrix": False}

SHIPPED_DIRS = (
    Path(__file__).resolve().parents[1] / "models",
    Path(__file__).resolve().parent / "recipes_shipped",
)


class RecipeError(Exception):
    """A recipe file is missing, unreadable or inconsistent."""


@dataclass(frozen=True)
class Prior:
    """One prior: its kind (``normal``, ``pc_sd``, ...) and numeric parameters."""

    kind: str
    params: Mapping[str, float]

    def __post_init__(self) -> None:
        object.__setattr__(self, "params", MappingProxyType(dict(self.params)))

    def to_dict(self) -> dict[str, Any]:
        return {"kind": self.kind, **self.params}

    @property
    def exponential_rate(self) -> float:
        """PC prior for an SD (Simpson et al. 2017): P(sigma > U) = a -> rate -ln(a)/U."""
        return -math.log(self.params["tail_probability"]) / self.params["upper"]


@dataclass(frozen=True)
class SamplerDefaults:
    target_accept: float = 0.8
    low_rank_mass_matrix: bool = False


@dataclass(frozen=True)
class Recipe:
    """A validated model recipe."""

    name: str
    title: str
    structure: str
    priors: Mapping[str, Prior]
    sampler: SamplerDefaults = field(default_factory=SamplerDefaults)
    source: str = ""

    def __post_init__(self) -> None:
        object.__setattr__(self, "priors", MappingProxyType(dict(self.priors)))

    @property
    def spatial(self) -> bool:
        return self.structure in ("icar", "bym", "bym2")

    def with_prior(self, parameter: str, kind: str, **params: float) -> "Recipe":
        """A copy with one prior replaced (validated like a file entry)."""
        prior = _parse_prior(parameter, {"kind": kind, **params}, f"{self.source} (override)")
        return replace(self, priors={**self.priors, parameter: prior})

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "title": self.title,
            "structure": self.structure,
            "priors": {name: prior.to_dict() for name, prior in self.priors.items()},
            "sampler": {"target_accept": self.sampler.target_accept,
                        "low_rank_mass_matrix": self.sampler.low_rank_mass_matrix},
            "source": self.source,
        }

    def describe_priors(self) -> list[str]:
        """One human-readable line per prior, for reports."""
        return [_describe(name, prior) for name, prior in self.priors.items()]


def _describe(parameter: str, prior: Prior) -> str:
    p = prior.params
    if prior.kind == "fixed":
        return f"{parameter}: fixed at {p['value']:g} (not estimated)"
    if prior.kind == "normal":
        scale = {
            "intercept": "log relative risk at the covariate means",
            "coefficients": "log rate ratio per 1 SD of each covariate (covariates standardised)",
        }.get(parameter, "")
        return f"{parameter}: Normal(mean {p['mean']:g}, SD {p['sd']:g}) on the {scale}"
    if prior.kind == "pc_sd":
        return (f"{parameter}: penalised-complexity prior (Simpson et al. 2017), "
                f"P({parameter} > {p['upper']:g}) = {p['tail_probability']:g}, "
                f"i.e. Exponential(rate {prior.exponential_rate:.4g})")
    if prior.kind == "pc_mixing":
        return (f"{parameter}: penalised-complexity prior for the spatial share "
                f"(Riebler et al. 2016), P({parameter} < {p['threshold']:g}) = "
                f"{p['probability_below']:.4g}, i.e. an exponential prior on the distance "
                "d(phi) from the exchangeable model; d(phi) from the eigenvalues of each "
                "component's scaled ICAR precision (exact up to 2000 areas per component; "
                "above that the 100 smallest exact and the rest estimated by stochastic "
                "Lanczos quadrature)")
    if prior.kind == "gamma":
        return (f"{parameter}: Gamma(shape {p['shape']:g}, rate {p['rate']:g}), "
                f"prior mean {p['shape'] / p['rate']:.4g}, fixed hyperparameters")
    raise AssertionError(f"unknown prior kind {prior.kind}")  # unreachable after validation


def load_recipe(name_or_path: str, base_dir: Path | None = None) -> Recipe:
    """Find, read and validate a recipe.

    ``name_or_path`` is a file path (relative to ``base_dir``, the job's folder) when it
    ends in ``.toml`` or contains a path separator; otherwise a bare name looked up in the
    repository ``models/`` folder, then in the packaged ``recipes_shipped`` folder.
    """
    path = _locate(name_or_path, base_dir)
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as error:
        raise RecipeError(f"{path}: not valid TOML: {error}") from error
    return parse_recipe(raw, source=str(path))


def available_recipes() -> list[str]:
    """Names of the recipes shipped with smootharea."""
    names: set[str] = set()
    for folder in SHIPPED_DIRS:
        if folder.is_dir():
            names.update(p.stem for p in folder.glob("*.toml"))
    return sorted(names)


def _locate(name_or_path: str, base_dir: Path | None) -> Path:
    looks_like_path = name_or_path.endswith(".toml") or "/" in name_or_path or "\\" in name_or_path
    if looks_like_path:
        path = Path(name_or_path)
        if not path.is_absolute():
            path = (base_dir or Path.cwd()) / path
        if not path.is_file():
            raise RecipeError(f"{path}: recipe file not found")
        return path.resolve()
    for folder in SHIPPED_DIRS:
        candidate = folder / f"{name_or_path}.toml"
        if candidate.is_file():
            return candidate
    raise RecipeError(f"no recipe named {name_or_path!r}; shipped recipes are "
                      f"{', '.join(available_recipes()) or '(none found)'}, or give a path to a .toml file")


def parse_recipe(raw: dict[str, Any], source: str = "recipe") -> Recipe:
    """Validate the TOML tables of a recipe; errors name the file and the key."""
    _reject_unknown(raw, {"recipe", "priors", "sampler"}, source, "top-level table")
    head = raw.get("recipe")
    if not isinstance(head, dict):
        raise RecipeError(f"{source}: needs a [recipe] table with 'name' and 'structure'")
    _reject_unknown(head, {"name", "title", "structure"}, source, "[recipe] key")
    structure = head.get("structure")
    if structure not in STRUCTURES:
        raise RecipeError(f"{source}: [recipe] structure must be one of "
                          f"{', '.join(STRUCTURES)}, not {structure!r}")
    name = head.get("name")
    if not isinstance(name, str) or not name:
        raise RecipeError(f"{source}: [recipe] name must be a non-empty string")

    priors_raw = raw.get("priors", {})
    wanted = PRIORS_BY_STRUCTURE[structure]
    _reject_unknown(priors_raw, set(wanted), source, f"prior for structure {structure!r}")
    missing = [p for p in wanted if p not in priors_raw]
    if missing:
        raise RecipeError(f"{source}: structure {structure!r} needs priors for "
                          + ", ".join(f"[priors.{m}]" for m in missing))
    priors = {p: _parse_prior(p, priors_raw[p], source) for p in wanted}
    return Recipe(name=name, title=str(head.get("title", name)), structure=structure,
                  priors=priors, sampler=_parse_sampler(raw.get("sampler", {}), source),
                  source=source)


def _parse_prior(parameter: str, entry: Any, source: str) -> Prior:
    where = f"{source}: [priors.{parameter}]"
    if not isinstance(entry, dict):
        raise RecipeError(f"{where} must be a table")
    kind = entry.get("kind")
    allowed = KINDS_BY_PARAMETER[parameter]
    if kind not in allowed:
        raise RecipeError(f"{where} kind must be one of {', '.join(allowed)}, not {kind!r}")
    keys = KIND_KEYS[kind]
    _reject_unknown(entry, {"kind", *keys}, source, f"key in [priors.{parameter}] (kind {kind!r})")
    params: dict[str, float] = {}
    for key in keys:
        value = entry.get(key)
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise RecipeError(f"{where} key '{key}' must be a finite number, not {value!r}")
        params[key] = float(value)
    problem = _range_problem(parameter, kind, params)
    if problem:
        raise RecipeError(f"{where} {problem}")
    return Prior(kind=kind, params=params)


def _range_problem(parameter: str, kind: str, p: dict[str, float]) -> str | None:
    positive = {"normal": ("sd",), "pc_sd": ("upper",), "gamma": ("shape", "rate")}.get(kind, ())
    for key in positive:
        if p[key] <= 0:
            return f"key '{key}' must be positive, not {p[key]:g}"
    open_unit = {"pc_sd": ("tail_probability",),
                 "pc_mixing": ("threshold", "probability_below")}.get(kind, ())
    for key in open_unit:
        if not 0 < p[key] < 1:
            return f"key '{key}' must lie strictly between 0 and 1, not {p[key]:g}"
    if kind == "fixed":
        if parameter == "phi" and not 0 <= p["value"] <= 1:
            return f"key 'value' must lie between 0 and 1 for phi, not {p['value']:g}"
        if parameter != "phi" and p["value"] <= 0:
            return f"key 'value' must be positive, not {p['value']:g}"
    return None


def _parse_sampler(section: Any, source: str) -> SamplerDefaults:
    if not isinstance(section, dict):
        raise RecipeError(f"{source}: [sampler] must be a table")
    _reject_unknown(section, set(SAMPLER_KEYS), source, "[sampler] key")
    target = section.get("target_accept", SAMPLER_KEYS["target_accept"])
    if isinstance(target, bool) or not isinstance(target, (int, float)) or not 0 < target < 1:
        raise RecipeError(f"{source}: [sampler] target_accept must lie strictly between 0 and 1, "
                          f"not {target!r}")
    low_rank = section.get("low_rank_mass_matrix", SAMPLER_KEYS["low_rank_mass_matrix"])
    if not isinstance(low_rank, bool):
        raise RecipeError(f"{source}: [sampler] low_rank_mass_matrix must be true or false, "
                          f"not {low_rank!r}")
    return SamplerDefaults(target_accept=float(target), low_rank_mass_matrix=low_rank)


def _reject_unknown(table: dict, known: set[str], source: str, what: str) -> None:
    unknown = sorted(set(table) - known)
    if unknown:
        raise RecipeError(f"{source}: unknown {what} {', '.join(repr(u) for u in unknown)}; "
                          f"known: {', '.join(sorted(known))}")
