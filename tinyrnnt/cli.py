"""The `tinyrnnt` command line (thin: every command calls importable functions).

    tinyrnnt corpus  [--out DIR] [--overwrite] [key=value ...]   build a synthetic corpus, print its card
    tinyrnnt card    DIR                                          print the card of a corpus
    tinyrnnt train   [--recipe R] [--resume] [key=value ...]      train one model
    tinyrnnt decode  CHECKPOINT [--split S] [--list-size N] ...   decode a split, write hypotheses + scores
    tinyrnnt score   HYPS.jsonl [--corpus DIR --split S]          score a hypothesis file
    tinyrnnt experiment [--recipe R] [--resume] [key=value ...]   corpus if needed, train, evaluate, tables
    tinyrnnt report  FOLDER [--out DIR] [--against RUN]           a results folder as summary, CSV, plots, one HTML page
    tinyrnnt bench   NAME [options]                               a benchmark (python -m tinyrnnt.bench)
"""

from __future__ import annotations

import argparse
import errno
import json
import signal
import sys
from pathlib import Path

from tinyrnnt.config import ConfigError


def _corpus(args) -> int:
    from tinyrnnt.synth.card import format_card
    from tinyrnnt.synth.corpus import build_corpus, corpus_config

    cfg = corpus_config(args.settings, args.preset)
    card = build_corpus(cfg, args.out, overwrite=args.overwrite, quiet=args.quiet)
    print(format_card(card))
    return 0


def _card(args) -> int:
    from tinyrnnt.synth.card import format_card

    path = Path(args.folder) / "card.json"
    if not path.is_file():
        print(f"error: {path} not found; is {args.folder} a corpus folder?", file=sys.stderr)
        return 2
    print(format_card(json.loads(path.read_text(encoding="utf-8"))))
    return 0


def _train(args) -> int:
    from tinyrnnt.experiment import load_experiment
    from tinyrnnt.lab.recipes import ensure_corpus
    from tinyrnnt.lab.train import train

    from tinyrnnt.model.transducer import Transducer, count_parameters

    cfg = load_experiment(args.recipe, args.settings)
    ensure_corpus(cfg, quiet=args.quiet)
    bias = cfg.bias if cfg.bias.kind != "none" else None
    print(f"model: {count_parameters(Transducer(cfg.model, bias)):,} parameters "
          f"(shapes: see the glossary in tinyrnnt/model/transducer.py)")
    result = train(cfg, quiet=args.quiet, resume=args.resume)
    print(f"trained {result.steps} steps in {result.train_seconds / 60:.1f} training minutes; "
          f"best checkpoint {result.best_checkpoint}")
    return 0


def _decode(args) -> int:
    from tinyrnnt.data import CorpusSplit
    from tinyrnnt.lab.evaluate import evaluate, save_results
    from tinyrnnt.lab.train import load_model

    from tinyrnnt.files import MB, check_output_folder

    from tinyrnnt import config as C
    from tinyrnnt.lab.evaluate import read_list_pronunciations, read_list_sections

    not_decode = [x for x in args.settings if not x.startswith("decode.")]
    if not_decode:
        raise C.ConfigError(f"decode takes only decode.KEY=VALUE settings, got {not_decode[0]!r}")
    own_list, own_classes, own_phones, settings = None, None, None, list(args.settings)
    if args.list_file:
        own_list, own_classes, own_triggers = read_list_sections(args.list_file)
        own_phones = read_list_pronunciations(args.list_file)
        if own_triggers:  # the file's trigger phrases; decode.triggers in the settings replaces them
            settings.insert(0, f"decode.triggers={json.dumps(own_triggers)}")
    model, cfg, _ = load_model(args.checkpoint)
    cfg = C.apply_overrides(cfg, settings)
    split = CorpusSplit(args.corpus or cfg.data.corpus, args.split)
    out = Path(args.out or Path(args.checkpoint).parent.parent / "decode")
    check_output_folder(out, MB, "decode output folder")  # before decoding, not after
    records, summary = evaluate(model, split, list_size=args.list_size, confusable=args.confusable,
                                max_symbols=cfg.decode.max_symbols, fixed_list=own_list,
                                fixed_classes=own_classes, search=cfg.decode.search, beam=cfg.decode.beam,
                                boost=cfg.decode.boost(), sounds_like=cfg.decode.sounds_like,
                                pronunciations=own_phones, spotting=cfg.decode.spotting)
    name = (f"{args.split}.{Path(args.list_file).stem}" if args.list_file
            else f"{args.split}.n{args.list_size}" + (".confusable" if args.confusable else ""))
    save_results(out, name, records, summary)
    print(json.dumps({k: summary[k] for k in ("wer", "cer", "uwer", "bwer", "recall", "precision")}, indent=1))
    print(f"wrote {out / (name + '.hyps.jsonl')} and {out / (name + '.scores.json')}")
    return 0


