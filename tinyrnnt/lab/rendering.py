"""After a recipe: render its results folder into the report (tinyrnnt.lab.report) and print the
headline and where the report is."""

from __future__ import annotations

from pathlib import Path


def render(folder: Path) -> None:
    """The report of a finished results folder; prints the headline and where the report is."""
    from tinyrnnt.lab.report import make_report

    made = make_report(folder)
    print("## Headline\n\n" + "\n".join(f"- {s}" for s in made["headline_text"]))
    print(f"\nreport: {made['html']} (one file, opens in any browser); summary: {made['markdown']}")
