"""Where the built-in recipes and scenarios live (one place, so packaging can move them)."""

from __future__ import annotations

from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
RECIPE_DIR = ROOT / "recipes"
SCENARIO_DIR = ROOT / "synth_data"
