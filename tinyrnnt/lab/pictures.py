"""Pictures of what a model does on one utterance: attention over the list, and the lattice.

For one utterance and its biasing list, the model decodes greedily; then, with
its own hypothesis as the label history (decode-time features equal training
features for the same history, tests/test_attention.py), the pictures show

- ID.attention.png: the attention weights over the listed words (the no-bias
  entry and the entries that ever get the most weight) against output steps
  (against encoder frames for the encoder query), for a model with attention
  over the list;
- ID.lattice.png: over encoder frames x output positions, the probability of
  emitting the hypothesis's next token, with the output positions where the
  trie cue is active (the partial word is on a path of the list's prefix tree)
  marked along the top; drawn for any model (the tree is built from the list).

ID.pictures.json holds the reference, the hypothesis, the list size and the
entries drawn. matplotlib with the Agg backend (files only, no window).
"""

from __future__ import annotations

import json
from pathlib import Path

import torch

from tinyrnnt.data import CorpusError
from tinyrnnt.text import TOKENS

SHOWN = 24  # listed entries drawn in the heatmap (besides the no-bias entry)


def pick_utterance(split, utterance: str | None) -> int:
    """Index of utterance `utterance`, or of the first one holding a rare word when None."""
    if utterance is None:
        for i, it in enumerate(split.items):
            if it["spans"]:
                return i
        raise CorpusError(f"split {split.split!r} has no utterance with a rare word; name one with --utterance")
    for i, it in enumerate(split.items):
        if it["id"] == utterance:
            return i
    some = ", ".join(it["id"] for it in split.items[:3])
    raise CorpusError(f"utterance {utterance!r} is not in split {split.split!r} (its ids look like {some}, ...)")


def attention_module(model):
    """The model's attention over the list (alone or inside trie + attention), or None."""
    from tinyrnnt.bias.attention import ListAttention

    inner = getattr(model.bias, "attention", model.bias)
    return inner if isinstance(inner, ListAttention) else None


