from __future__ import annotations

import numpy as np
import pytest

from analysis.reliability import dawid_skene


def _crowd(seed: int, accuracies: list[float], n_items: int = 400, k: int = 3) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    truth = rng.integers(0, k, n_items)
    items, anns, labels = [], [], []
    for a, acc in enumerate(accuracies):
        rated = rng.random(n_items) < 0.8  # sparse: each annotator sees 80% of items
        wrong = (truth + rng.integers(1, k, n_items)) % k
        lab = np.where(rng.random(n_items) < acc, truth, wrong)
        items += list(np.nonzero(rated)[0]); anns += [a] * int(rated.sum()); labels += list(lab[rated])
    return truth, np.array(items), np.array(anns), np.array(labels)


@pytest.mark.parametrize("seed", range(3))
def test_dawid_skene_beats_majority_and_estimates_accuracy(seed: int) -> None:
    accuracies = [0.92, 0.88, 0.45, 0.4, 0.4, 0.38, 0.35]
    truth, items, anns, labels = _crowd(seed, accuracies)
    res = dawid_skene(items, anns, labels, n_classes=3)
    assert res.converged and res.iterations < 500
    votes = np.zeros((len(truth), 3))
    np.add.at(votes, (items, labels), 1)
    majority = (votes.argmax(1) == truth).mean()
    ds = (res.posterior.argmax(1) == truth).mean()
    assert ds > majority + 0.03
    # Against each annotator's realised accuracy on the items they rated; tolerance 0.08 is our
    # choice for 320 judgments per annotator (binomial sd near 0.5 is about 0.028).
    realised = np.array([(labels[anns == a] == truth[items[anns == a]]).mean() for a in range(len(accuracies))])
    assert np.abs(res.accuracy_score - realised).max() < 0.08
    np.testing.assert_allclose(res.posterior.sum(1), 1.0)
