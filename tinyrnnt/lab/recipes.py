"""Recipes end to end: build the corpus if missing, train every arm, evaluate, write the tables.

A recipe YAML is either the differences of one experiment from the defaults
(`tinyrnnt/recipes/baseline.yaml`), or several runs that share settings:

    shared: {...}            # differences every run gets
    runs:                    # run name -> its own differences
      baseline: {}
      trie: {bias: {kind: trie}, train: {init_from: "run:baseline", steps: 700}}
    seeds: [0, 1, 2]         # training seeds: every arm is trained once per seed
    evaluate:                # what to decode and score
      splits: [test, test_unseen]
      list_sizes: [0, 10, 100, 1000]

Fair comparison is built in. Beside every biased run the recipe adds a
*control arm*: the same configuration with no biasing input, so the same start
(its `init_from`), the same steps, optimiser, learning-rate schedule (warm-up
and restart included) and data order. Gains are reported against it; the run a
biased arm starts from stays as a second reference. With `pairing:
from_scratch`, every arm trains from nothing instead, for the steps its chain
of `init_from` runs would have summed to. Budgets must be in steps
(`train.steps`) wherever a control arm stands, so "equal training" is exact.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import yaml

from tinyrnnt import config as C
from tinyrnnt.experiment import ExperimentConfig
from tinyrnnt.lab.armtraining import _saved_settings_match, _train_one, _training_part, train_arms  # noqa: F401
from tinyrnnt.lab.costrecipe import CostPlan
from tinyrnnt.lab.fusion import DEFAULT_WEIGHTS
from tinyrnnt.lab.preflight import check_plan, check_room, ensure_corpus  # noqa: F401
from tinyrnnt.resources import resolve_recipe

DEFAULT_RECIPE = "trie_vs_baseline"  # what `tinyrnnt experiment` runs with no recipe named
PAIRINGS = ("fine_tune", "from_scratch")
CHECKPOINT_CHOICES = ("last", "best")


@dataclass
class EvalPlan:
    splits: tuple[str, ...] = ("test", "test_unseen")
    list_sizes: tuple[int, ...] = (0, 100)
    limit: int = 0  # utterances per split (0 = all)
    # "last": the weights after the whole budget (equal steps for every arm); "best": the
    # checkpoint with the lowest valid CER (each arm then stops at its own step count).
    checkpoint: str = "last"
    # Ways of decoding every arm, by name: {search, beam, boost_weight, boost_where, triggers}
    # (decode.* settings); boost_weight "tuned" picks it on `tune.split` for each arm. Empty = the
    # arm's own decode settings, named "greedy".
    decoding: dict = field(default_factory=dict)
    tune: TunePlan = field(default_factory=lambda: TunePlan())

    def __post_init__(self):
        if self.checkpoint not in CHECKPOINT_CHOICES:
            raise C.ConfigError(f"evaluate.checkpoint must be one of {CHECKPOINT_CHOICES}, got {self.checkpoint!r}")
        C.require(self, "evaluate", at_least_zero=("limit",))
        for name, variant in self.decoding.items():
            decode_settings(name, variant)  # checks every variant now, before any training

    def variants(self) -> dict[str, dict]:
        return self.decoding or {"greedy": {}}


DECODING_KEYS = ("search", "beam", "boost_weight", "boost_where", "triggers", "max_symbols", "spotting")


def decode_settings(name: str, variant) -> tuple[dict, bool]:
    """A decoding variant's decode.* settings (boost weight 1 standing in for "tuned") and whether
    its weight is tuned; errors name evaluate.decoding.NAME."""
    from tinyrnnt.experiment import DecodeConfig

    where = f"evaluate.decoding.{name}"
    if not isinstance(variant, dict):
        raise C.ConfigError(f"{where} must be a mapping of decode settings ({', '.join(DECODING_KEYS)}), "
                            f"got {variant!r}")
    unknown = sorted(set(variant) - set(DECODING_KEYS))
    if unknown:
        raise C.ConfigError(f"{where}: unknown key {unknown[0]!r}; valid keys: {list(DECODING_KEYS)}")
    tuned = variant.get("boost_weight") == "tuned"
    settings = dict(variant, boost_weight=1.0) if tuned else dict(variant)
    try:
        DecodeConfig(**settings).boost()
    except C.ConfigError as err:
        raise C.ConfigError(f"{where}: {err}") from None
    except TypeError as err:
        raise C.ConfigError(f"{where}: {err}") from None
    return settings, tuned


@dataclass
class TunePlan:
    """Where and how "tuned" boost weights are chosen (tinyrnnt.lab.fusion.sweep_boost)."""

    split: str = "valid"
    list_size: int = 100
    weights: tuple[float, ...] = DEFAULT_WEIGHTS
    objective: str = "wer"  # lowest wer | bwer | uwer on the tuning split
    # Weights of a biased arm's own token boost while fusing (decode.model_boost_scale), tuned as
    # pairs with the boost weight for arms with bias.token_boost; (1,) = as trained.
    model_scales: tuple[float, ...] = (1.0,)

    def __post_init__(self):
        from tinyrnnt.lab.fusion import OBJECTIVES

        C.require(self, "evaluate.tune", at_least_zero=("list_size",))
        if self.objective not in OBJECTIVES:
            raise C.ConfigError(f"evaluate.tune.objective must be one of {list(OBJECTIVES)}, got {self.objective!r}")
        if not self.weights:
            raise C.ConfigError("evaluate.tune.weights is empty; give at least one boost weight")
        if not self.model_scales or any(not isinstance(s, (int, float)) or not 0 <= s < float("inf")
                                        for s in self.model_scales):
            raise C.ConfigError(f"evaluate.tune.model_scales must be numbers >= 0, got {list(self.model_scales)}")


@dataclass
class Recipe:
    name: str = "baseline"
    out_dir: str = "runs"
    shared: dict = field(default_factory=dict)
    runs: dict = field(default_factory=lambda: {"baseline": {}})
    evaluate: EvalPlan = field(default_factory=EvalPlan)
    # arms trained at once, each in its own process (give each train.threads=1); in a grid, cells
    # evaluated at once, each worker on one thread (grid models still train one after another)
    parallel: int = 1
    seeds: tuple[int, ...] = (0,)  # training seeds (train.seed); every arm is trained once per seed
    controls: bool = True  # an equal-steps control arm (no biasing input) beside every biased run
    pairing: str = "fine_tune"  # or "from_scratch": no arm starts from another, steps summed
    grid: dict = field(default_factory=dict)  # axes whose every cell is run (tinyrnnt.lab.grid); {} = no grid
    cost: CostPlan = field(default_factory=CostPlan)  # cost measurement after evaluation (no sizes = none)

    def __post_init__(self):
        if self.pairing not in PAIRINGS:
            raise C.ConfigError(f"pairing must be one of {PAIRINGS}, got {self.pairing!r}")
        if not self.seeds or len(set(self.seeds)) != len(self.seeds):
            raise C.ConfigError(f"seeds must be a non-empty list of distinct whole numbers, got {list(self.seeds)}")
        C.require(self, "recipe", positive=("parallel",))
        self.cost.check_runs(self.runs)
        if self.grid and self.cost.sizes:
            raise C.ConfigError("a recipe with a grid cannot also measure costs (cost.sizes); give the cost "
                                "measurement its own recipe (see tinyrnnt/recipes/cost.yaml)")
        if self.grid:
            from tinyrnnt.lab.grid import GridPlan

            C.from_dict(GridPlan, self.grid, "grid")  # checked now, before any training


@dataclass
class Arm:
    """One model to train: a recipe run (or a control) at one seed."""

    key: str  # unique name: the run, plus "/seedS" when the recipe has several seeds
    run: str  # recipe run name (controls: "<biased run>_control")
    seed: int
    cfg: ExperimentConfig
    source: str | None = None  # key of the arm whose last checkpoint it starts from
    control: str | None = None  # biased arms: key of their control arm
    reference: str | None = None  # biased arms: key of the arm they fine-tune (second reference)


def read_recipe(path: str | Path | None) -> Recipe:
    path = resolve_recipe(path if path is not None else DEFAULT_RECIPE)
    if not path.is_file():
        raise C.ConfigError(f"{path}: recipe file not found")
    try:
        data = yaml.safe_load(path.read_text(encoding="utf-8")) or {}
    except yaml.YAMLError as err:
        raise C.ConfigError(f"{path}: not valid YAML: {C.yaml_problem(err)}") from None
    if not isinstance(data, dict):
        raise C.ConfigError(f"{path}: a recipe is a mapping")
    if "runs" not in data and "grid" not in data:  # a single experiment's differences
        data = {"name": path.stem, "shared": data, "runs": {data.get("name", path.stem): {}}}
    data.setdefault("name", path.stem)
    try:
        return C.from_dict(Recipe, data, str(path))
    except C.ConfigError as err:
        message = str(err)
        raise C.ConfigError(message if message.startswith(str(path)) else f"{path}: {message}") from None


def run_config(recipe: Recipe, run: str, overrides=()) -> ExperimentConfig:
    base = C.to_dict(ExperimentConfig())
    merged = C._merge(C._merge(base, recipe.shared, "shared"), recipe.runs[run] or {}, f"runs.{run}")
    merged["name"] = run
    merged["run_dir"] = str(Path(recipe.out_dir) / recipe.name / run)
    cfg = C.from_dict(ExperimentConfig, merged, f"recipe {recipe.name}, run {run}")
    return C.apply_overrides(cfg, list(overrides))


def _source(cfg: ExperimentConfig) -> str | None:
    start = cfg.train.init_from
    return start[len("run:"):] if start.startswith("run:") else None


def expand_arms(recipe: Recipe, overrides=()) -> dict[str, Arm]:
    """Every arm to train, in an order where each arm comes after the one it starts from."""
    configs = {run: run_config(recipe, run, overrides) for run in recipe.runs}
    for run, cfg in configs.items():
        src = _source(cfg)
        if src is not None and src not in configs:
            raise C.ConfigError(f"run {run!r}: train.init_from names run {src!r}, which the recipe lacks; "
                                f"runs: {list(configs)}")
        if src is not None and list(configs).index(src) > list(configs).index(run):
            raise C.ConfigError(f"run {run!r}: train.init_from names run {src!r}, which must come earlier "
                                f"in the recipe; runs: {list(configs)}")

    def chain_steps(run: str) -> int:
        cfg = configs[run]
        if cfg.train.steps == 0:
            raise C.ConfigError(f"run {run!r}: pairing from_scratch needs step budgets (train.steps) "
                                "on every run of the chain")
        src = _source(cfg)
        return cfg.train.steps + (chain_steps(src) if src else 0)

    plans: dict[str, tuple[ExperimentConfig, str | None]] = {}  # run -> (config, source run)
    controls: dict[str, str] = {}  # biased run -> its control run
    for run, cfg in configs.items():
        if recipe.pairing == "from_scratch" and _source(cfg):
            cfg = C.apply_overrides(cfg, ["train.init_from=", f"train.steps={chain_steps(run)}"])
        plans[run] = (cfg, _source(cfg))
    if recipe.controls:
        for run, (cfg, src) in list(plans.items()):
            if cfg.bias.kind == "none":
                continue
            if cfg.train.steps == 0:
                raise C.ConfigError(f"run {run!r}: a control arm needs a step budget; set train.steps "
                                    "(or `controls: false` in the recipe for a quick look)")
            twin = C.apply_overrides(cfg, ["bias={}", "decode.spotting=false"])  # nothing to spot without a list input
            same = [r for r, (c, _) in plans.items() if _same_training(c, twin)]
            if same:  # an earlier run or control already trains exactly this
                controls[run] = same[0]
                continue
            name = f"{run}_control"
            twin = C.apply_overrides(twin, [f"name={name}", f"run_dir={Path(cfg.run_dir).parent / name}"])
            plans[name] = (twin, src)
            controls[run] = name
    arms: dict[str, Arm] = {}
    many = len(recipe.seeds) > 1
    for seed in recipe.seeds:
        def key(run: str) -> str:
            return f"{run}/seed{seed}" if many else run

        for run, (cfg, src) in _ordered(plans):
            sets = [f"train.seed={seed}"] + ([f"run_dir={Path(cfg.run_dir) / f'seed{seed}'}"] if many else [])
            arms[key(run)] = Arm(key(run), run, seed, C.apply_overrides(cfg, sets),
                                 source=key(src) if src else None,
                                 control=key(controls[run]) if run in controls else None,
                                 reference=key(src) if (src and run in controls) else None)
    return arms


def _same_training(a: ExperimentConfig, b: ExperimentConfig) -> bool:
    strip = lambda c: {k: v for k, v in C.to_dict(c).items() if k not in ("name", "run_dir")}  # noqa: E731
    return strip(a) == strip(b)


def _ordered(plans: dict) -> list:
    """Runs so that each comes after its source (controls were appended after their sources)."""
    done: list[str] = []
    while len(done) < len(plans):
        for run, (_, src) in plans.items():
            if run not in done and (src is None or src in done):
                done.append(run)
                break
    return [(run, plans[run]) for run in done]


RECIPE_LEVEL = ("name", "out_dir", "evaluate", "parallel", "seeds", "controls", "pairing", "grid", "cost")


def split_overrides(recipe: Recipe, overrides) -> tuple[Recipe, list[str]]:
    """`key=value` overrides of the recipe itself (evaluate.*, seeds, parallel, controls, pairing,
    name, out_dir, grid.*, cost.*) applied to it; the rest returned, for every run's experiment config."""
    from tinyrnnt.lab.gridrecipe import set_in_grid

    own = [o for o in overrides if o.split("=", 1)[0].split(".")[0].strip() in RECIPE_LEVEL]
    into_grid = [o for o in own if o.split("=", 1)[0].strip().startswith("grid.")]
    if into_grid:  # the grid is a free-form mapping: its settings are set inside it, then checked whole
        recipe = set_in_grid(recipe, into_grid)
    rest = [o for o in own if o not in into_grid]
    return C.apply_overrides(recipe, rest), [o for o in overrides if o not in own]  # checks in __post_init__


