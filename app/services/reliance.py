"""The reliance use case: intervention results beside rules and expectation verdicts.

Pages and the report only read stored results (they never run the model); the commands run the
interventions. The work itself is app.reliance's and the core's.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import pandas as pd
from sqlalchemy.orm import Session

from analysis.expectations import Verdict, check_expectations, read_expectations
from analysis.interventions import Fill
from analysis.model_io import LoadedModel

from ..reliance import (
    Reliance,
    cached_reliance,
    confirm_verdicts,
    rule_reliance,
    with_reliance,
)
from .campaign_analysis import Results

Lookup = Callable[[str, list[str]], Reliance | None]


def rules_with_reliance(project: Path, res: Results, rules: pd.DataFrame) -> pd.DataFrame:
    """The rule rows with the stored intervention figures beside each (NaN where none was run)."""
    return with_reliance(project, res, rules)


def stored_lookup(project: Path, res: Results) -> Lookup:
    """Look up stored intervention results only (what pages and the report may do)."""
    return lambda cls, concepts: cached_reliance(project, res, cls, concepts)


def running_lookup(s: Session, project: Path, res: Results, model: LoadedModel, *, progress: bool = False) -> Lookup:
    """Run an intervention when none is stored (what the commands may do)."""
    return lambda cls, concepts: rule_reliance(s, project, res, model, cls, concepts, progress=progress)


def expectation_verdicts(res: Results, text: str, *, lookup: Lookup | None = None, source: str = "the expectations") -> list[Verdict]:
    """The verdict on each expectation in ``text``; with ``lookup``, "must not rely on" violations stand only when an intervention confirms them.

    Raises analysis's InvalidInputError when the text does not read or names unknown classes.
    """
    verdicts = check_expectations(read_expectations(text, source=source), res.table)
    return confirm_verdicts(verdicts, lookup) if lookup is not None else verdicts


def run_interventions(s: Session, project: Path, res: Results, model: LoadedModel, rules: list[tuple[str, list[str]]], *, fill: Fill = "blur",
               draws: int = 5, max_images: int = 200, seed: int = 0, progress: bool = False) -> list[tuple[str, str, Reliance | None]]:
    """Run (or read back) ablation and insertion for each (class, concepts); None where too few images carry them."""
    return [(cls, " & ".join(sorted(concepts)), rule_reliance(s, project, res, model, cls, concepts, fill=fill, draws=draws, max_images=max_images,
                                                              seed=seed, progress=progress))
            for cls, concepts in rules]