def _score(args) -> int:
    from tinyrnnt.data import CorpusError
    from tinyrnnt.score import score_utterance, summarize
    from tinyrnnt.text import normalize

    path = Path(args.hyps)
    if not path.is_file():
        raise CorpusError(f"{path}: hypothesis file not found")
    counts = []
    if args.corpus:
        from tinyrnnt.data import CorpusSplit

        split = CorpusSplit(args.corpus, args.split)
        by_id = {it["id"]: i for i, it in enumerate(split.items)}
    for lineno, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
        if not line.strip():
            continue  # blank lines carry nothing
        try:
            row = json.loads(line)
            ref, hyp = normalize(row["ref"]), normalize(row["hyp"])  # both sides normalised alike
        except (json.JSONDecodeError, KeyError, TypeError, AttributeError):
            raise CorpusError(f"{path}:{lineno}: expected a JSON object with text fields 'ref' and 'hyp'") from None
        lst = []
        if args.corpus and row.get("list_size"):
            if row.get("id") not in by_id:
                raise CorpusError(f"{path}:{lineno}: utterance {row.get('id')!r} is not in split {args.split!r} "
                                  f"of {args.corpus}; is this a hypothesis file of another split?")
            lst = split.biasing_list(by_id[row["id"]], int(row["list_size"]))
        counts.append(score_utterance(ref, hyp, lst))
    if not counts:
        raise CorpusError(f"{path}: no hypotheses in the file; expected one JSON object a line")
    print(json.dumps(summarize(counts), indent=1))
    return 0


def _picture(args) -> int:
    from tinyrnnt.lab.pictures import utterance_pictures

    facts = utterance_pictures(args.checkpoint, args.split, args.out, args.utterance, args.list_size, args.corpus)
    print(f"{facts['id']}: ref {facts['ref']!r}, hyp {facts['hyp']!r}")
    print("wrote " + ", ".join(facts["files"]))
    return 0


def _experiment(args) -> int:
    from tinyrnnt.lab.recipes import run_recipe

    run_recipe(args.recipe, args.settings, quiet=args.quiet, resume=args.resume)
    return 0


def _report(args) -> int:
    from tinyrnnt.lab.page import fmt, label
    from tinyrnnt.lab.report import make_report

    made = make_report(args.folder, args.out, args.against)
    for sentence in made["headline_text"] if not args.quiet else ():
        print(f"- {sentence}")
    rows = made["headline"]
    if rows and not args.quiet:
        keys = [k for k in rows[0] if k not in ("steps", "against_steps", "verdict")]
        print("| " + " | ".join(label(k) for k in keys) + " |")
        for r in rows:
            print("| " + " | ".join(fmt(r[k]) for k in keys) + " |")
    print(f"report: {made['html']} (one file, opens in any browser); summary: {made['markdown']}")
    return 0