def run_recipe(path=None, overrides=(), quiet: bool = False, resume: bool = False, report: bool = True) -> list[dict]:
    """Corpus if needed, train every arm, evaluate, write the tables, measure costs when the recipe
    asks (tinyrnnt.lab.costrecipe) and render the report (tinyrnnt.lab.report). With resume,
    finished arms and finished evaluations (same config, same checkpoint) are kept, not recomputed."""
    from tinyrnnt.lab.rendering import render
    from tinyrnnt.lab.tables import evaluate_arms, write_tables

    recipe, overrides = split_overrides(read_recipe(path), list(overrides))
    if recipe.grid:  # a grid runs its cells (finished ones are always kept) and writes grid tables
        from tinyrnnt.lab.gridrecipe import run_grid_recipe

        return run_grid_recipe(recipe, overrides, quiet, report)
    arms = expand_arms(recipe, overrides)
    check_room(recipe, arms)
    for corpus_of in {arm.cfg.data.corpus: arm.cfg for arm in arms.values()}.values():  # each corpus once
        ensure_corpus(corpus_of, quiet)
        check_plan(recipe.evaluate, corpus_of.data.corpus)
    trained = train_arms(arms, recipe.parallel, quiet, resume)
    results = evaluate_arms(arms, trained, recipe.evaluate, quiet, resume, parallel=recipe.parallel)
    tables = write_tables(Path(recipe.out_dir) / recipe.name, arms, results)
    print(tables["markdown"])
    if recipe.cost.sizes:
        from tinyrnnt.lab.costrecipe import run_cost

        run_cost(recipe, arms, trained, quiet)
    if report:
        render(Path(recipe.out_dir) / recipe.name)
    return tables["rows"]
