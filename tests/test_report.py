"""The report of a real (tiny) experiment: files, tables, plots, one self-contained HTML page, and
that page opened from disk with no network in a real headless browser (Chromium)."""

import base64
import csv
import json
import os
import re
import shutil
import subprocess

import pytest

from tinyrnnt.cli import main
from tinyrnnt.config import ConfigError
from tinyrnnt.lab.recipes import run_recipe
from tinyrnnt.lab.report import make_report
from tinyrnnt.synth.corpus import CorpusConfig, build_corpus
from test_cli import TINY  # the same tiny corpus settings as the CLI tests

PNG = b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification, section 5.2)


@pytest.fixture(scope="module")
def results(tmp_path_factory):
    """A finished tiny experiment: baseline, trie arm and its control; greedy and tuned shallow fusion."""
    tmp = tmp_path_factory.mktemp("report")
    corpus = tmp / "corpus"
    build_corpus(CorpusConfig(seed=4, **TINY), corpus, quiet=True)
    recipe = tmp / "tiny.yaml"
    recipe.write_text(f"""
name: tiny
out_dir: {tmp / 'runs'}
shared:
  data: {{corpus: {corpus}, batch_size: 16, valid_subset: 16}}
  model: {{encoder_dim: 32, predictor_dim: 32, predictor_embed: 16, joiner_dim: 24, encoder_layers: 2}}
  train: {{steps: 6, minutes: 0, validate_every_steps: 3, threads: 1, snapshot_minutes: 0}}
runs:
  baseline: {{}}
  trie: {{bias: {{kind: trie, cue_dim: 8, token_boost: true}}, train: {{init_from: "run:baseline", steps: 4}}}}
evaluate:
  splits: [test_unseen]
  list_sizes: [0, 10]
  decoding:
    greedy: {{}}
    fusion: {{search: beam, beam: 2, boost_weight: tuned}}
  tune: {{list_size: 10, weights: [0, 2]}}
""")
    run_recipe(recipe, quiet=True)
    return tmp / "runs" / "tiny"


def _csv(path):
    with open(path, newline="", encoding="utf-8") as f:
        return list(csv.DictReader(f))


def test_report_of_a_tiny_real_experiment(results, tmp_path, capsys):
    out = tmp_path / "report"
    code = main(["report", str(results), "--out", str(out), "--against", "baseline"])
    printed = capsys.readouterr().out
    assert code == 0 and str(out / "report.html") in printed
    assert "trie against trie_control" in printed  # the headline sentence, and its table below
    for name in ("summary.md", "report.html", "headline.csv", "rates_with_intervals.csv", "bwer_by_class.csv",
                 "against_baseline.csv", "training.png", "boost.fusion.png", "rates.greedy.test_unseen.png",
                 "rates.fusion.test_unseen.png"):
        assert (out / name).is_file(), name
    assert all(p.read_bytes()[:8] == PNG for p in out.glob("*.png"))
    assert not list(out.glob(".*.tmp"))  # written atomically: no temporary left behind
    # every rate with intervals: the interval holds the rate, rows match results.json
    table = json.loads((results / "results.json").read_text())
    rates = _csv(out / "rates_with_intervals.csv")
    assert len(rates) == len(table)
    for r in rates:
        if r["bwer"]:
            assert float(r["bwer_low"]) <= float(r["bwer"]) <= float(r["bwer_high"])
        assert float(r["uwer_low"]) <= float(r["uwer"]) <= float(r["uwer_high"])
    # headline: B-WER of the trie arm against its equal-steps control, with words for the interval
    head = _csv(out / "headline.csv")
    assert {(h["system"], h["against"]) for h in head} == {("trie", "trie_control")}
    assert all(h["steps"] == h["against_steps"] and "interval" in h["verdict"] for h in head)
    against = _csv(out / "against_baseline.csv")
    assert {a["system"] for a in against} == {"trie", "trie_control"} and {a["metric"] for a in against} == {
        "wer", "uwer", "bwer"}
    md = (out / "summary.md").read_text()
    assert "## Headline" in md and "![" in md and "(training.png)" in md
    assert "No pictures in this results folder" in md and "No cost tables" in md  # absent inputs said so


