from __future__ import annotations

import pytest
from scipy.stats import fisher_exact
from statsmodels.stats.multitest import multipletests

from analysis.errors import InvalidInputError
from analysis.expectations import check_expectations, read_expectations, with_confirmation

from .tables import random_rows, table_from_rows

GOOD = """
min_images = 20
alpha = 0.05
[classes.can]
relies_on = ["rim", "body"]
must_not_rely_on = ["tag", "\\"label band\\" and not cap"]
[classes.carton]
must_not_rely_on = ["rim"]
"""


def test_verdicts_with_their_figures() -> None:
    table = table_from_rows(random_rows(5))
    exp = read_expectations(GOOD)
    verdicts = {(v.expectation.cls, v.expectation.kind, v.expectation.question): v for v in check_expectations(exp, table)}
    assert verdicts[("can", "must_not_rely_on", "tag")].verdict == "violated"  # the rows push tagged items to "can"
    assert verdicts[("can", "relies_on", "rim")].verdict == "violated"  # rim is spread evenly: no sign of reliance
    assert verdicts[("carton", "must_not_rely_on", "rim")].verdict == "met"
    # The p-values are Fisher's one-sided test; q-values are Benjamini-Hochberg over the file.
    predicted, n = table.meta["predicted_class"], len(table)
    ps = []
    for (cls, _, question), v in verdicts.items():
        assert v.both <= v.class_images and len(v.examples) == min(8, v.both)
        mask = table.presence[question] if question in table.presence else None
        if mask is not None:
            both = int((mask & (predicted == cls)).sum())
            m, c = int(mask.sum()), int((predicted == cls).sum())
            assert v.p_value == pytest.approx(fisher_exact([[both, m - both], [c - both, n - m - c + both]], alternative="greater")[1])
        ps.append(v.p_value)
    assert [v.q_value for v in verdicts.values()] == pytest.approx(list(multipletests(ps, method="fdr_bh")[1]))


def test_few_images_is_not_enough_evidence_and_interventions_decide_violations() -> None:
    table = table_from_rows(random_rows(5, n=40))
    verdicts = check_expectations(read_expectations("min_images = 100\n[classes.can]\nmust_not_rely_on = [\"tag\"]"), table)
    assert verdicts[0].verdict == "not enough evidence" and "100 are needed" in verdicts[0].reason
    big = check_expectations(read_expectations('[classes.can]\nmust_not_rely_on = ["tag"]'), table_from_rows(random_rows(5)))[0]
    assert big.verdict == "violated"
    assert with_confirmation(big, False, "ablation moved confidence by 0.01").verdict == "co-occurs, not confirmed"
    assert with_confirmation(big, True, "ablation dropped confidence by 0.4").verdict == "violated"


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("[classes.can\n", "not valid TOML"),
        ("threshold = 3\n[classes.can]\nrelies_on = ['rim']", "unknown top-level keys"),
        ("[classes.can]\nrely_on = ['rim']", "unknown keys"),
        ("[classes.can]\nrelies_on = 'rim'", "list of strings"),
        ("[classes.can]\nrelies_on = ['rim and']", "classes.can.relies_on"),
        ("alpha = 2\n[classes.can]\nrelies_on = ['rim']", "alpha must be"),
        ("min_images = 20", "names no class"),
    ],
)
def test_bad_expectation_files_say_what_to_fix(text: str, message: str) -> None:
    with pytest.raises(InvalidInputError, match=message):
        read_expectations(text)


def test_unknown_class_is_named() -> None:
    with pytest.raises(InvalidInputError, match="'cann'"):
        check_expectations(read_expectations("[classes.cann]\nrelies_on = ['rim']"), table_from_rows(random_rows(1)))
