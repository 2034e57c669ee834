"""The agreement page's computation on a large campaign: everything computed then cut to what is shown
(as before) against only what is shown, and against a second view of the same labels (cached).

    .venv/bin/python -m benchmarks.agreement_page            # 5,000 images, 10,000 regions, 30,000 labels
    .venv/bin/python -m benchmarks.agreement_page --quick    # 1,000 images
    .venv/bin/python -m benchmarks.agreement_page --images 20000

The project is synthetic (rows only, no images): 20 annotators name 1-2 of 300 concepts on each
region, three annotators per region. Both sides read the same database in one run.

Two more side-by-side tables: Dawid-Skene on the page's yes/no votes fitted over every item against one item
per group of alike items (the same fit), and Cohen's kappa per annotator pair from a dense annotators x items
table (as before) against pairs found from the judgments, time and peak memory, on a sparse crowd
(``--pair-annotators`` x ``--pair-items``, three judgments per item).
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

import numpy as np
import numpy.typing as npt
from sqlalchemy import insert

from analysis import agreement, reliability
from analysis.agreement import cohen_kappa_codes
from analysis.agreement_report import PairKappa, _pairs, agreement_report
from analysis.concept_votes import estimate_concepts, presence_agreement
from analysis.errors import InvalidInputError
from analysis.long_labels import LongLabels
from app.campaigns import get_campaign
from app.db import make_engine, session_factory, write_session
from app.models import Label, Person
from app.services.campaign_analysis import ResultsCache, agreement_summary, votes

from . import annotation_load
from .measure import peak_memory, print_table, timed


def unit_weights_bootstrap(counts: npt.ArrayLike, *, n_boot: int = 1000, level: float = 0.95, seed: int = 0) -> tuple[float, float]:
    """The bootstrap as it was: a weight for every unit in every resample (n_boot x units), the same interval in distribution."""
    pairable = np.asarray(counts, dtype=float)
    pairable = pairable[pairable.sum(axis=1) >= 2]
    u = len(pairable)
    m = pairable.sum(axis=1)
    d = (m**2 - (pairable**2).sum(axis=1)) / (m - 1)
    rng = np.random.default_rng(seed)
    stats = []
    for start in range(0, n_boot, 64):
        rows = min(64, n_boot - start)
        picks = rng.integers(0, u, size=(rows, u)) + (np.arange(rows) * u)[:, None]
        w = np.bincount(picks.ravel(), minlength=rows * u).reshape(rows, u).astype(float)
        n_c = w @ pairable
        n = n_c.sum(axis=1)
        expected = n * n - (n_c**2).sum(axis=1)
        ok = expected > 0
        stats.append(1 - (n[ok] - 1) * (w[ok] @ d) / expected[ok])
    lo, hi = np.quantile(np.concatenate(stats), [(1 - level) / 2, (1 + level) / 2])
    return float(lo), float(hi)


def dense_pairs(labels: LongLabels, min_common: int) -> list[PairKappa]:
    """Cohen's kappa per annotator pair as it was: a dense annotators x items table of label codes."""
    out = []
    given = np.full((len(labels.annotators), len(labels.items)), -1, dtype=np.int64)
    given[labels.annotator_codes, labels.item_codes] = labels.label_codes
    for a in range(len(labels.annotators)):
        for b in range(a + 1, len(labels.annotators)):
            common = (given[a] >= 0) & (given[b] >= 0)
            n_common = int(np.count_nonzero(common))
            name_a, name_b = labels.annotators[a], labels.annotators[b]
            if n_common < min_common:
                out.append(PairKappa(name_a, name_b, n_common, None, f"fewer than {min_common} items in common"))
                continue
            try:
                out.append(PairKappa(name_a, name_b, n_common, cohen_kappa_codes(given[a][common], given[b][common])))
            except InvalidInputError as exc:
                out.append(PairKappa(name_a, name_b, n_common, None, str(exc)))
    return out


def sparse_crowd(n_annotators: int, n_items: int, *, k: int = 3, n_classes: int = 6, seed: int = 0) -> LongLabels:
    """``k`` of ``n_annotators`` judge each of ``n_items`` items, right 80% of the time."""
    rng = np.random.default_rng(seed)
    truth = rng.integers(0, n_classes, n_items)
    raters = np.argsort(rng.random((n_items, n_annotators)), axis=1)[:, :k]
    items = np.repeat(np.arange(n_items), k)
    said = np.where(rng.random(n_items * k) < 0.8, truth[items], rng.integers(0, n_classes, n_items * k))
    return LongLabels(tuple(f"item {u}" for u in range(n_items)), tuple(f"annotator {a:04d}" for a in range(n_annotators)),
                      tuple(f"class {c}" for c in range(n_classes)), items.astype(np.int64), raters.ravel().astype(np.int64), said.astype(np.int64))


def _dawid_skene_side_by_side(v: object) -> str:
    """Dawid-Skene on the page's votes: every item fitted, against one item per group of alike items."""
    grouped, t_grouped = timed(lambda: estimate_concepts(v, method="dawid-skene"))  # type: ignore[arg-type]
    kept = reliability._item_groups
    reliability._item_groups = lambda i, code, n, fixed: (np.arange(n), np.arange(n))  # type: ignore[assignment]
    try:
        each, t_each = timed(lambda: estimate_concepts(v, method="dawid-skene"))  # type: ignore[arg-type]
    finally:
        reliability._item_groups = kept  # type: ignore[assignment]
    gap = float(np.abs(grouped.probability - each.probability).max())
    if grouped.iterations != each.iterations or gap > 1e-9:
        raise SystemExit(f"grouping alike items changed the fit: iterations {grouped.iterations} vs {each.iterations}, posterior gap {gap:.2e}")
    print(f"Dawid-Skene on the page's votes: {grouped.iterations} iterations both ways, largest posterior difference {gap:.1e}")
    return print_table(["Dawid-Skene fit", "seconds", "x faster"], [["every item", t_each, 1.0], ["one item per group of alike items", t_grouped, t_each / t_grouped]])


