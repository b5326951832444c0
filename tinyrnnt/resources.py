"""Where the built-in recipes and scenarios live: inside the package, so a regular install has them."""

from __future__ import annotations

from pathlib import Path

PACKAGE = Path(__file__).resolve().parent
RECIPE_DIR = PACKAGE / "recipes"
SCENARIO_DIR = PACKAGE / "scenarios"


def builtin_recipes() -> list[str]:
    return sorted(p.stem for p in RECIPE_DIR.glob("*.yaml"))


def resolve_recipe(name_or_path: str | Path) -> Path:
    """A built-in recipe name ("trie_vs_baseline") or a path to a recipe YAML.

    >>> resolve_recipe("baseline").name
    'baseline.yaml'
    """
    p = Path(name_or_path)
    if p.suffix in (".yaml", ".yml") or p.exists():
        return p
    candidate = RECIPE_DIR / f"{name_or_path}.yaml"
    if candidate.is_file():
        return candidate
    from tinyrnnt.config import ConfigError

    raise ConfigError(f"unknown recipe {str(name_or_path)!r}; built-in recipes: {builtin_recipes()}, "
                      "or give a path to a YAML file")
