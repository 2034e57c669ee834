from __future__ import annotations

import pytest
from scipy.stats import fisher_exact
from statsmodels.stats.multitest import multipletests

from analysis.errors import InvalidInputError
from analysis.expectations import check_expectations, decide_expectations, read_expectations
from analysis.reliance import VerdictSettings

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
    # Co-occurrence never decides: without a covering test every line reads "not tested", never "violated",
    # though the rows push tagged items to "can" (lift well above 1) and rim is spread evenly.
    assert {v.verdict for v in verdicts.values()} == {"not tested"}
    assert verdicts[("can", "must_not_rely_on", "tag")].lift > 1.5 and verdicts[("can", "must_not_rely_on", "tag")].q_value < 0.001
    assert "covering can test one concept or concepts joined by 'and'" in verdicts[("can", "must_not_rely_on", '"label band" and not cap')].reason
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


def test_few_images_is_not_enough_evidence_and_no_test_is_not_tested() -> None:
    table = table_from_rows(random_rows(5, n=40))
    verdicts = check_expectations(read_expectations("min_images = 100\n[classes.can]\nmust_not_rely_on = [\"tag\"]"), table)
    assert verdicts[0].verdict == "not enough evidence" and "100 are needed" in verdicts[0].reason
    big = check_expectations(read_expectations('[classes.can]\nmust_not_rely_on = ["tag"]'), table_from_rows(random_rows(5)))
    decided = decide_expectations(big, {}, VerdictSettings())[0]
    assert decided.verdict == "not tested" and decided.decided_by == "none" and "supporting only" in decided.reason


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
