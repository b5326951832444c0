"""The synthetic corpus, spoken: 16 kHz 16-bit WAV files and audio manifests.

For corpus settings (a preset and overrides, as `tinyrnnt corpus` takes) this
writes a manifest folder (`tinyrnnt.audio.manifest`): `wav/<split>/<id>.wav`,
one `<split>.jsonl` per split and the corpus's `inventory.tsv`. Sentences,
speakers, their assignment to utterances, durations and biasing lists are the
feature corpus's of the same settings: the same seeds drawn in the same order
(`tinyrnnt.synth.corpus.build_corpus`), so `tinyrnnt audio-corpus --manifests` on this
folder gives a corpus with the feature corpus's splits, exposures, lists and
ids, its frames made from audio instead.

Lists in the manifests hold `list_size` entries (default: the largest of
`list_sizes`); confusable lists are not carried.
"""

from __future__ import annotations

import os
import shutil
import sys
import time
from pathlib import Path

import numpy as np

from tinyrnnt.audio.formant import WaveRenderer
from tinyrnnt.audio.manifest import write_manifest
from tinyrnnt.synth.acoustics import make_speakers
from tinyrnnt.synth.corpus import (CHUNK, CONFUSABLE_SPLITS, LIST_SPLITS, SPLITS, CorpusConfig, CorpusExistsError,
                                   _lists, make_text)


class FormantVoice:
    """The built-in voice: `tinyrnnt.audio.formant` with the feature renderer's speakers and timing."""

    def __init__(self, cfg: CorpusConfig, speakers, inventory):
        self.renderer = WaveRenderer(cfg.acoustics, speakers)
        self.sample_rate = cfg.acoustics.sample_rate

    def render(self, sentences, speaker_ids, rng) -> list[np.ndarray]:
        return self.renderer.render([s.phones for s in sentences], speaker_ids, rng)


def speak_corpus(cfg: CorpusConfig, out_dir: str | Path, list_size: int | None = None, overwrite: bool = False,
                 quiet: bool = False, voice=FormantVoice) -> dict:
    """Write the manifest folder; returns {"utterances", "audio_seconds", "render_seconds", "folder"}.

    voice: a class made with (cfg, speakers, inventory) whose `render(sentences, speaker_ids, rng)`
    gives int16 waveforms at its `sample_rate`; speaker ids index `speakers` (training ones first,
    `cfg.train_speakers` of them, then the held-out ones)."""
    import soundfile as sf

    out_dir = Path(out_dir)
    if out_dir.exists() and not (overwrite and (out_dir / "inventory.tsv").is_file()):
        raise CorpusExistsError(f"{out_dir} already exists; pass overwrite to replace a spoken corpus folder")
    list_size = max(cfg.list_sizes) if list_size is None else list_size
    t0 = time.perf_counter()
    scn, inventory, splits = make_text(cfg)
    seeds = np.random.SeedSequence(cfg.seed).spawn(9)
    spk_rng = np.random.default_rng(seeds[5])
    speakers = make_speakers(cfg.train_speakers + cfg.heldout_speakers, spk_rng, cfg.acoustics)
    renderer = voice(cfg, speakers, inventory)
    index = {rw.word: i for i, rw in enumerate(inventory)}
    out_dir.parent.mkdir(parents=True, exist_ok=True)
    tmp = out_dir.parent / f".{out_dir.name}.partial-{os.getpid()}"
    shutil.rmtree(tmp, ignore_errors=True)
    tmp.mkdir()
    render_s = audio_s = 0.0
    try:
        chunk_seeds = np.random.SeedSequence([cfg.seed, 1]).spawn(len(SPLITS))
        speaker_of = {}
        for k, split in enumerate(SPLITS):  # the speaker and timing draws of build_corpus, in its order
            sents = splits[split]
            lo, hi = (0, cfg.train_speakers) if split == "train" else \
                (cfg.train_speakers, cfg.train_speakers + cfg.heldout_speakers)
            speaker_of[split] = spk = spk_rng.integers(lo, hi, size=len(sents))
            (tmp / "wav" / split).mkdir(parents=True)
            seeds_k = chunk_seeds[k].spawn((len(sents) + CHUNK - 1) // CHUNK)
            for c in range(0, len(sents), CHUNK):
                t1 = time.perf_counter()
                waves = renderer.render(sents[c:c + CHUNK], spk[c:c + CHUNK].tolist(),
                                        np.random.default_rng(seeds_k[c // CHUNK]))
                render_s += time.perf_counter() - t1
                for i, w in enumerate(waves, c):
                    sf.write(tmp / "wav" / split / f"{split}-{i:06d}.wav", w, renderer.sample_rate,
                             subtype="PCM_16")
                    audio_s += len(w) / renderer.sample_rate
            if not quiet:
                print(f"{split}: {len(sents)} utterances ({time.perf_counter() - t0:.1f} s)", file=sys.stderr)
        list_rng = np.random.default_rng(seeds[6])
        lists = {}
        for split in LIST_SPLITS:  # every list build_corpus draws, in its order, so the draws line up
            kinds = [("soundalikes" if split == "test_soundalike" else "", "lists")]
            kinds += [("siblings", "confusable")] if split in CONFUSABLE_SPLITS else []
            for lead, suffix in kinds:
                arr = _lists(splits[split], inventory, index, cfg.max_list_size, list_rng, lead,
                             cfg.lists_skip_other_spellings)
                if suffix == "lists":
                    lists[split] = arr
        for split in SPLITS:
            rows = []
            for i, s in enumerate(splits[split]):
                row = {"id": f"{split}-{i:06d}", "audio": f"wav/{split}/{split}-{i:06d}.wav", "text": s.text,
                       "speaker": f"spk{int(speaker_of[split][i]):03d}", "spans": s.spans}
                if split in lists:
                    own = list(dict.fromkeys(sp["word"] for sp in s.spans))
                    row["list"] = own + [inventory[int(j)].word for j in lists[split][i][: max(list_size - len(own), 0)]]
                rows.append(row)
            write_manifest(tmp / f"{split}.jsonl", rows)
        with open(tmp / "inventory.tsv", "w", encoding="utf-8") as f:
            f.write("index\tword\tclass\tslot\texposure\tgroup\tstyle\tphones\n")
            for i, rw in enumerate(inventory):
                f.write(f"{i}\t{rw.word}\t{rw.cls}\t{rw.slot}\t{rw.exposure}\t{rw.group}\t{rw.style}\t"
                        f"{' '.join(rw.phones)}\n")
        if out_dir.exists():
            shutil.rmtree(out_dir)
        tmp.rename(out_dir)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return {"folder": str(out_dir), "utterances": sum(len(v) for v in splits.values()),
            "audio_seconds": round(audio_s, 2), "render_seconds": round(render_s, 2),
            "scenario": scn.name}