def build_parser() -> argparse.ArgumentParser:
    from tinyrnnt import __version__

    p = argparse.ArgumentParser(prog="tinyrnnt", description="A laptop lab for contextual biasing of RNN-T models.")
    p.add_argument("--version", action="version", version=f"tinyrnnt {__version__}")
    sub = p.add_subparsers(dest="command", required=True)

    c = sub.add_parser("corpus", help="build a synthetic corpus and print its card",
                       epilog="example: tinyrnnt corpus --out corpora/small --preset small seed=3")
    c.add_argument("--out", default="corpora/default", help="corpus folder to create (default corpora/default)")
    c.add_argument("--preset", default=None,
                   help="a named set of settings: small = a corpus for trying things out, built in seconds")
    c.add_argument("--overwrite", action="store_true",
                   help="replace an existing corpus folder (only one holding a corpus card, or an empty one)")
    c.add_argument("--quiet", action="store_true", help="no progress lines")
    c.add_argument("settings", nargs="*",
                   help="corpus settings as key=value or corpus.key=value, e.g. seed=3 text.few_shot_share=0.5 "
                        "scenario=path/to/scenario.yaml")
    c.set_defaults(fn=_corpus)

    k = sub.add_parser("card", help="print the card of an existing corpus")
    k.add_argument("folder", help="a corpus folder (holding card.json)")
    k.set_defaults(fn=_card)

    t = sub.add_parser("train", help="train one model (recipe + key=value settings)")
    t.add_argument("--recipe", default=None,
                   help="one experiment's recipe: a built-in name (baseline) or a YAML path (differences from the defaults)")
    t.add_argument("--resume", action="store_true", help="continue from the run folder's last checkpoint")
    t.add_argument("--quiet", action="store_true", help="no progress bar")
    t.add_argument("settings", nargs="*",
                   help="section.key=value, e.g. train.steps=600 model.encoder_dim=192 bias.kind=trie "
                        "(bias.kind: none, trie, attention or trie+attention; bias.inject: joiner, predictor or both; "
                        "bias.boost_mode: add, mix or mix_heard); unknown keys list the valid ones")
    t.set_defaults(fn=_train)

    d = sub.add_parser("decode", help="decode a split with a checkpoint; write hypotheses and scores")
    d.add_argument("checkpoint", help="a .ckpt file written by `tinyrnnt train` (e.g. runs/NAME/checkpoints/last.ckpt)")
    d.add_argument("--corpus", default=None, help="corpus folder (default: the one the model trained on)")
    d.add_argument("--split", default="test",
                   help="split to decode: train, valid, test, test_unseen or test_soundalike (default test)")
    d.add_argument("--list-size", type=int, default=0, help="biasing list size N (0 = no list)")
    d.add_argument("--confusable", action="store_true", help="lists led by other spellings of the same sound")
    d.add_argument("--list-file", default=None,
                   help="your own biasing list, one entry a line ('#' starts a comment), used for every utterance "
                        "instead of the corpus lists")
    d.add_argument("--out", default=None, help="folder for results (default: RUN/decode)")
    d.add_argument("settings", nargs="*", metavar="decode.KEY=VALUE",
                   help="decoding settings, e.g. decode.search=beam decode.beam=4 decode.boost_weight=2 "
                        "decode.boost_where=after_trigger 'decode.triggers={invented_name: call | ring}' "
                        "(search: greedy or beam; boost_where: anywhere or after_trigger)")
    d.set_defaults(fn=_decode)

    s = sub.add_parser("score", help="score a hypothesis file (JSON Lines with ref and hyp)")
    s.add_argument("hyps", help="JSON Lines file, one object a line with 'ref' and 'hyp' (and 'id', 'list_size')")
    s.add_argument("--corpus", default=None, help="corpus folder, to score against its biasing lists")
    s.add_argument("--split", default="test", help="split the hypotheses are of (default test)")
    s.set_defaults(fn=_score)

    e = sub.add_parser("experiment", help="run a recipe end to end: corpus, training, evaluation, table")
    e.add_argument("--recipe", default=None,
                   help="recipe: a built-in name (trie_vs_baseline, the default; baseline) or a YAML path")
    e.add_argument("--quiet", action="store_true", help="no progress lines")
    e.add_argument("--resume", action="store_true",
                   help="keep finished arms and evaluations of an interrupted run; continue unfinished arms")
    e.add_argument("settings", nargs="*",
                   help="section.key=value overrides: of the recipe itself (evaluate.list_sizes=[0,100], seeds=[0,1], "
                        "parallel=1, controls=false, pairing=from_scratch) or of every run (train.steps=300)")
    e.set_defaults(fn=_experiment)

    r = sub.add_parser("report", help="render a results folder into a summary, CSV tables, plots and one HTML page",
                       epilog="example: tinyrnnt report runs/trie_vs_baseline --against baseline")
    r.add_argument("folder", help="a results folder written by `tinyrnnt experiment` (holding results.json, or a "
                                  "grid's grid.jsonl)")
    r.add_argument("--out", default=None, help="folder for the report (default FOLDER/report)")
    r.add_argument("--against", default=None, metavar="RUN",
                   help="also compare every system with this run (paired bootstrap of WER, U-WER and B-WER)")
    r.add_argument("--quiet", action="store_true", help="print only where the report is")
    r.set_defaults(fn=_report)

    g = sub.add_parser("picture", help="pictures of one utterance: attention over the list, and the lattice "
                                       "with the trie cue's active positions")
    g.add_argument("checkpoint", help="a .ckpt file written by `tinyrnnt train`")
    g.add_argument("--split", default="test_unseen", help="split of the utterance (default test_unseen)")
    g.add_argument("--utterance", default=None, help="utterance id (default: the first one with a rare word)")
    g.add_argument("--list-size", type=int, default=100, help="biasing list size N (default 100)")
    g.add_argument("--corpus", default=None, help="corpus folder (default: the one the model trained on)")
    g.add_argument("--out", default="pictures", help="folder for the PNG files (default pictures)")
    g.set_defaults(fn=_picture)

    sub.add_parser("bench", help="run a benchmark, as python -m tinyrnnt.bench NAME (see tinyrnnt bench --help)")
    from tinyrnnt.audio.commands import add_commands

    add_commands(sub)  # speak, audio-corpus, export
    return p


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    if argv[:1] == ["bench"]:  # the benchmarks keep their own options, help included
        from tinyrnnt.bench import main as bench_main

        return bench_main(argv[1:])
    parser = build_parser()
    args, extra = parser.parse_known_args(argv)
    if getattr(args, "fn", None) is _decode and all("=" in x and not x.startswith("-") for x in extra):
        args.settings = list(args.settings) + extra  # decode.KEY=VALUE settings given after the options
    elif extra:
        parser.error(f"unrecognized arguments: {' '.join(extra)}")
    signal.signal(signal.SIGTERM, _terminated)
    try:
        return _run(args)
    except KeyboardInterrupt as stop:
        print("interrupted; finished runs and results are kept (continue an experiment with --resume)",
              file=sys.stderr)
        return 143 if isinstance(stop, Terminated) else 130


