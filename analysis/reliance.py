"""Verdicts on reliance: what the covering and pasting tests of an audit say, corrected as one family.

"Relies on X" is a causal claim and only a removal test decides it: the class's probability falls
when X is covered (or, for an attribute spread over most of the image such as a green belt,
recoloured to the entity's plain look: analysis.interventions.recolour_test), beyond matched controls, significantly after correcting for
every test of the audit, and by at least ``min_effect``. Pasting (insertion) answers another
question, "can the class be steered by X", and is reported beside it, never instead of it.
Co-occurrence (lift, Fisher's q) stays supporting evidence and decides nothing here.

Every test behind one report, page or ``heedmap check`` run forms one family: its p-values are
adjusted together (Holm by default, or Benjamini-Hochberg), and each verdict shows the effect,
its interval, the adjusted p and the test that decided it.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Literal

import numpy as np
import numpy.typing as npt

from .association import benjamini_hochberg
from .errors import InvalidInputError
from .questions import And, Concept, QuestionError, parse_question

if TYPE_CHECKING:
    from .interventions import InterventionResult

Correction = Literal["holm", "bh"]
CORRECTIONS: dict[str, str] = {"holm": "Holm", "bh": "Benjamini-Hochberg"}
Finding = Literal["shown", "absent", "inconclusive"]
RelianceName = Literal["relies on", "no reliance", "inconclusive", "not tested"]
SteeringName = Literal["steered", "not steered", "inconclusive", "not tested"]


@dataclass(frozen=True)
class VerdictSettings:
    """How reliance is decided; recorded beside every verdict.

    ``min_effect``: the smallest fall in P(class) beyond matched controls (a probability, 0..1) that
    counts as reliance; smaller significant effects read "inconclusive", and an interval wholly
    below it reads "no reliance". ``alpha``: the level of the corrected test. ``correction``: how
    the family's p-values are adjusted, ``holm`` (family-wise error) or ``bh`` (false discovery rate).
    """

    min_effect: float = 0.05
    alpha: float = 0.05
    correction: Correction = "holm"

    def __post_init__(self) -> None:
        if not 0 <= self.min_effect < 1:
            raise InvalidInputError(f"min_effect must be a fall in probability in [0, 1), e.g. 0.05; got {self.min_effect!r}.")
        if not 0 < self.alpha < 1:
            raise InvalidInputError(f"alpha must be between 0 and 1, e.g. 0.05; got {self.alpha!r}.")
        if self.correction not in CORRECTIONS:
            raise InvalidInputError(f"correction must be one of {', '.join(CORRECTIONS)}; got {self.correction!r}.")

    def describe(self, n_tests: int) -> str:
        return (f"{CORRECTIONS[self.correction]} correction over the {n_tests} intervention test{'s' if n_tests != 1 else ''} of this audit "
                f"at alpha {self.alpha:g}; minimum effect {self.min_effect:g}")


def adjust_p_values(p: npt.ArrayLike, *, method: Correction = "holm") -> npt.NDArray[np.float64]:
    """Adjusted p-values of a family of tests.

    ``holm``: Holm (1979) step-down, p_(i) * (m - i + 1) made monotone, capped at 1 (controls the
    family-wise error). ``bh``: Benjamini & Hochberg (1995), p_(i) * m / i made monotone (controls
    the false discovery rate). Checked against statsmodels' ``multipletests``.

    >>> adjust_p_values([0.01, 0.04, 0.03], method="holm").round(3).tolist()
    [0.03, 0.06, 0.06]
    """
    p = np.asarray(p, dtype=np.float64)
    if p.ndim != 1 or (len(p) and (np.isnan(p).any() or p.min() < 0 or p.max() > 1)):
        raise InvalidInputError("p-values must be a flat list of numbers in [0, 1].")
    if method == "bh":
        return benjamini_hochberg(p)
    if method != "holm":
        raise InvalidInputError(f"correction must be one of {', '.join(CORRECTIONS)}; got {method!r}.")
    m = len(p)
    if m == 0:
        return p.copy()
    order = np.argsort(p, kind="stable")
    scaled = np.maximum.accumulate(p[order] * (m - np.arange(m))).clip(max=1.0)
    out = np.empty(m)
    out[order] = scaled
    return out


@dataclass(frozen=True)
class JudgedTest:
    """One covering or pasting test, judged within its family."""

    kind: Literal["covering", "pasting"]
    fill: str  # covering: the fill; pasting: "paste"
    n_images: int
    effect: float
    interval: tuple[float, float]
    p_value: float
    adjusted_p: float
    flip_rate: float
    finding: Finding
    shared: bool = False  # the covered regions also show other concepts: this test can rule reliance out, never confirm it

    @property
    def name(self) -> str:
        """Which test this is, in words: "covering (ring fill)", "recolouring (to the entity's plain look)" or "pasting"."""
        return test_name(self.kind, self.fill)

    def summary(self) -> str:
        where = " in regions that also show other concepts (so it cannot confirm)" if self.shared else ""
        where += " against sham recolourings that keep it" if self.fill == "recolour" else ""
        return (f"{self.name} on {self.n_images} images{where}: effect {self.effect:.3f} [{self.interval[0]:.3f}, {self.interval[1]:.3f}], "
                f"p {self.p_value:.3g}, adjusted p {self.adjusted_p:.3g}")


def test_name(kind: Literal["covering", "pasting"], fill: str) -> str:
    """The words for a removal or pasting test: covering with a fill, recolouring an attribute, or pasting."""
    if kind == "pasting":
        return "pasting"
    return "recolouring (to the entity's plain look)" if fill == "recolour" else f"covering ({fill} fill)"


def judge_test(result: InterventionResult, adjusted_p: float, settings: VerdictSettings) -> JudgedTest:
    """Shown: adjusted p at most alpha and the effect at least ``min_effect``; absent: the whole interval
    below ``min_effect``; otherwise inconclusive.

    A covering test over regions that also show other concepts (``result.shared``, the fallback when too
    few images have a region showing the concept alone) measures the concept together with whatever
    shares its regions. Its p-value stays in the family and is corrected with the rest, but a fall it
    shows cannot be laid on the concept alone: it reads inconclusive. A fall ruled out still rules the
    concept out (covering more than the concept moved nothing)."""
    finding: Finding
    if adjusted_p <= settings.alpha and result.effect >= settings.min_effect:
        finding = "inconclusive" if result.shared else "shown"
    elif result.interval[1] < settings.min_effect:
        finding = "absent"
    else:
        finding = "inconclusive"
    kind: Literal["covering", "pasting"] = "covering" if result.kind == "ablation" else "pasting"
    return JudgedTest(kind, result.fill, result.n_images, result.effect, result.interval, result.p_value, float(adjusted_p), result.flip_rate, finding,
                      result.shared)


@dataclass(frozen=True)
class RuleTests:
    """The interventions run for one class and concept set: covering with one or more fills, and pasting."""

    cls: str
    concepts: str  # "a & b", sorted, as in the rule table
    coverings: tuple[InterventionResult, ...]
    pasting: InterventionResult | None = None

    @property
    def key(self) -> tuple[str, str]:
        return (self.cls, self.concepts)


@dataclass(frozen=True)
class RelianceFinding:
    """What the tests say about one class and concept set, and which test decided it."""

    cls: str
    concepts: str
    reliance: RelianceName
    steering: SteeringName
    decided_by: JudgedTest | None  # the covering test the reliance verdict rests on
    coverings: tuple[JudgedTest, ...]
    pasting: JudgedTest | None
    family: str  # how the family was corrected, and its size

    @property
    def confirmed(self) -> bool:
        return self.reliance == "relies on"

    def evidence(self) -> str:
        """The decisive test first, then any other fill, then pasting (a separate claim)."""
        if self.decided_by is None:
            return "no covering test was run"
        parts = [f"decided by {self.decided_by.summary()}"]
        parts += [f"also {t.summary()}" for t in self.coverings if t is not self.decided_by]
        if self.pasting is not None:
            steer = {"steered": "can be steered by it", "not steered": "not steered by it", "inconclusive": "steering inconclusive"}.get(self.steering, "")
            parts.append(f"{steer} ({self.pasting.summary()})")
        return "; ".join(parts) + f". {self.family}."

    def to_json(self) -> dict[str, object]:
        def test(t: JudgedTest | None) -> dict[str, object] | None:
            return None if t is None else {k: getattr(t, k) for k in t.__dataclass_fields__}

        return {"class": self.cls, "concepts": self.concepts, "reliance": self.reliance, "steering": self.steering,
                "decided_by": test(self.decided_by), "coverings": [test(t) for t in self.coverings], "pasting": test(self.pasting),
                "family": self.family}


def _combine(tests: tuple[JudgedTest, ...]) -> tuple[RelianceName, JudgedTest | None]:
    """Several fills keep the most conservative verdict: reliance only when every fill shows it (the
    smallest effect decides), absence only when every fill shows absence, otherwise inconclusive."""
    if not tests:
        return "not tested", None
    if all(t.finding == "shown" for t in tests):
        return "relies on", min(tests, key=lambda t: t.effect)
    if all(t.finding == "absent" for t in tests):
        return "no reliance", max(tests, key=lambda t: t.effect)
    undecided = [t for t in tests if t.finding == "inconclusive"] or list(tests)
    return "inconclusive", min(undecided, key=lambda t: t.effect)


def judge_family(tests: Sequence[RuleTests], settings: VerdictSettings = VerdictSettings()) -> dict[tuple[str, str], RelianceFinding]:
    """Judge every test of one audit together: one correction over all covering and pasting p-values.

    The same class and concept set given twice (a rule and an expectation) counts once.
    """
    unique: dict[tuple[str, str], RuleTests] = {}
    for t in tests:
        unique.setdefault(t.key, t)
    flat: list[InterventionResult] = [r for t in unique.values() for r in (*t.coverings, *([t.pasting] if t.pasting else []))]
    adjusted = adjust_p_values([r.p_value for r in flat], method=settings.correction) if flat else np.zeros(0)
    family = settings.describe(len(flat))
    out: dict[tuple[str, str], RelianceFinding] = {}
    k = 0
    for key, t in unique.items():
        coverings = []
        for r in t.coverings:
            coverings.append(judge_test(r, float(adjusted[k]), settings))
            k += 1
        pasting = None
        if t.pasting is not None:
            pasting = judge_test(t.pasting, float(adjusted[k]), settings)
            k += 1
        reliance, decided = _combine(tuple(coverings))
        steering: SteeringName = "not tested" if pasting is None else {"shown": "steered", "absent": "not steered"}.get(pasting.finding, "inconclusive")  # type: ignore[assignment]
        out[key] = RelianceFinding(t.cls, t.concepts, reliance, steering, decided, tuple(coverings), pasting, family)
    return out


def concept_set(question: str) -> list[str] | None:
    """The concepts of a question that is one concept or several joined by 'and' (what covering can test), else None."""
    try:
        node = parse_question(question)
    except QuestionError:
        return None
    out: list[str] = []
    stack = [node]
    while stack:
        n = stack.pop()
        if isinstance(n, Concept):
            out.append(n.name)
        elif isinstance(n, And):
            stack += [n.left, n.right]
        else:
            return None
    return sorted(set(out))


def concepts_key(concepts: Sequence[str]) -> str:
    """The rule table's name of a concept set: sorted, joined by ' & '."""
    return " & ".join(sorted(concepts))
