"""Commands for taking the lab to recorded speech and other machines (registered by tinyrnnt.cli):

    tinyrnnt speak --out DIR [--voice espeak] [--preset small] [key=value ...]   the corpus as WAV + manifests
    tinyrnnt audio-corpus --manifests DIR --out DIR [--skip-bad-lines]   audio manifests -> a corpus folder
    tinyrnnt export CHECKPOINT --out FILE                          plain weights + settings (weights_only)
"""

from __future__ import annotations

import json


def _speak(args) -> int:
    from tinyrnnt.audio.speak import FormantVoice, speak_corpus
    from tinyrnnt.synth.corpus import corpus_config

    cfg = corpus_config(args.settings, args.preset)
    voice = FormantVoice
    if args.voice == "espeak":
        from tinyrnnt.audio.outside import EspeakVoice, espeak_path

        espeak_path()  # a missing espeak-ng is one error line saying how to install it, before any work
        voice = EspeakVoice
    info = speak_corpus(cfg, args.out, list_size=args.list_size, overwrite=args.overwrite, quiet=args.quiet,
                        voice=voice)
    print(f"wrote {info['utterances']} utterances, {info['audio_seconds'] / 3600:.2f} h of 16 kHz 16-bit WAV, "
          f"rendered in {info['render_seconds']:.0f} s ({info['audio_seconds'] / max(info['render_seconds'], 1e-9):.0f}x "
          f"real time); manifests in {args.out}; next: tinyrnnt audio-corpus --manifests {args.out} --out CORPUS")
    return 0


def _audio_corpus(args) -> int:
    from tinyrnnt.audio.corpus import audio_corpus_config, build_audio_corpus
    from tinyrnnt.synth.card import format_card

    settings = list(args.settings) + (["skip_bad_lines=true"] if args.skip_bad_lines else [])
    cfg = audio_corpus_config(settings)
    card = build_audio_corpus(args.manifests, args.out, cfg, overwrite=args.overwrite, quiet=args.quiet)
    print(format_card(card))
    if card["skipped_lines"]:
        print(f"skipped {card['skipped_lines']} bad lines (listed in {args.out}/card.json under 'skipped'):")
        for msg in card["skipped"][:10]:
            print(f"  {msg}")
    print(f"use it with data.corpus={args.out}")
    return 0


def _export(args) -> int:
    from tinyrnnt.lab.export import export_checkpoint

    out = export_checkpoint(args.checkpoint, args.out)
    print(json.dumps({"exported": str(out), "load_with": "tinyrnnt.lab.export.load_exported(path)"}))
    return 0


def add_commands(sub) -> None:
    s = sub.add_parser("speak", help="render the synthetic corpus as 16 kHz WAV files with audio manifests",
                       epilog="example: tinyrnnt speak --out audio/small --preset small")
    s.add_argument("--out", required=True, help="folder to create: wav/, one <split>.jsonl per split, inventory.tsv")
    s.add_argument("--preset", default=None, help="corpus preset (as for tinyrnnt corpus), e.g. small")
    s.add_argument("--voice", choices=["formant", "espeak"], default="formant",
                   help="formant: our synthesizer with the feature corpus's speakers and durations (default); "
                        "espeak: espeak-ng's English voices (a system package), rare words from their phones")
    s.add_argument("--list-size", type=int, default=None,
                   help="biasing-list entries written per utterance (default: the largest of list_sizes)")
    s.add_argument("--overwrite", action="store_true", help="replace a folder this command made before")
    s.add_argument("--quiet", action="store_true", help="no progress lines")
    s.add_argument("settings", nargs="*", help="corpus settings as key=value, as for tinyrnnt corpus")
    s.set_defaults(fn=_speak)

    a = sub.add_parser("audio-corpus", help="turn a folder of audio manifests into a corpus folder (features cached)",
                       epilog="example: tinyrnnt audio-corpus --manifests my_recordings --out corpora/mine --skip-bad-lines")
    a.add_argument("--manifests", required=True, help="folder of <split>.jsonl manifests (audio path relative to the manifest, text, "
                                     "optional list and spans)")
    a.add_argument("--out", required=True, help="corpus folder to create; then train with data.corpus=THIS")
    a.add_argument("--skip-bad-lines", action="store_true",
                   help="skip lines with bad audio or text instead of stopping; the count is reported")
    a.add_argument("--overwrite", action="store_true", help="replace an existing corpus folder")
    a.add_argument("--quiet", action="store_true", help="no progress lines")
    a.add_argument("settings", nargs="*",
                   help="key=value, e.g. list_size=100 features.resample=false features.mix_channels=true")
    a.set_defaults(fn=_audio_corpus)

    e = sub.add_parser("export", help="write a checkpoint's model as plain weights + settings")
    e.add_argument("checkpoint", help="a .ckpt written by tinyrnnt train")
    e.add_argument("--out", required=True, help="file to write (loads with torch.load(..., weights_only=True))")
    e.set_defaults(fn=_export)