class Terminated(KeyboardInterrupt):
    """SIGTERM (a job scheduler, `kill`): handled as Ctrl-C is, so training workers stop too."""


def _terminated(signum, frame):
    raise Terminated()


WRITE_ERRORS = (errno.ENOSPC, errno.EDQUOT, errno.EROFS, errno.EACCES)


def _run(args) -> int:
    from tinyrnnt.data import CorpusError
    from tinyrnnt.synth.corpus import CorpusExistsError
    from tinyrnnt.synth.lexicon import LexiconError
    from tinyrnnt.synth.scenario import ScenarioError
    from tinyrnnt.text import TokenError

    known = (ConfigError, CorpusError, CorpusExistsError, LexiconError, ScenarioError, TokenError)
    try:
        return args.fn(args)
    except known as err:
        print(f"error: {err}", file=sys.stderr)
        return 2
    except Exception as err:
        from tinyrnnt.lab.train import CheckpointError

        if isinstance(err, CheckpointError):
            print(f"error: {err}", file=sys.stderr)
            return 2
        if isinstance(err, OSError) and err.errno in WRITE_ERRORS:
            # the disk filled up or turned read-only during the work; results, configs and
            # checkpoints are written to a temporary name and renamed, so those already there are whole
            print(f"error: cannot write {err.filename or 'a file'}: {err.strerror}; results and checkpoints "
                  "already written are whole; free some space or pick another place", file=sys.stderr)
            return 2
        raise


if __name__ == "__main__":
    sys.exit(main())
