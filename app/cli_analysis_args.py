"""The parsers of the commands that read a campaign's results (ask, check, export, report, interventions).

Kept apart from their commands so building the parser imports nothing heavy.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from .cli_choices import CORRECTIONS, DEFAULT_FILLS, FILLS, FORMATS, VERDICT_DEFAULTS


def add_parsers(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    def project(p: argparse.ArgumentParser) -> None:
        p.add_argument("project", type=Path)
        p.add_argument("--campaign", type=int, default=None, help="campaign id (default: the latest)")

    a = sub.add_parser("ask", help='which images show a combination of concepts, e.g. \'tag and not "label band"\'')
    project(a)
    a.add_argument("question")
    a.add_argument("--json", action="store_true")
    c = sub.add_parser("check", help="check a TOML file of expectations (per class: relies_on, must_not_rely_on)")
    project(c)
    c.add_argument("expectations", type=Path)
    c.add_argument("--json", action="store_true")
    c.add_argument("--fail-on-violation", action="store_true", help="exit 3 when covering confirms a violation (for release gates)")
    e = sub.add_parser("export", help="write the rule table or the concept table as CSV, JSON or Parquet")
    project(e)
    e.add_argument("--what", choices=["rules", "concepts"], default="rules")
    e.add_argument("--format", choices=list(FORMATS), default="csv")
    e.add_argument("--target", choices=["predicted", "true", "errors"], default="predicted")
    e.add_argument("--max-len", type=int, default=2)
    e.add_argument("--out", type=Path, required=True)
    r = sub.add_parser("report", help="write the self-contained HTML report")
    project(r)
    r.add_argument("--out", type=Path, required=True)
    i = sub.add_parser("interventions", help="test rules by ablating and pasting their concepts (results kept per model version)")
    project(i)
    i.add_argument("--class", dest="cls", help="one class (with --concepts); default: the top rules of every class")
    i.add_argument("--concepts", help="the rule's concepts, joined by ' & ' as in the rule table, e.g. 'tag'")
    i.add_argument("--top", type=int, default=3, help="rules per class to test when no class is given")
    i.add_argument("--fill", choices=list(FILLS), nargs="+", default=list(DEFAULT_FILLS),
                   help=f"what covers a region; several fills keep the most conservative verdict (default: {' '.join(DEFAULT_FILLS)})")
    i.add_argument("--min-effect", type=float, default=VERDICT_DEFAULTS["min_effect"],
                   help="smallest fall in P(class) beyond controls that counts as reliance (default %(default)s)")
    i.add_argument("--correction", choices=list(CORRECTIONS), default=VERDICT_DEFAULTS["correction"], help="how this run's tests are corrected together")
    i.add_argument("--alpha", type=float, default=VERDICT_DEFAULTS["alpha"])
    i.add_argument("--draws", type=int, default=5, help="matched random masks per image")
    i.add_argument("--max-images", type=int, default=200)
    i.add_argument("--seed", type=int, default=0)
    i.add_argument("--model", type=Path, help="the model, if it moved since the saliency run")
    i.add_argument("--sidecar", type=Path)
    i.add_argument("--json", action="store_true")
    c.add_argument("--model", type=Path, help="the model, if it moved since the saliency run (to confirm violations)")
    c.add_argument("--sidecar", type=Path)
