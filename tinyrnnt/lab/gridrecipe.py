"""A recipe with a `grid` section: its `grid.*` overrides set inside the grid, then the grid run
(tinyrnnt.lab.grid) and its report. Helpers of tinyrnnt.lab.recipes."""

from __future__ import annotations

import copy
import dataclasses
from pathlib import Path

import yaml

from tinyrnnt import config as C


def set_in_grid(recipe, overrides: list[str]):
    """The recipe with `grid.a.b=value` overrides set inside its grid (a free-form mapping: values read
    as YAML, the whole grid checked again by the recipe)."""
    grid = copy.deepcopy(recipe.grid)
    for o in overrides:
        key, _, value = o.partition("=")
        *path, last = key.strip().split(".")[1:]
        node = grid
        for part in path:
            node = node.setdefault(part, {})
        try:
            node[last] = yaml.safe_load(value)
        except yaml.YAMLError as err:
            raise C.ConfigError(f"{key.strip()}: not valid YAML: {C.yaml_problem(err)}") from None
    return dataclasses.replace(recipe, grid=grid)


def run_grid_recipe(recipe, overrides, quiet: bool, report: bool) -> list[dict]:
    """Run every cell of the recipe's grid (finished ones are always kept), write the grid tables,
    render the report; returns the grid's result rows."""
    from tinyrnnt.lab.grid import run_grid
    from tinyrnnt.lab.rendering import render

    rows = run_grid(recipe, overrides, quiet)["rows"]
    if report:
        render(Path(recipe.out_dir) / recipe.name)
    return rows
