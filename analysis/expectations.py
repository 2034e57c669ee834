"""The team's written expectations (per class: concepts it should rely on, concepts it must not),
read from TOML and checked against the concept table: met, violated, or not enough evidence.

    min_images = 20   # fewer images of a class than this: not enough evidence
    alpha = 0.05      # Benjamini-Hochberg level over all the file's checks

    [classes.can]
    relies_on = ["body", "rim or \\"pull tab\\""]
    must_not_rely_on = ["tag", "\\"green belt\\""]

Each entry is a question (see analysis.questions), so "cap and not tag" works too.
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, replace
from typing import Literal

import numpy as np

from .concept_table import ConceptTable
from .errors import InvalidInputError
from .questions import QuestionError, evaluate, parse_question, render
from .association import associate

Kind = Literal["relies_on", "must_not_rely_on"]
KINDS: tuple[Kind, ...] = ("relies_on", "must_not_rely_on")
VerdictName = Literal["met", "violated", "not enough evidence", "co-occurs, not confirmed"]


@dataclass(frozen=True)
class Expectation:
    cls: str
    kind: Kind
    question: str  # canonical form


@dataclass(frozen=True)
class ExpectationSet:
    items: list[Expectation]
    min_images: int = 20
    alpha: float = 0.05


MAX_NESTING = 8  # brackets and braces open at once; expectations need two ([classes.x] and a list)
MAX_TEXT = 200_000


def _check_nesting(text: str, source: str) -> None:
    """Refuse text nested deeper than expectations ever need before the TOML reader recurses into it.

    Brackets inside quoted strings and comments do not count.
    """
    if len(text) > MAX_TEXT:
        raise InvalidInputError(f"{source} is {len(text):,} characters; expectations are limited to {MAX_TEXT:,}.")
    depth, line, quote, comment = 0, 1, "", False
    for ch in text:
        if ch == "\n":
            line, comment = line + 1, False
            if quote in ('"', "'"):
                quote = ""
            continue
        if comment:
            continue
        if quote:
            if ch == quote:
                quote = ""
            continue
        if ch in "\"'":
            quote = ch
        elif ch == "#":
            comment = True
        elif ch in "[{":
            depth += 1
            if depth > MAX_NESTING:
                raise InvalidInputError(f"{source} line {line}: arrays or tables nested more than {MAX_NESTING} deep; expectations need lists of strings only.")
        elif ch in "]}":
            depth = max(0, depth - 1)


def read_expectations(text: str, *, source: str = "the expectations") -> ExpectationSet:
    """Parse and validate expectations TOML; every error names the class, key or line to fix."""
    _check_nesting(text, source)
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InvalidInputError(f"{source} is not valid TOML: {exc}.") from None
    except RecursionError:
        raise InvalidInputError(f"{source} nests arrays or tables too deeply to read; expectations need lists of strings only.") from None
    unknown = set(raw) - {"min_images", "alpha", "classes"}
    if unknown:
        raise InvalidInputError(f"{source} has unknown top-level keys {sorted(unknown)}; use min_images, alpha and [classes.<name>] tables.")
    min_images = raw.get("min_images", 20)
    alpha = raw.get("alpha", 0.05)
    if not isinstance(min_images, int) or isinstance(min_images, bool) or min_images < 1:
        raise InvalidInputError(f"min_images must be a whole number of at least 1; got {min_images!r}.")
    if not isinstance(alpha, (int, float)) or isinstance(alpha, bool) or not 0 < alpha < 1:
        raise InvalidInputError(f"alpha must be between 0 and 1, e.g. 0.05; got {alpha!r}.")
    classes = raw.get("classes", {})
    if not isinstance(classes, dict) or not classes:
        raise InvalidInputError(f"{source} names no class; add a table such as [classes.can] with relies_on = [...] or must_not_rely_on = [...].")
    items = []
    for cls, spec in classes.items():
        if not isinstance(spec, dict):
            raise InvalidInputError(f"classes.{cls} must be a table with relies_on and/or must_not_rely_on.")
        bad = set(spec) - set(KINDS)
        if bad:
            raise InvalidInputError(f"classes.{cls} has unknown keys {sorted(bad)}; use relies_on and must_not_rely_on.")
        for kind in KINDS:
            entries = spec.get(kind, [])
            if isinstance(entries, str) or not isinstance(entries, list) or not all(isinstance(e, str) for e in entries):
                raise InvalidInputError(f"classes.{cls}.{kind} must be a list of strings, e.g. [\"tag\"]; got {entries!r}.")
            for e in entries:
                try:
                    items.append(Expectation(str(cls), kind, render(parse_question(e))))
                except QuestionError as exc:
                    raise InvalidInputError(f"classes.{cls}.{kind}: {e!r}: {exc.reason} (column {exc.column})") from None
    return ExpectationSet(items, int(min_images), float(alpha))


@dataclass(frozen=True)
class Verdict:
    """An expectation checked: the verdict, why, and the figures and example images behind it."""

    expectation: Expectation
    verdict: VerdictName
    reason: str
    class_images: int
    matching_images: int  # images (any class) the question holds for
    both: int  # images of the class it holds for
    coverage: float  # both / class_images
    confidence: float  # both / matching_images
    lift: float
    p_value: float
    q_value: float
    examples: list[int]  # ids of images of the class that match, up to 8
    confirmed: bool | None = None  # set when an intervention tested the reliance


def check_expectations(expectations: ExpectationSet, table: ConceptTable) -> list[Verdict]:
    """Check each expectation on the images predicted as its class.

    A class goes with a question when images matching it are of the class more often than chance:
    one-sided Fisher's exact test, Benjamini-Hochberg adjusted over the whole file, lift above 1.
    "relies on" is met when it does and violated when it does not; "must not rely on" the reverse.
    A class with fewer than ``min_images`` images gets "not enough evidence".
    """
    predicted = table.meta["predicted_class"].astype(str)
    known = sorted(predicted.unique())
    unknown = sorted({e.cls for e in expectations.items} - set(known))
    if unknown:
        raise InvalidInputError(f"the expectations name classes {unknown} that no image was predicted as; the classes are {known}.")
    n = len(table)
    rows = []
    for e in expectations.items:
        mask = evaluate(parse_question(e.question), table.presence, text=e.question).to_numpy()
        in_cls = (predicted == e.cls).to_numpy()
        n_c, n_m, both = int(in_cls.sum()), int(mask.sum()), int((in_cls & mask).sum())
        examples = [int(i) for i in table.meta.index[in_cls & mask][:8]]
        rows.append((e, n_c, n_m, both, examples))
    found = associate([r[3] for r in rows], [r[2] for r in rows], [r[1] for r in rows], n)  # one family: the whole file
    out = []
    for k, (e, n_c, n_m, both, examples) in enumerate(rows):
        confidence, lift, p, qv = float(found.confidence[k]), float(found.lift[k]), float(found.p_value[k]), float(found.q_value[k])
        goes_with = bool(qv <= expectations.alpha and lift > 1)
        figures = f"{both} of {n_c} images ({both / n_c:.0%}) show it; lift {lift:.2f}, q {qv:.3g}" if n_c else ""
        if n_c < expectations.min_images:
            verdict: VerdictName = "not enough evidence"
            reason = f"only {n_c} images predicted as {e.cls}; {expectations.min_images} are needed for a verdict."
        elif e.kind == "relies_on":
            verdict = "met" if goes_with else "violated"
            reason = f"{e.cls} goes with {e.question}: {figures}." if goes_with else f"no sign that {e.cls} goes with {e.question}: {figures}."
        else:
            verdict = "violated" if goes_with else "met"
            reason = f"{e.cls} goes with {e.question}: {figures}." if goes_with else f"{e.cls} does not go with {e.question} beyond chance: {figures}."
        out.append(Verdict(e, verdict, reason, n_c, n_m, both, both / n_c if n_c else 0.0, confidence, lift, p, float(qv), examples))
    return out


def with_confirmation(verdict: Verdict, confirmed: bool, evidence: str) -> Verdict:
    """A "must not rely on" violation stands only when an intervention confirms the reliance."""
    if verdict.expectation.kind != "must_not_rely_on" or verdict.verdict != "violated":
        return replace(verdict, confirmed=confirmed)
    if confirmed:
        return replace(verdict, confirmed=True, reason=f"{verdict.reason} Confirmed by intervention: {evidence}")
    return replace(verdict, verdict="co-occurs, not confirmed", confirmed=False, reason=f"{verdict.reason} The intervention did not confirm it: {evidence}")


def verdict_counts(verdicts: list[Verdict]) -> dict[str, int]:
    names = ["met", "violated", "co-occurs, not confirmed", "not enough evidence"]
    got = np.array([v.verdict for v in verdicts], dtype=object)
    return {k: int((got == k).sum()) for k in names}