def _pairs_side_by_side(n_annotators: int, n_items: int) -> str:
    labels = sparse_crowd(n_annotators, n_items)
    new, t_new = timed(lambda: _pairs(labels, 5))
    old, t_old = timed(lambda: dense_pairs(labels, 5))
    if [(p.first, p.second, p.n_common, p.kappa) for p in new] != [(p.first, p.second, p.n_common, p.kappa) for p in old]:
        raise SystemExit("pairs from the judgments differ from the dense table's")
    mem_new, mem_old = peak_memory(lambda: _pairs(labels, 5)), peak_memory(lambda: dense_pairs(labels, 5))
    print(f"Cohen's kappa per pair: {n_annotators} annotators, {n_items:,} items, 3 judgments per item; the same pairs, counts and kappas")
    return print_table(["pairs of annotators", "seconds", "peak MB (Python allocations)", "x faster"],
                       [["dense annotators x items table (before)", t_old, mem_old, 1.0], ["pairs found from the judgments", t_new, mem_new, t_old / t_new]])


def make_project(root: Path, n_images: int, *, n_people: int = 20, k: int = 3, n_concepts: int = 300, seed: int = 0) -> int:
    """The load benchmark's run and campaign (``n_images`` images x 2 regions), and ``k`` labels per region."""
    cid, _ = annotation_load.make_project(root, n_images, 0, k)
    rng = np.random.default_rng(seed)
    popularity = 1 / np.arange(1, n_concepts + 1)  # a few concepts named often, a long tail
    popularity /= popularity.sum()
    rows = []
    for region in range(1, 2 * n_images + 1):
        truth = rng.choice(n_concepts, size=2, replace=False, p=popularity)
        for person in rng.choice(n_people, size=k, replace=False):
            named = [int(c) if rng.random() < 0.8 else int(rng.choice(n_concepts, p=popularity)) for c in truth[: rng.integers(1, 3)]]
            rows.append({"client_id": f"{region}-{person}", "campaign_id": cid, "region_id": region, "person_id": int(person) + 1,
                         "entities": [[f"concept {c}", []] for c in dict.fromkeys(named)], "unsure": False})
    engine = make_engine(root)
    with write_session(session_factory(engine)) as s:
        s.execute(insert(Person), [{"id": p + 1, "name": f"annotator {p:02d}", "role": "annotator"} for p in range(n_people)])
        s.execute(insert(Label), rows)
    engine.dispose()
    return cid


def main(argv: list[str] | None = None) -> str:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="1,000 images instead of 5,000")
    p.add_argument("--images", type=int, help="this many images instead (e.g. 20000)")
    p.add_argument("--pair-annotators", type=int, default=300, help="annotators of the sparse crowd for the pairs table")
    p.add_argument("--pair-items", type=int, default=30_000, help="items of the sparse crowd for the pairs table")
    args = p.parse_args(argv)
    n_images = args.images or (1_000 if args.quick else 5_000)
    with tempfile.TemporaryDirectory() as tmp:
        cid = make_project(Path(tmp), n_images)
        engine = make_engine(Path(tmp))
        with session_factory(engine)() as s:
            c = get_campaign(s, cid)

            def before() -> object:
                # What the page computed until now: alpha and its interval for every concept, then the first 40
                # kept, each bootstrap drawing a weight for every unit in every resample.
                kept, agreement.alpha_bootstrap = agreement.alpha_bootstrap, unit_weights_bootstrap  # type: ignore[assignment]
                try:
                    v = votes(s, c)
                    report = agreement_report(v.main_entities, n_boot=500, top_disputed=12)
                    concepts = presence_agreement(v, n_boot=200)[:40]
                    ds = estimate_concepts(v, method="dawid-skene")
                finally:
                    agreement.alpha_bootstrap = kept  # type: ignore[assignment]
                return report, concepts, ds

            (_, old_concepts, _), t_before = timed(before)
            found, t_after = timed(lambda: agreement_summary(s, c))
            page_votes = votes(s, c)
            cache = ResultsCache()
            agreement_summary(s, c, cache=cache)
            _, t_cached = timed(lambda: agreement_summary(s, c, cache=cache), repeat=3)
        engine.dispose()
    same = [(a.concept, a.regions_named, a.alpha) for a in found.concepts] == [(a.concept, a.regions_named, a.alpha) for a in old_concepts]
    close = all(a.interval is None or b.interval is None or max(abs(x - y) for x, y in zip(a.interval, b.interval)) < 0.02
                for a, b in zip(found.concepts, old_concepts))
    if not (same and close):
        raise SystemExit("the page now shows other concept agreements than before; the change is wrong")
    print(f"{n_images} images, {2 * n_images} regions, {3 * 2 * n_images} labels; same 40 concepts and alphas shown on both sides, "
          "intervals within 0.02 (each side's own bootstrap draws)")
    text = print_table(
        ["computation", "seconds", "x faster than before"],
        [["before: every concept, then the first 40; a weight per unit per resample", t_before, 1.0],
         ["now: only the 40 shown; draws per distinct row of counts", t_after, t_before / t_after],
         ["now, labels unchanged since last view (cached)", t_cached, t_before / t_cached]],
    )
    text += "\n\n" + _dawid_skene_side_by_side(page_votes)
    return text + "\n\n" + _pairs_side_by_side(args.pair_annotators, args.pair_items)


if __name__ == "__main__":
    main()
