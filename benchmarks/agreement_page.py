"""The agreement page's computation on a large campaign: everything computed then cut to what is shown
(as before) against only what is shown, and against a second view of the same labels (cached).

    .venv/bin/python -m benchmarks.agreement_page            # 5,000 images, 10,000 regions, 30,000 labels
    .venv/bin/python -m benchmarks.agreement_page --quick    # 1,000 images
    .venv/bin/python -m benchmarks.agreement_page --images 20000

The project is synthetic (rows only, no images): 20 annotators name 1-2 of 300 concepts on each
region, three annotators per region. Both sides read the same database in one run.
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

import numpy as np
import numpy.typing as npt
from sqlalchemy import insert

from analysis import agreement
from analysis.agreement_report import agreement_report
from analysis.concept_votes import estimate_concepts, presence_agreement
from app.campaigns import get_campaign
from app.db import make_engine, session_factory, write_session
from app.models import Label, Person
from app.services.campaign_analysis import ResultsCache, agreement_summary, votes

from . import annotation_load
from .measure import print_table, timed


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
    return print_table(
        ["computation", "seconds", "x faster than before"],
        [["before: every concept, then the first 40; a weight per unit per resample", t_before, 1.0],
         ["now: only the 40 shown; draws per distinct row of counts", t_after, t_before / t_after],
         ["now, labels unchanged since last view (cached)", t_cached, t_before / t_cached]],
    )


if __name__ == "__main__":
    main()
