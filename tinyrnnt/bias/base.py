"""The biasing-input plug-in interface and its registry.

A biasing input turns an utterance's biasing list into a feature per
label-history position u = 0..U that the model adds at one injection point:

- "joiner": added to the joiner's predictor-side projection (B, U+1, Dj);
- "predictor": added to the predictor's input embedding (B, U+1, E);
- "both".

One class per idea, registered by name, chosen by `bias.kind` in a recipe:

    @register("my_idea")
    class MyIdea(BiasingInput):
        def features(self, lists, targets, target_lens) -> dict[str, Tensor]: ...
        def decoder(self, lists) -> DecodeState-like object with start/advance/feature

`features` returns {"joiner": (B, U+1, Dj)} and/or {"predictor": (B, U+1, E)}
for training, and optionally {"logits": (B, U+1, V)}: a per-token feature that
`token_scores(hidden, feature, logits)` turns into scores added straight to the
joiner's token logits (hidden is the joiner's tanh layer, (..., Dj); logits the
plain token logits, (..., V)); `decoder(lists)` returns an object that keeps a per-hypothesis
state while decoding (see `Biaser`) so decoding sees the features training saw.

Features that need the predictor's output (attention with the predictor state
as its query) come from a second, optional hook, on both sides:
`after_predictor(features, pred)` receives what `features` returned (the
dictionary may carry entries of the module's own, which the model ignores) and
the predictor output, (B, U+1, Dp) in training, (rows, Dp) per hypothesis row
while decoding, and returns the dictionary the joiner reads. The model calls it
once the predictor has run, so a "predictor" entry cannot depend on `pred`
(the default returns `features` unchanged, as the trie cue does). Greedy and
beam search call the Biaser's hook with each row's predictor output.
Likewise `after_encoder(features, enc, enc_lens)` (training) may add
"encoder": (B, T', Dj), a feature per encoder frame added to the joiner's
encoder side (attention with the encoder state as its query); while decoding,
`Biaser.frames(enc)` gives it per row, (rows, T', Dj), or None.

A module may also return {"loss": scalar} from either hook while training: a
loss of its own (guided attention's, tinyrnnt.bias.guide) that the model adds
to the transducer loss.

A module's own settings live in `bias.options` (a mapping the module checks
itself, e.g. through its own dataclass and `config.from_dict`), so a new idea
takes one file and no field here. Built-in modules are imported by name
(BUILT_IN) like a user's `bias.module`: this registry imports no plug-in code.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass, field

from torch import Tensor, nn

from tinyrnnt.config import ConfigError

INJECTION_POINTS = ("joiner", "predictor", "both")
BOOST_MODES = ("add", "mix", "mix_heard")
RESPELL_LETTERS = ("seen_pairs", "any")
REGISTRY: dict[str, type["BiasingInput"]] = {}
BUILT_IN = ("tinyrnnt.bias.trie_cue", "tinyrnnt.bias.attention", "tinyrnnt.bias.trie_and_attention")  # imported before a kind is looked up


@dataclass
class ListSampling:
    """Training-time lists, in the spirit of CLAS (Pundak et al., 2018): true words kept or dropped, plus distractors."""

    keep_true: float = 0.95  # chance each reference rare word is put in the list
    empty_list: float = 0.1  # chance an utterance gets no list at all (teaches trust in the sound)
    size: tuple[int, int] = (5, 100)  # list size drawn uniformly in this range (before true words)
    confusable: float = 0.1  # chance a kept word brings its other spellings along as distractors
    # Chance a few-shot word of a training utterance is respelled (a doubled consonant, a silent
    # letter, another vowel letter; only letter pairs training text already has) in transcript and
    # list alike: its spelling can only come from the list, so the model learns to follow the list
    # against its own spelling habits (bias.sampler.garble).
    respell_few_shot: float = 0.0
    # Which edits respelling makes: "seen_pairs" (the edits above, keeping to letter pairs training
    # text has, never the first letter) or "any" (any letter a-z put in or swapped in anywhere, the
    # first letter too), so following the list does not depend on the letters it asks for.
    respell_letters: str = "seen_pairs"
    # A respelled word the list then leaves out (an empty list, a dropped true word): "keep" trains
    # on the respelling anyway; "restore" gives it its own spelling back, since nothing in the
    # utterance says how it is spelled (the trie recipe's setting).
    respell_unlisted: str = "keep"

    def __post_init__(self):
        from tinyrnnt.config import ConfigError, require

        require(self, "bias.sampling", fraction=("keep_true", "empty_list", "confusable", "respell_few_shot"))
        if self.respell_unlisted not in ("restore", "keep"):
            raise ConfigError(f"bias.sampling.respell_unlisted must be one of ['restore', 'keep'], "
                              f"got {self.respell_unlisted!r}")
        if self.respell_letters not in RESPELL_LETTERS:
            raise ConfigError(f"bias.sampling.respell_letters must be one of {list(RESPELL_LETTERS)}, "
                              f"got {self.respell_letters!r}")
        lo, hi = self.size
        if not 0 <= lo <= hi:
            raise ConfigError(f"bias.sampling.size must be [low, high] with 0 <= low <= high, got {list(self.size)}")


@dataclass
class BiasConfig:
    kind: str = "none"  # registered biasing input: "none" or one of REGISTRY
    module: str = ""  # a Python module to import first, which registers your own biasing input
    inject: str = "joiner"  # joiner | predictor | both
    cue_dim: int = 64  # projection size of the cue before it meets the model
    cue_dropout: float = 0.05  # chance the whole cue of an utterance is zeroed in training
    # A learned gate on the joiner's hidden layer adds the cue straight to the token logits
    # (0 at init): makes "follow the tree" one scalar per grid point to learn, not a V x V map.
    token_boost: bool = False
    # How the token boost acts: "add" puts gate x cue on the logits; "mix" mixes the model's choice
    # among non-blank tokens with a uniform choice among the tokens the tree allows (gate = weight),
    # blank untouched, so following the tree does not depend on how unlikely the model finds a letter;
    # "mix_heard" mixes towards the model's own choice among the allowed tokens instead (sharpened by
    # a learned exponent), so where the tree allows several letters the sound picks one
    # (trie_cue.heard_mix_correction).
    boost_mode: str = "add"
    word_start: str = "first_tokens"  # cue at word starts: first tokens of all listed words, or "none"
    valid_list_size: int = 100  # list size of the valid split's lists during training
    sampling: ListSampling = field(default_factory=ListSampling)
    # Settings of the chosen biasing input that are its own (not the trie cue's fields above),
    # checked by the module when the model is built, e.g. {dim: 64, phrase_gate: prefix}.
    options: dict = field(default_factory=dict)

    def __post_init__(self):
        from tinyrnnt.config import ConfigError, require

        require(self, "bias", positive=("cue_dim", "valid_list_size"), fraction=("cue_dropout",))
        for name, value, choices in (("inject", self.inject, INJECTION_POINTS),
                                     ("boost_mode", self.boost_mode, BOOST_MODES),
                                     ("word_start", self.word_start, ("first_tokens", "none"))):
            if value not in choices:
                raise ConfigError(f"bias.{name} must be one of {list(choices)}, got {value!r}")


def register(name: str):
    def wrap(cls):
        cls.name = name
        REGISTRY[name] = cls
        return cls

    return wrap


def build_biasing(cfg: BiasConfig, joiner_dim: int, embed_dim: int, pred_dim: int | None = None,
                  enc_dim: int | None = None) -> "BiasingInput | None":
    """The biasing input `cfg.kind`, sized for a joiner of `joiner_dim`, predictor input embeddings
    of `embed_dim` and (for inputs that read them) predictor outputs of `pred_dim` and encoder
    outputs of `enc_dim`."""
    import importlib

    if cfg.kind == "none":
        return None
    load_built_in()
    if cfg.module:
        # subtle: this runs Python code named in a recipe; say so before doing it
        print(f"bias.module: importing {cfg.module!r} (runs its code) to register biasing input {cfg.kind!r}",
              file=sys.stderr)
        try:
            importlib.import_module(cfg.module)
        except ImportError as err:
            raise ConfigError(f"bias.module {cfg.module!r} cannot be imported: {err}") from None
    if cfg.kind not in REGISTRY:
        raise ConfigError(f"bias.kind: unknown biasing input {cfg.kind!r}; registered: {['none'] + sorted(REGISTRY)}")
    if cfg.inject not in INJECTION_POINTS:
        raise ValueError(f"bias.inject must be one of {INJECTION_POINTS}, got {cfg.inject!r}")
    if cfg.boost_mode not in BOOST_MODES:
        raise ValueError(f"bias.boost_mode must be one of {BOOST_MODES}, got {cfg.boost_mode!r}")
    return REGISTRY[cfg.kind](cfg, joiner_dim, embed_dim, pred_dim=pred_dim, enc_dim=enc_dim)


def load_built_in() -> list[str]:
    """Import the built-in biasing inputs (they register themselves); the registered names."""
    import importlib

    for name in BUILT_IN:
        importlib.import_module(name)
    return sorted(REGISTRY)


class BiasingInput(nn.Module):
    name = "abstract"

    def __init__(self, cfg: BiasConfig, joiner_dim: int, embed_dim: int, pred_dim: int | None = None,
                 enc_dim: int | None = None):
        super().__init__()
        self.cfg = cfg
        self.joiner_dim, self.embed_dim, self.pred_dim, self.enc_dim = joiner_dim, embed_dim, pred_dim, enc_dim

    def features(self, lists: list[list[str]], targets: Tensor, target_lens: Tensor) -> dict[str, Tensor]:
        raise NotImplementedError

    def decoder(self, lists: list[list[str]]) -> "Biaser":
        raise NotImplementedError

    def after_predictor(self, features: dict[str, Tensor], pred: Tensor) -> dict[str, Tensor]:
        """Features once the predictor output `pred` (B, U+1, Dp) is known; default: unchanged."""
        return features

    def after_encoder(self, features: dict[str, Tensor], enc: Tensor, enc_lens: Tensor) -> dict[str, Tensor]:
        """Features once the encoder output `enc` (B, T', De) is known; may add "encoder"
        (B, T', Dj); default: unchanged."""
        return features

    def token_scores(self, hidden: Tensor, feature: Tensor, logits: Tensor) -> Tensor:
        """Scores (..., V) added to the joiner's plain `logits` (..., V), for modules whose features
        hold "logits"; `hidden` is the joiner's tanh layer (..., Dj). A module with a
        `hidden_readout` layer also gets `readout=` its outputs (..., k)."""
        raise NotImplementedError

    def hidden_readout(self) -> nn.Linear | None:
        """A linear layer (Dj -> k) over the joiner's hidden layer that `token_scores` reads, or
        None (the default). The model computes it in one product with the joiner's output layer
        and passes the result as `token_scores(..., readout=)`: the hidden lattice (B, T', U+1, Dj)
        is then read once, and its gradient written once, instead of once per layer."""
        return None


class Biaser:
    """Decode-time state holder: one state per hypothesis row.

    A state is a tensor, or a tuple of tensors, whose first dimension is the row; beam search
    reorders and copies rows with `select` and joins row sets with `cat` (override both for
    another layout). Rows of one utterance share its list, so a state that is a function of the
    emitted tokens stays consistent when beam search merges equal hypotheses.
    """

    def select(self, state, index: Tensor):
        if isinstance(state, tuple):
            return tuple(s.index_select(0, index) for s in state)
        return state.index_select(0, index)

    def cat(self, states: list):
        import torch

        if isinstance(states[0], tuple):
            return tuple(torch.cat(parts) for parts in zip(*states))
        return torch.cat(states)

    def start(self, B: int):
        raise NotImplementedError

    def advance(self, state, tokens: Tensor, emit: Tensor):
        """New state after `tokens` (B,) were emitted where `emit` (B,) is true."""
        raise NotImplementedError

    def features(self, state) -> dict[str, Tensor]:
        """{"joiner": (B, Dj)}, {"predictor": (B, E)}, {"logits": (B, V)}: as in training, per row."""
        raise NotImplementedError

    def after_predictor(self, features: dict[str, Tensor], pred: Tensor) -> dict[str, Tensor]:
        """Per row, as BiasingInput.after_predictor: `features` from `features(state)`, `pred`
        (rows, Dp) each row's predictor output for its current history; default: unchanged."""
        return features

    def frames(self, enc: Tensor) -> Tensor | None:
        """(rows, T', Dj) added to the joiner's encoder side of each row, from the encoder output
        (rows, T', De) of each row's utterance; default None (nothing)."""
        return None

    def set_frame(self, t: int) -> bool:
        """The decoders call this at the start of every encoder frame t; True when `features` now
        depend on t (the decoders then read them again for every live row); default False."""
        return False
