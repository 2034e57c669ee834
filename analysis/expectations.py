"""The team's written expectations (per class: concepts it should rely on, concepts it must not),
read from TOML and decided by the covering test (see analysis.reliance).

    min_images = 20     # fewer images of a class than this: not enough evidence
    alpha = 0.05        # level of the corrected tests
    min_effect = 0.05   # smallest fall in P(class) beyond controls that counts as reliance
    correction = "holm" # or "bh": how the audit's tests are corrected together

    [classes.can]
    relies_on = ["body", "rim or \\"pull tab\\""]
    must_not_rely_on = ["tag", "\\"green belt\\""]

Each entry is a question (see analysis.questions), so "cap and not tag" works too; only one concept
or concepts joined by "and" can be covered, so other questions read "not tested". Co-occurrence
(coverage, lift, Fisher's q) is shown as supporting evidence and never decides a verdict.
"""

from __future__ import annotations

import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, replace
from typing import Literal

import numpy as np

from .association import associate
from .concept_table import ConceptTable
from .errors import InvalidInputError
from .questions import QuestionError, evaluate, parse_question, render
from .reliance import CORRECTIONS, RelianceFinding, VerdictSettings, concept_set, concepts_key

Kind = Literal["relies_on", "must_not_rely_on"]
KINDS: tuple[Kind, ...] = ("relies_on", "must_not_rely_on")
VerdictName = Literal["met", "violated", "inconclusive", "not tested", "not enough evidence"]
VERDICT_NAMES: tuple[VerdictName, ...] = ("met", "violated", "inconclusive", "not tested", "not enough evidence")
TOP_KEYS = ("min_images", "alpha", "min_effect", "correction", "classes")


@dataclass(frozen=True)
class Expectation:
    cls: str
    kind: Kind
    question: str  # canonical form

    @property
    def concepts(self) -> list[str] | None:
        """The concept set a covering test can test, or None for a question with or/not."""
        return concept_set(self.question)


@dataclass(frozen=True)
class ExpectationSet:
    items: list[Expectation]
    min_images: int = 20
    alpha: float = 0.05
    min_effect: float = 0.05
    correction: str = "holm"

    @property
    def settings(self) -> VerdictSettings:
        return VerdictSettings(min_effect=self.min_effect, alpha=self.alpha, correction=self.correction)  # type: ignore[arg-type]


def _number(raw: dict[str, object], key: str, default: float, low: float, high: float, example: str) -> float:
    value = raw.get(key, default)
    if not isinstance(value, (int, float)) or isinstance(value, bool) or not low <= value < high or (key == "alpha" and value == 0):
        raise InvalidInputError(f"{key} must be a number in [{low:g}, {high:g}), e.g. {example}; got {value!r}." if key != "alpha"
                                else f"alpha must be between 0 and 1, e.g. 0.05; got {value!r}.")
    return float(value)


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
    unknown = set(raw) - set(TOP_KEYS)
    if unknown:
        raise InvalidInputError(f"{source} has unknown top-level keys {sorted(unknown)}; use {', '.join(TOP_KEYS[:-1])} and [classes.<name>] tables.")
    min_images = raw.get("min_images", 20)
    if not isinstance(min_images, int) or isinstance(min_images, bool) or min_images < 1:
        raise InvalidInputError(f"min_images must be a whole number of at least 1; got {min_images!r}.")
    alpha = _number(raw, "alpha", 0.05, 0, 1, "0.05")
    min_effect = _number(raw, "min_effect", 0.05, 0, 1, "0.05")
    correction = raw.get("correction", "holm")
    if correction not in CORRECTIONS:
        raise InvalidInputError(f"correction must be one of {', '.join(repr(c) for c in CORRECTIONS)}; got {correction!r}.")
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
    return ExpectationSet(items, int(min_images), alpha, min_effect, str(correction))


@dataclass(frozen=True)
class Verdict:
    """An expectation checked: the verdict, the test that decided it with its figures, and the
    co-occurrence figures and example images beside it (supporting evidence only)."""

    expectation: Expectation
    verdict: VerdictName
    reason: str
    class_images: int
    matching_images: int  # images (any class) the question holds for
    both: int  # images of the class it holds for
    coverage: float  # both / class_images
    confidence: float  # both / matching_images
    lift: float
    p_value: float  # co-occurrence: one-sided Fisher
    q_value: float  # co-occurrence: Benjamini-Hochberg over the file
    examples: list[int]  # ids of images of the class that match, up to 8
    confirmed: bool | None = None  # True when covering confirmed the reliance, False when tested and not
    decided_by: str = "none"  # e.g. "covering (mean fill)"; "none" when no intervention decided it
    effect: float | None = None  # the deciding test's effect (fall in P(class) beyond controls)
    interval: tuple[float, float] | None = None
    adjusted_p: float | None = None
    steering: str = "not tested"  # what pasting says, a separate claim
    family: str = ""  # how the audit's tests were corrected

    def to_json(self) -> dict[str, object]:
        return {**{k: getattr(self, k) for k in self.__dataclass_fields__ if k != "expectation"}, "expectation": self.expectation.__dict__}