@torch.no_grad()
def utterance_pictures(checkpoint: str, split_name: str, out_dir: str | Path, utterance: str | None = None,
                       list_size: int = 100, corpus: str | None = None) -> dict:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from tinyrnnt.bias.trie import PrefixTree, training_cue
    from tinyrnnt.data import CorpusSplit, collate
    from tinyrnnt.decode.greedy import greedy_decode
    from tinyrnnt.lab.evaluate import write_atomic
    from tinyrnnt.lab.train import load_model
    from tinyrnnt.text import decode

    model, cfg, _ = load_model(checkpoint)
    model.eval()
    split = CorpusSplit(corpus or cfg.data.corpus, split_name)
    i = pick_utterance(split, utterance)
    words = split.biasing_list(i, list_size)
    batch = collate([{**split[i], "list": words}])
    biaser = model.bias.decoder(batch["lists"]) if model.bias is not None else None
    hyp = greedy_decode(model, batch["feats"], batch["feat_lens"], biaser=biaser)[0]
    uid = batch["ids"][0]
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    targets = torch.tensor(hyp or [1], dtype=torch.long)[None]  # (1, U); an empty hypothesis: one space
    lens = torch.tensor([targets.shape[1]])
    labels = ["<start>"] + [TOKENS[t] if TOKENS[t] != " " else "_" for t in targets[0].tolist()]
    facts = {"id": uid, "ref": batch["texts"][0], "hyp": decode(hyp), "list_size": len(words), "files": []}

    # the lattice: P(next hypothesis token | frame t, position u), trie-active positions marked
    logits, enc_lens = model(batch["feats"], batch["feat_lens"], targets, lens, batch["lists"] if model.bias is not None else None)
    logp = torch.log_softmax(logits[0], dim=-1)  # (T', U+1, V)
    nxt = torch.cat([targets[0], torch.zeros(1, dtype=torch.long)])  # (U+1,), blank after the last token
    emit = logp.gather(2, nxt[None, :, None].expand(logp.shape[0], -1, 1))[..., 0].exp()  # (T', U+1)
    word_start = cfg.bias.word_start if model.bias is not None else "first_tokens"
    single = [w for w in words if " " not in w]
    cue = training_cue(targets, lens, [PrefixTree(single)], word_start)[0]  # (U+1, V)
    active = (cue.sum(-1) > 0).tolist()
    T = emit.shape[0]
    fig, ax = plt.subplots(figsize=(max(6, 0.25 * T + 2.5), max(4, 0.16 * len(labels) + 1.5)))
    im = ax.imshow(emit.T.numpy(), origin="lower", aspect="auto", cmap="magma", vmin=0, vmax=1)
    fig.colorbar(im, ax=ax, fraction=0.04)
    ax.set_xlabel("encoder frame")
    ax.set_ylabel("output position (label history)")
    ax.set_yticks(range(len(labels)), labels, fontsize=7)
    for label, on in zip(ax.get_yticklabels(), active):  # the positions where the trie cue is active
        if on:
            label.set_color("tab:cyan")
            label.set_fontweight("bold")
    on_rows = [u for u, on in enumerate(active) if on]
    ax.scatter([-0.5] * len(on_rows), on_rows, marker=">", s=18, color="tab:cyan", clip_on=False, zorder=3)
    ax.set_xlim(-0.5, T - 0.5)
    ax.set_title(f"{uid}: P(next token) per frame and position; cyan = trie cue active", fontsize=9)
    path = out / f"{uid}.lattice.png"
    _save(fig, path)
    facts["files"].append(str(path))
    facts["trie_active_positions"] = [u for u, on in enumerate(active) if on]

    att = attention_module(model)
    if att is not None:
        from tinyrnnt.bias.attention import MASK_KEY, ROW_KEY

        feats = model.bias.features(batch["lists"], targets, lens)
        keys, values = feats[ROW_KEY]
        if att.opts.query == "predictor":  # one query per output step
            asker = model.predictor(targets, feats.get("predictor"))  # (1, U+1, Dp)
            mask, rows, row_names = feats[MASK_KEY], "output step (label history)", labels
        else:  # one query per encoder frame
            asker = model.encoder(batch["feats"], batch["feat_lens"])[0]  # (1, T', De)
            mask = feats[MASK_KEY][:, :1].expand(-1, asker.shape[1], -1)
            rows, row_names = "encoder frame", [str(t) for t in range(asker.shape[1])]
        _, w = att.attend(att.query(asker), keys, values, mask)  # (1, rows, N+1)
        w = w[0]
        top = (w[:, 1:].amax(0).argsort(descending=True)[:SHOWN] + 1).tolist() if len(words) else []
        cols = [0] + top
        names = ["(no bias)"] + [words[c - 1] for c in top]
        fig, ax = plt.subplots(figsize=(max(6, 0.3 * len(cols) + 2), max(4, 0.2 * len(row_names) + 1.5)))
        im = ax.imshow(w[:, cols].numpy(), aspect="auto", cmap="viridis", vmin=0, vmax=1)
        ax.set_xticks(range(len(cols)), names, rotation=70, fontsize=7)
        ax.set_yticks(range(len(row_names)), row_names, fontsize=7)
        ax.set_xlabel(f"listed entries (the {len(top)} with the most weight of {len(words)})")
        ax.set_ylabel(rows)
        fig.colorbar(im, ax=ax, fraction=0.04)
        ax.set_title(f"{uid}: attention weights over the list", fontsize=9)
        path = out / f"{uid}.attention.png"
        _save(fig, path)
        facts["files"].append(str(path))
        facts["attention_entries_shown"] = names
    write_atomic(out / f"{uid}.pictures.json", json.dumps(facts, indent=1) + "\n")
    return facts


def _save(fig, path: Path) -> None:
    import matplotlib.pyplot as plt

    fig.tight_layout()
    tmp = path.with_name(f".{path.stem}.tmp.png")
    fig.savefig(tmp, dpi=110)
    plt.close(fig)
    tmp.replace(path)
