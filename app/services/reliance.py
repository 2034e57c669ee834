"""The reliance use case: covering and pasting results beside rules, and expectation verdicts
decided by covering, every test behind one page, report or command judged as one family.

Pages and the report only read stored results (they never run the model); the commands run the
interventions. The work itself is app.reliance's and the core's (analysis.reliance).
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import pandas as pd
from sqlalchemy.orm import Session

from analysis.expectations import Verdict, check_expectations, read_expectations
from analysis.interventions import DEFAULT_FILLS, Fill
from analysis.model_io import LoadedModel
from analysis.reliance import RuleTests

from ..reliance import Lookup, judge_audit, judge_verdicts, rule_reliance, stored_lookup, with_reliance
from .campaign_analysis import Results

__all__ = ["Lookup", "audit", "expectation_verdicts", "rules_with_reliance", "run_interventions", "running_lookup", "stored_lookup"]


def rules_with_reliance(project: Path, res: Results, rules: pd.DataFrame) -> pd.DataFrame:
    """The rule rows with each one's reliance verdict (decided by covering) and pasting beside it,
    the stored tests of these rules judged as one family ("not tested" where none was run)."""
    return with_reliance(project, res, rules)


def audit(project: Path, res: Results, rules: pd.DataFrame, expectations: str = "") -> tuple[pd.DataFrame, list[Verdict], str]:
    """Rules and expectations behind one report as one family of stored tests: the rule rows with
    their verdicts, the expectation verdicts, and how the family was corrected."""
    return judge_audit(project, res, rules, expectations)


def running_lookup(s: Session, project: Path, res: Results, model: LoadedModel, *, progress: bool = False,
                   fills: Sequence[Fill] = DEFAULT_FILLS) -> Lookup:
    """Run the covering and pasting tests when none are stored (what the commands may do)."""
    def lookup(cls: str, concepts: list[str]) -> RuleTests | None:
        if any(c not in res.table.concepts for c in concepts):
            return None
        return rule_reliance(s, project, res, model, cls, concepts, fills=fills, progress=progress)

    return lookup


def expectation_verdicts(res: Results, text: str, *, lookup: Lookup | None = None, source: str = "the expectations") -> list[Verdict]:
    """The verdict on each expectation in ``text``, decided by covering through ``lookup`` (all the
    tests found are one family); without a lookup every line reads "not tested" (or "not enough
    evidence") with its co-occurrence figures.

    Raises analysis's InvalidInputError when the text does not read or names unknown classes.
    """
    parsed = read_expectations(text, source=source)
    verdicts = check_expectations(parsed, res.table)
    if lookup is None:
        return verdicts
    return judge_verdicts(verdicts, lookup, parsed.settings)[0]


def run_interventions(s: Session, project: Path, res: Results, model: LoadedModel, rules: list[tuple[str, list[str]]], *,
                      fills: Sequence[Fill] = DEFAULT_FILLS, draws: int = 5, max_images: int = 200, seed: int = 0,
                      progress: bool = False) -> list[tuple[str, str, RuleTests | None]]:
    """Run (or read back) covering with each fill and pasting for each (class, concepts); None where
    fewer than two images carry them."""
    return [(cls, " & ".join(sorted(concepts)), rule_reliance(s, project, res, model, cls, concepts, fills=fills, draws=draws,
                                                              max_images=max_images, seed=seed, progress=progress))
            for cls, concepts in rules]
