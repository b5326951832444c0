"""Scoring: WER, CER, biased-word metrics and paired-bootstrap intervals.

Texts come in normalised (lower case, single spaces, see `tinyrnnt.text`);
words are split on white space. Every per-utterance function returns integer
counts and `summarize` turns summed counts into corpus rates, so a corpus
rate is always (sum of errors) / (sum of reference units), never a mean of
per-utterance rates. A rate whose denominator is 0 is None, so results stay
valid JSON.

Biasing-list entries may be single words or phrases. A reference word is
*biased* when an occurrence of a list entry in the reference covers it; a
hypothesis word is a *list word* when an occurrence of a list entry in the
hypothesis covers it. For a list of single words this is plain membership.

This module deliberately knows nothing about models, decoding or files.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence

import numpy as np

def align(ref: Sequence[str], hyp: Sequence[str]) -> list[tuple[str, int | None, int | None]]:
    """Minimum-edit-distance alignment (Levenshtein, unit costs) of two token sequences.

    Returns ops in order: ('C', i, j) match, ('S', i, j) substitution,
    ('D', i, None) deletion of ref[i], ('I', None, j) insertion of hyp[j].

    Tie-break, deterministic: among alignments with the fewest edits, take one
    with the fewest substitutions (so the most matches; "a b" vs "b c" aligns
    b with b rather than substituting twice); among those, tracing back from
    the end, prefer a match or substitution, then a deletion, then an insertion.

    >>> align("a b c".split(), "a x c d".split())
    [('C', 0, 0), ('S', 1, 1), ('C', 2, 2), ('I', None, 3)]
    >>> align("a b".split(), "b c".split())
    [('D', 0, None), ('C', 1, 0), ('I', None, 1)]
    """
    n, m = len(ref), len(hyp)
    ids: dict[str, int] = {}
    r = np.array([ids.setdefault(t, len(ids)) for t in ref], dtype=np.int64)
    h = np.array([ids.setdefault(t, len(ids)) for t in hyp], dtype=np.int64)
    # subtle: one integer cost encodes the two-level order (edits first, then
    # substitutions): a deletion or insertion costs k, a substitution k + 1,
    # with k larger than any possible substitution count.
    k = min(n, m) + 1
    sub = np.where(r[:, None] == h[None, :], 0, k + 1)  # (n, m)
    cost = np.empty((n + 1, m + 1), dtype=np.int64)
    steps = np.arange(m + 1, dtype=np.int64) * k
    cost[0] = steps
    for i in range(1, n + 1):
        row = np.empty(m + 1, dtype=np.int64)
        row[0] = i * k
        row[1:] = np.minimum(cost[i - 1, :-1] + sub[i - 1], cost[i - 1, 1:] + k)
        # subtle: insertions chain along the row; row[j] = min over l <= j of
        # row[l] + (j - l) * k is a running minimum after removing the slope.
        cost[i] = np.minimum.accumulate(row - steps) + steps
    ops: list[tuple[str, int | None, int | None]] = []
    i, j = n, m
    while i > 0 or j > 0:
        if i > 0 and j > 0 and cost[i, j] == cost[i - 1, j - 1] + sub[i - 1, j - 1]:
            i, j = i - 1, j - 1
            ops.append(("C" if r[i] == h[j] else "S", i, j))
        elif i > 0 and cost[i, j] == cost[i - 1, j] + k:
            i -= 1
            ops.append(("D", i, None))
        else:
            j -= 1
            ops.append(("I", None, j))
    ops.reverse()
    return ops


def edit_counts(ref: Sequence[str], hyp: Sequence[str]) -> tuple[int, int, int, int]:
    """(substitutions, deletions, insertions, reference length) of `align(ref, hyp)`.

    >>> edit_counts("a b c".split(), "a x c d".split())
    (1, 0, 1, 3)
    """
    ops = [op for op, _, _ in align(ref, hyp)]
    return ops.count("S"), ops.count("D"), ops.count("I"), len(ref)


def _rate(errors: int, length: int, empty_hyp: bool) -> float | None:
    if length == 0:
        # subtle: an empty reference has no rate unless the hypothesis is empty too.
        return 0.0 if empty_hyp else None
    return errors / length


def wer(ref: str, hyp: str) -> float | None:
    """Word error rate (S + D + I) / reference words of one utterance.

    An empty reference gives 0.0 against an empty hypothesis and None otherwise.

    >>> wer("a b c", "a c") == 1/3
    True
    >>> wer("", "") , wer("", "a")
    (0.0, None)
    """
    s, d, i, n = edit_counts(ref.split(), hyp.split())
    return _rate(s + d + i, n, not hyp.split())


def cer(ref: str, hyp: str) -> float | None:
    """Character error rate of one utterance; the space between words counts as a character.

    Both texts are first joined with single spaces, so the reference length is
    the length of the normalised text (as jiwer's cer also counts spaces).
    Empty references behave as in `wer`.

    >>> cer("ab c", "a c") == 1/4
    True
    """
    r, h = " ".join(ref.split()), " ".join(hyp.split())
    s, d, i, n = edit_counts(r, h)
    return _rate(s + d + i, n, not h)


def _entries(biasing_list: Iterable[str]) -> dict[int, set[tuple[str, ...]]]:
    """List entries grouped by length in words; empty entries are dropped."""
    by_len: dict[int, set[tuple[str, ...]]] = {}
    for entry in biasing_list:
        words = tuple(entry.split())
        if words:
            by_len.setdefault(len(words), set()).add(words)
    return by_len


def covering_entries(words: Sequence[str], biasing_list: Iterable[str]) -> list[str | None]:
    """For each word, the list entry whose occurrence covers it (longest entry first), else None.

    >>> covering_entries("dock at kell pier".split(), ["kell pier", "pier", "orla"])
    [None, None, 'kell pier', 'kell pier']
    """
    by_len = _entries(biasing_list)
    cover: list[str | None] = [None] * len(words)
    for length in sorted(by_len, reverse=True):
        for start in range(len(words) - length + 1):
            window = tuple(words[start : start + length])
            if window in by_len[length]:
                for pos in range(start, start + length):
                    if cover[pos] is None:
                        cover[pos] = " ".join(window)
    return cover


def score_utterance(
    ref: str,
    hyp: str,
    biasing_list: Iterable[str] = (),
    word_class: Mapping[str, str | Sequence[str]] | None = None,
) -> dict[str, int]:
    """Integer error counts of one utterance, from one word alignment.

    U-WER / B-WER split (Le et al., Interspeech 2021): a substitution or
    deletion counts to the class (biased or not) of its reference word; an
    insertion counts as biased when the inserted word is a list word.
    U-WER is also kept in parts, so that fixing biased words cannot pass for a
    U-WER gain: unbiased substitutions and deletions; unbiased insertions next
    to a biased-word error (a name written as two words: "kal vin" for
    "kalvin"), counted apart; and the other unbiased insertions.
    Precision / recall counts (Jain et al., Interspeech 2020): a word is
    correctly recognised when the alignment matches it ('C').
    `word_class` maps list entries to one label or several (a class, a name
    style); per-label counts cover biased reference words and biased
    insertions (counted to the label of the inserted word), so with every
    entry labelled the labels' errors add up to the biased errors.

    >>> c = score_utterance("call orla now", "call orlah now", ["orla"])
    >>> c["word_errors"], c["biased_errors"], c["unbiased_errors"], c["biased_correct"]
    (1, 1, 0, 0)
    >>> c = score_utterance("call kalvin", "call kal vin", ["kalvin"])
    >>> c["biased_errors"], c["unbiased_insertions"], c["unbiased_insertions_near_biased"]
    (1, 1, 1)
    """
    entries = list(biasing_list)
    ref_words, hyp_words = ref.split(), hyp.split()
    ref_cover = covering_entries(ref_words, entries)
    hyp_cover = covering_entries(hyp_words, entries)
    ref_chars, hyp_chars = " ".join(ref_words), " ".join(hyp_words)
    cs, cd, ci, _ = edit_counts(ref_chars, hyp_chars)
    c = dict.fromkeys(
        ["substitutions", "deletions", "insertions", "biased_errors", "unbiased_errors",
         "biased_insertions", "unbiased_insertions", "unbiased_subdel", "unbiased_insertions_near_biased",
         "biased_correct", "hyp_list_correct"],
        0,
    )
    per_class: dict[str, int] = {}

    def labels(entry: str | None) -> tuple[str, ...]:
        if word_class is None or entry is None or entry not in word_class:
            return ()
        got = word_class[entry]
        return (got,) if isinstance(got, str) else tuple(got)

    def bump(label: str, part: str) -> None:
        per_class[f"class:{label}:{part}"] = per_class.get(f"class:{label}:{part}", 0) + 1

    ops = align(ref_words, hyp_words)
    biased_error = [op in ("S", "D") and ref_cover[i] is not None for op, i, _ in ops]
    for k, (op, i, j) in enumerate(ops):
        if op == "I":
            c["insertions"] += 1
            if hyp_cover[j] is not None:
                c["biased_insertions"] += 1
                c["biased_errors"] += 1
                for label in labels(hyp_cover[j]):
                    bump(label, "errors")
                continue
            c["unbiased_insertions"] += 1
            c["unbiased_errors"] += 1
            # subtle: look past the other insertions of the same run ("ka l vin" for "kalvin")
            before, after = k - 1, k + 1
            while before >= 0 and ops[before][0] == "I":
                before -= 1
            while after < len(ops) and ops[after][0] == "I":
                after += 1
            near = (before >= 0 and biased_error[before]) or (after < len(ops) and biased_error[after])
            c["unbiased_insertions_near_biased"] += near
            continue
        entry = ref_cover[i]
        for label in labels(entry):
            bump(label, "words")
        if op == "C":
            c["biased_correct"] += entry is not None
            # subtle: with phrase entries a matched list word in the hypothesis can
            # sit on an unbiased reference word, so precision keeps its own count.
            c["hyp_list_correct"] += hyp_cover[j] is not None
            for label in labels(entry):
                bump(label, "correct")
            continue
        c["substitutions" if op == "S" else "deletions"] += 1
        if entry is not None:
            c["biased_errors"] += 1
        else:
            c["unbiased_errors"] += 1
            c["unbiased_subdel"] += 1
        for label in labels(entry):
            bump(label, "errors")
    in_ref = any(e is not None for e in ref_cover)
    in_hyp = any(e is not None for e in hyp_cover)
    n_biased = sum(e is not None for e in ref_cover)
    c.update(
        word_errors=c["substitutions"] + c["deletions"] + c["insertions"],
        ref_words=len(ref_words),
        char_errors=cs + cd + ci,
        ref_chars=len(ref_chars),
        biased_ref_words=n_biased,
        unbiased_ref_words=len(ref_words) - n_biased,
        hyp_list_words=sum(e is not None for e in hyp_cover),
        has_list_word_in_ref=int(in_ref),
        has_list_word_in_hyp=int(in_hyp),
        false_trigger=int(in_hyp and not in_ref),
        utterances=1,
    )
    for key in list(per_class):
        stem = key.rpartition(":")[0]
        for part in ("words", "correct", "errors"):
            per_class.setdefault(f"{stem}:{part}", 0)
    c.update(per_class)
    return c


def _div(num: float, den: float) -> float | None:
    return None if den == 0 else num / den


def summarize(counts: Iterable[dict[str, int]]) -> dict[str, float | int | None]:
    """Corpus rates from per-utterance counts (summed first, then divided).

    >>> s = summarize([score_utterance("a b", "a c"), score_utterance("c", "c")])
    >>> s["wer"], s["n_utts"], s["bwer"]
    (0.3333333333333333, 2, None)
    """
    total: dict[str, int] = {}
    for c in counts:
        for key, value in c.items():
            total[key] = total.get(key, 0) + value
    g = lambda key: total.get(key, 0)  # noqa: E731
    precision = _div(g("hyp_list_correct"), g("hyp_list_words"))
    recall = _div(g("biased_correct"), g("biased_ref_words"))
    if precision is None or recall is None:
        f1 = None
    else:
        f1 = 0.0 if precision + recall == 0 else 2 * precision * recall / (precision + recall)
    no_list_in_ref = g("utterances") - g("has_list_word_in_ref")
    out: dict[str, float | int | None] = {
        "wer": _div(g("word_errors"), g("ref_words")),
        "cer": _div(g("char_errors"), g("ref_chars")),
        "uwer": _div(g("unbiased_errors"), g("unbiased_ref_words")),
        # U-WER in parts (they add up to it): substitutions and deletions, insertions next to a
        # biased-word error, other insertions
        "uwer_subdel": _div(g("unbiased_subdel"), g("unbiased_ref_words")),
        "uwer_ins_near_biased": _div(g("unbiased_insertions_near_biased"), g("unbiased_ref_words")),
        "uwer_ins_other": _div(g("unbiased_insertions") - g("unbiased_insertions_near_biased"),
                               g("unbiased_ref_words")),
        "bwer": _div(g("biased_errors"), g("biased_ref_words")),
        "precision": precision,
        "recall": recall,
        "f1": f1,
        "false_trigger_rate": _div(g("false_trigger"), no_list_in_ref),
        "n_utts": g("utterances"),
        "n_ref_words": g("ref_words"),
        "n_biased_words": g("biased_ref_words"),
        "n_unbiased_words": g("unbiased_ref_words"),
        "n_hyp_list_words": g("hyp_list_words"),
        "n_utts_without_list_word": no_list_in_ref,
        "n_false_triggers": g("false_trigger"),
    }
    classes = sorted({k[len("class:") :].rpartition(":")[0] for k in total if k.startswith("class:")})
    for cls in classes:
        words = g(f"class:{cls}:words")
        out[f"bwer:{cls}"] = _div(g(f"class:{cls}:errors"), words)
        out[f"recall:{cls}"] = _div(g(f"class:{cls}:correct"), words)
        out[f"n_biased_words:{cls}"] = words
    return out


def paired_bootstrap(
    num_a, num_b, den, n_resamples: int = 1000, seed: int = 0, level: float = 0.95
) -> dict[str, float | None]:
    """Paired bootstrap over utterances of the change in a corpus error rate (Bisani & Ney, ICASSP 2004).

    `num_a`, `num_b`: per-utterance error counts of systems A and B; `den`:
    per-utterance reference counts (shared, the references are the same).
    Each resample draws utterances with replacement and takes
    delta = rate_B - rate_A; `low`/`high` are the percentile interval at
    `level`, `p_improvement` the share of resamples where B's rate is lower.
    Resamples whose denominator sums to 0 are dropped (`n_used` says how many
    remain); with none left the interval and probability are None. Memory is
    one (n_resamples, n_utts) index matrix.

    >>> r = paired_bootstrap([1, 0, 2], [1, 0, 2], [3, 2, 4])
    >>> r["delta"], r["low"], r["high"], r["p_improvement"]
    (0.0, 0.0, 0.0, 0.5)
    """
    a, b, d = (np.asarray(x, dtype=np.float64) for x in (num_a, num_b, den))
    if not (a.ndim == b.ndim == d.ndim == 1 and len(a) == len(b) == len(d)):
        raise ValueError(
            f"paired_bootstrap needs three 1-D arrays of equal length (one entry per utterance); "
            f"got shapes {a.shape}, {b.shape}, {d.shape}"
        )
    if len(d) == 0:
        raise ValueError("paired_bootstrap needs at least one utterance; got empty arrays")
    if not 0 < level < 1:
        raise ValueError(f"level must lie strictly between 0 and 1 (e.g. 0.95); got {level}")
    if n_resamples < 1:
        raise ValueError(f"n_resamples must be at least 1; got {n_resamples}")
    rate_a, rate_b = _div(float(a.sum()), float(d.sum())), _div(float(b.sum()), float(d.sum()))
    out: dict[str, float | None] = {
        "rate_a": rate_a,
        "rate_b": rate_b,
        "delta": None if rate_a is None else rate_b - rate_a,
        "low": None,
        "high": None,
        "p_improvement": None,
        "n_used": 0,
    }
    rng = np.random.default_rng(seed)
    idx = rng.integers(0, len(d), size=(n_resamples, len(d)))  # (R, n_utts)
    den_r = d[idx].sum(axis=1)
    keep = den_r > 0
    if not keep.any():
        return out
    deltas = (b[idx].sum(axis=1)[keep] - a[idx].sum(axis=1)[keep]) / den_r[keep]
    tail = (1 - level) / 2
    low, high = np.quantile(deltas, [tail, 1 - tail])
    # subtle: a tied resample (equal rates) counts half, so identical systems
    # score 0.5 rather than 0; the paper's strict share is the special case
    # without ties.
    p = np.mean(deltas < 0) + 0.5 * np.mean(deltas == 0)
    out.update(low=float(low), high=float(high), p_improvement=float(p), n_used=int(keep.sum()))
    return out


# Per-utterance count keys behind each error rate that can be bootstrapped.
RATE_KEYS = {
    "wer": ("word_errors", "ref_words"),
    "cer": ("char_errors", "ref_chars"),
    "uwer": ("unbiased_errors", "unbiased_ref_words"),
    "bwer": ("biased_errors", "biased_ref_words"),
    # not an error rate: higher is better, so a gain in recall is a positive delta and
    # paired_bootstrap's p_improvement (B's rate lower) is then the chance B recalls less
    "recall": ("biased_correct", "biased_ref_words"),
}


def compare_systems(
    counts_a: Mapping[str, dict[str, int]] | Sequence[dict[str, int]],
    counts_b: Mapping[str, dict[str, int]] | Sequence[dict[str, int]],
    rate: str = "wer",
    n_resamples: int = 1000,
    seed: int = 0,
    level: float = 0.95,
) -> dict[str, float | None]:
    """`paired_bootstrap` of one error rate between two systems scored on the same utterances.

    Given mappings utterance id -> counts, utterances are paired by id and two
    different sets of ids are refused; given sequences, they are taken as
    already paired by position.

    >>> a = {"u1": score_utterance("a b", "a c"), "u2": score_utterance("c d", "c d")}
    >>> compare_systems(a, a)["delta"]
    0.0
    """
    if rate not in RATE_KEYS:
        raise ValueError(f"unknown rate {rate!r}; expected one of {sorted(RATE_KEYS)}")
    if isinstance(counts_a, Mapping) != isinstance(counts_b, Mapping):
        raise ValueError("give both systems' counts as mappings of utterance id -> counts, or both as sequences")
    if isinstance(counts_a, Mapping):
        only_a, only_b = sorted(set(counts_a) - set(counts_b)), sorted(set(counts_b) - set(counts_a))
        if only_a or only_b:
            raise ValueError(f"the two systems were scored on different utterances: {len(only_a)} only in A "
                             f"(e.g. {only_a[:3]}), {len(only_b)} only in B (e.g. {only_b[:3]})")
        ids = sorted(counts_a)
        counts_a, counts_b = [counts_a[i] for i in ids], [counts_b[i] for i in ids]
    if len(counts_a) != len(counts_b):
        raise ValueError(
            f"both systems must be scored on the same utterances; got {len(counts_a)} and {len(counts_b)}"
        )
    num_key, den_key = RATE_KEYS[rate]
    den = [c[den_key] for c in counts_a]
    if den != [c[den_key] for c in counts_b]:
        raise ValueError(
            f"the two systems disagree on '{den_key}' per utterance; are the references the same?"
        )
    return paired_bootstrap(
        [c[num_key] for c in counts_a], [c[num_key] for c in counts_b], den, n_resamples, seed, level
    )