def test_the_page_is_self_contained_and_shows_pictures_and_costs_when_present(results, tmp_path):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    folder = tmp_path / "copy"
    shutil.copytree(results, folder)
    fig, ax = plt.subplots(figsize=(2, 2))
    ax.imshow([[0, 1], [1, 0]])
    (folder / "pictures").mkdir()
    fig.savefig(folder / "pictures" / "attention.png")
    plt.close(fig)
    (folder / "cost.csv").write_text("list_size,seconds_per_utterance\n10,0.002\n1000,0.004\n")
    made = make_report(folder)
    page = made["html"].read_text()
    assert made["html"] == folder / "report" / "report.html"
    assert not re.search(r"https?:", page, flags=re.I)  # no external reference of any kind
    assert not re.search(r"<(script|link|iframe)", page, flags=re.I)
    sources = re.findall(r"<img [^>]*src=\"([^\"]*)\"", page)
    assert len(sources) == page.count("<img ") == len(made["figures"]) + 1  # figures + the picture
    for src in sources:
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1])[:8] == PNG
    assert "pictures/attention.png" in page and "seconds_per_utterance" in page
    assert (folder / "report" / "cost.png").is_file()  # the cost table's numbers against N
    assert "No pictures" not in page and "No cost tables" not in page
    assert "No spread over seeds" in page  # one seed: the page says why the seeds table is absent
    again = make_report(folder)  # the report's own folder is not read back as input
    assert again["html"].read_text().count("<img ") == page.count("<img ")


def test_a_folder_that_is_not_a_results_folder_is_one_clear_error(results, tmp_path, capsys):
    assert main(["report", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and "results.json" in err and len(err.strip().splitlines()) == 1
    broken = tmp_path / "broken"
    shutil.copytree(results, broken)
    (broken / "comparisons.json").write_text("[{")
    with pytest.raises(ConfigError, match="comparisons.json"):
        make_report(broken)
    with pytest.raises(ConfigError, match="no such run"):
        make_report(results, tmp_path / "r", against="nonesuch")


CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
MARK = ('<script>window.addEventListener("load",function(){var i=[].slice.call(document.images);'
        'document.body.setAttribute("data-images",i.filter(function(x){return x.complete&&x.naturalWidth>0})'
        '.length+"/"+i.length);});</script>')


def _browser(args, page):
    """Chromium, headless, on a local file with networking off: in a new network namespace with no
    interfaces when we may make one (root), and always with every host name unresolvable and a
    proxy that points nowhere."""
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
           "--host-resolver-rules=MAP * ~NOTFOUND", "--proxy-server=127.0.0.1:9", *args, page.as_uri()]
    if shutil.which("unshare") and os.geteuid() == 0 and subprocess.run(["unshare", "-n", "true"]).returncode == 0:
        cmd = ["unshare", "-n", *cmd]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=120)


@pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (system package `chromium`; .ci/run "
                                              "installs it when it runs as root with apt-get)")
def test_the_page_opens_from_disk_in_headless_chromium_with_every_image_loaded(results, tmp_path):
    from matplotlib.image import imread

    made = make_report(results, tmp_path / "report")
    page = tmp_path / "marked.html"  # the report plus a script that counts the images that loaded
    page.write_text(made["html"].read_text().replace("</body>", MARK + "</body>"))
    n = made["html"].read_text().count("<img ")
    dom = _browser(["--virtual-time-budget=10000", "--dump-dom"], page).stdout
    assert "Report of" in dom
    assert f'data-images="{n}/{n}"' in dom, re.findall(r'data-images="[^"]*"', dom)
    # the check can fail: a page whose one image is missing counts 0 of 1
    broken = tmp_path / "broken.html"
    broken.write_text(f'<!DOCTYPE html><html><body><img src="{tmp_path / "none.png"}">{MARK}</body></html>')
    assert 'data-images="0/1"' in _browser(["--virtual-time-budget=5000", "--dump-dom"], broken).stdout
    shot = tmp_path / "screenshot.png"
    _browser([f"--screenshot={shot}", "--window-size=1200,1600"], made["html"])
    assert shot.is_file() and shot.read_bytes()[:8] == PNG
    pixels = imread(shot)[..., :3]  # (H, W, 3) in 0..1
    ink = (pixels < 0.9).any(axis=-1).mean()  # share of pixels that are not near-white
    colours = len({tuple(p) for p in (pixels[::7, ::7] * 255).astype(int).reshape(-1, 3).tolist()})
    assert ink > 0.02 and colours > 20, (ink, colours)  # text, tables and plots drawn, not a blank page


def test_decoding_shows_a_progress_bar_with_the_time_left_and_is_silent_when_asked(results, capsys):
    from tinyrnnt.data import CorpusSplit
    from tinyrnnt.lab.evaluate import evaluate
    from tinyrnnt.lab.train import load_model

    model, cfg, _ = load_model(results / "trie" / "checkpoints" / "last.ckpt")
    split = CorpusSplit(cfg.data.corpus, "test_unseen")
    evaluate(model, split, list_size=10, batch_size=4, progress="trie test_unseen N=10")
    lines = [x for x in capsys.readouterr().err.replace("\r", "\n").splitlines() if x.strip()]
    assert len(lines) == 4  # one update a batch: 16 utterances, 4 a batch
    assert lines[0].startswith("  trie test_unseen N=10 [") and "4/16 utterances" in lines[0] and "left" in lines[0]
    assert "16/16 utterances" in lines[-1] and lines[-1].endswith("done")
    evaluate(model, split, list_size=10, batch_size=4)
    assert capsys.readouterr().err == ""
