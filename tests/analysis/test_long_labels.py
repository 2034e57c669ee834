from __future__ import annotations

from pathlib import Path

import krippendorff
import numpy as np
import pandas as pd
import pytest

from analysis.agreement_report import agreement_report
from analysis.errors import InvalidInputError
from analysis.long_labels import from_frame, read_long_labels
from tests.analysis.test_agreement import KRIPP_2011


def _long(ratings: list[list[object]]) -> pd.DataFrame:
    rows = [{"item": f"u{j}", "annotator": f"obs{i}", "label": "" if v is None else str(v)} for i, row in enumerate(ratings) for j, v in enumerate(row)]
    return pd.DataFrame(rows)


def test_long_form_round_trip_and_report_on_the_2011_example(tmp_path: Path) -> None:
    path = tmp_path / "labels.csv"
    _long(KRIPP_2011).to_csv(path, index=False)
    labels = read_long_labels(path)
    assert len(labels.items) == 12 and len(labels.annotators) == 4 and len(labels) == 41
    rep = agreement_report(labels, n_boot=200)
    assert rep.alpha == pytest.approx(0.743, abs=5e-4)  # Krippendorff (2011), as in test_agreement
    assert rep.alpha_interval is not None and rep.alpha_interval[0] <= rep.alpha <= rep.alpha_interval[1]
    assert rep.n_pairable == 11  # unit 12 has a single rating
    assert rep.fleiss is None and "same number" in rep.fleiss_note
    assert {(p.first, p.second) for p in rep.pairs} == {(f"obs{a}", f"obs{b}") for a in range(4) for b in range(a + 1, 4)}
    # Unit 6 (values 1, 2, 3, 4) is the one the observers disagree on most.
    assert rep.disputed[0].item == "u5" and rep.disputed[0].top_share == 0.25


def test_report_fleiss_applies_with_equal_ratings_and_pairs_match_cohen() -> None:
    from sklearn.metrics import cohen_kappa_score

    rng = np.random.default_rng(0)
    truth = rng.integers(0, 3, 50)
    ratings = np.where(rng.random((3, 50)) < 0.75, truth, rng.integers(0, 3, (3, 50)))
    rep = agreement_report(from_frame(_long(ratings.tolist())), n_boot=0)
    assert rep.fleiss is not None and rep.fleiss_note == ""
    assert rep.alpha == pytest.approx(krippendorff.alpha(reliability_data=ratings.astype(float), level_of_measurement="nominal"))
    first = rep.pairs[0]
    assert first.kappa == pytest.approx(cohen_kappa_score(ratings[0], ratings[1]))
    assert all(0 <= a.agreement_with_others <= 1 for a in rep.annotators if a.agreement_with_others is not None)


def test_every_pair_of_a_sparse_crowd_matches_cohen_on_its_common_items() -> None:
    """Twelve annotators each judging part of 80 items: each pair's items in common and its kappa, against
    scikit-learn's cohen_kappa_score on those items (pairs are found from the judgments, not a full table)."""
    from sklearn.metrics import cohen_kappa_score

    rng = np.random.default_rng(1)
    truth = rng.integers(0, 4, 80)
    given = np.where(rng.random((12, 80)) < 0.7, truth, rng.integers(0, 4, (12, 80))).astype(object)
    given[rng.random((12, 80)) < np.linspace(0.2, 0.95, 12)[:, None]] = None  # the later annotators judge few items
    rep = agreement_report(from_frame(_long(given.tolist())), n_boot=0, min_common=5)
    names = sorted({f"obs{i}" for i in range(12)})
    assert [(p.first, p.second) for p in rep.pairs] == [(a, b) for k, a in enumerate(names) for b in names[k + 1 :]]
    checked = 0
    for p in rep.pairs:
        a, b = int(p.first[3:]), int(p.second[3:])
        common = [u for u in range(80) if given[a, u] is not None and given[b, u] is not None]
        assert p.n_common == len(common)
        if len(common) < 5:
            assert p.kappa is None and "fewer than 5" in p.note
        elif p.kappa is not None:
            assert p.kappa == pytest.approx(cohen_kappa_score([given[a, u] for u in common], [given[b, u] for u in common]))
            checked += 1
    assert checked > 20 and any(p.kappa is None for p in rep.pairs)


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("", "is empty"),
        ("item,who,label\n1,a,x\n", "lacks the column"),
        ("item,annotator,label\n1,a,x\n1,a,y\n", "judge one item twice"),
        ("item,annotator,label\n1,a,\n2,b,\n", "no judgments"),
        ("item,annotator,label\n,a,x\n", "without an item"),
    ],
)
def test_bad_label_files_get_clear_errors(tmp_path: Path, text: str, message: str) -> None:
    path = tmp_path / "bad.csv"
    path.write_text(text)
    with pytest.raises(InvalidInputError, match=message):
        read_long_labels(path)