def check_expectations(expectations: ExpectationSet, table: ConceptTable) -> list[Verdict]:
    """Each expectation with its co-occurrence figures, before any intervention: "not tested", or
    "not enough evidence" for a class with fewer than ``min_images`` images.

    The figures (one-sided Fisher's exact test, Benjamini-Hochberg adjusted over the file, lift) are
    supporting evidence; :func:`decide_expectations` turns covering tests into verdicts.
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
        if n_c < expectations.min_images:
            verdict: VerdictName = "not enough evidence"
            reason = f"only {n_c} images predicted as {e.cls}; {expectations.min_images} are needed for a verdict."
        else:
            verdict = "not tested"
            reason = (f"not tested: no covering test of {e.question!r} in {e.cls} is stored or could be run (it needs two or more images of "
                      f"{e.cls} with regions labelled so; heedmap check runs it)."
                      if e.concepts else f"not tested: covering can test one concept or concepts joined by 'and', not {e.question!r}.")
        out.append(Verdict(e, verdict, reason, n_c, n_m, both, both / n_c if n_c else 0.0, confidence, lift, p, float(qv), examples))
    return out


def co_occurrence(v: Verdict) -> str:
    """The supporting co-occurrence figures of a verdict, in words."""
    if not v.class_images:
        return ""
    return (f"co-occurrence (supporting only): {v.both} of {v.class_images} images ({v.coverage:.0%}) show it, lift {v.lift:.2f}, "
            f"Fisher q {v.q_value:.3g}")


_DECIDE: dict[tuple[str, str], VerdictName] = {
    ("relies_on", "relies on"): "met", ("relies_on", "no reliance"): "violated", ("relies_on", "inconclusive"): "inconclusive",
    ("must_not_rely_on", "relies on"): "violated", ("must_not_rely_on", "no reliance"): "met", ("must_not_rely_on", "inconclusive"): "inconclusive",
}


def decide_expectations(verdicts: list[Verdict], findings: Mapping[tuple[str, str], RelianceFinding], settings: VerdictSettings) -> list[Verdict]:
    """Verdicts from the covering tests of one audit (``findings`` from analysis.reliance.judge_family,
    keyed by class and concept set).

    ``relies_on X`` is met when covering shows reliance (adjusted p <= alpha, effect >= min_effect)
    and violated when its interval lies wholly below ``min_effect``; ``must_not_rely_on X`` the
    reverse; anything between is "inconclusive". Without a covering test: "not tested".
    """
    out = []
    for v in verdicts:
        support = co_occurrence(v)
        concepts = v.expectation.concepts
        if v.verdict == "not enough evidence" or not concepts:
            out.append(replace(v, reason=f"{v.reason} {support}." if support else v.reason))
            continue
        found = findings.get((v.expectation.cls, concepts_key(concepts)))
        if found is None or found.decided_by is None:
            why = (f"not tested: no intervention on {v.expectation.question} in {v.expectation.cls} could run (too few images with a region to cover, "
                   "or regions over most of each image with no plain look of their entity to recolour them to)."
                   if found is not None else v.reason)
            out.append(replace(v, verdict="not tested", reason=f"{why} {support}.", family=found.family if found else "",
                               steering=found.steering if found else "not tested"))
            continue
        verdict = _DECIDE[(v.expectation.kind, found.reliance)]
        t = found.decided_by
        said = {"relies on": f"{v.expectation.cls} relies on {v.expectation.question}",
                "no reliance": f"{v.expectation.cls} does not rely on {v.expectation.question} by {settings.min_effect:g} or more",
                "inconclusive": f"{t.name} neither shows nor rules out reliance of {v.expectation.cls} on {v.expectation.question}"}[found.reliance]
        out.append(replace(v, verdict=verdict, reason=f"{said}: {found.evidence()} {support}.", confirmed=found.confirmed,
                           decided_by=t.name, effect=t.effect, interval=t.interval, adjusted_p=t.adjusted_p,
                           steering=found.steering, family=found.family))
    return out


def verdict_counts(verdicts: list[Verdict]) -> dict[str, int]:
    got = np.array([v.verdict for v in verdicts], dtype=object)
    return {k: int((got == k).sum()) for k in VERDICT_NAMES}
