"""Dawid-Skene aggregation at scale: time and peak memory against majority vote (the floor) and,
at a size it can finish, the crowd-kit reference implementation.

    .venv/bin/python -m benchmarks.aggregation_scale            # 1,000,000 judgments
    .venv/bin/python -m benchmarks.aggregation_scale --quick    # 100,000 judgments
"""

from __future__ import annotations

import argparse
import warnings

import numpy as np

from analysis.reliability import dawid_skene, majority_vote

from .measure import peak_memory, print_table, timed


def simulated_crowd(n_items: int, n_annotators: int, n_classes: int, per_item: int, seed: int = 0) -> tuple[np.ndarray, ...]:
    """Each item judged by ``per_item`` distinct annotators of accuracy 0.2-0.9. A wrong label is
    mostly the annotator's own habitual confusion for that class (what Dawid-Skene can learn), else uniform."""
    rng = np.random.default_rng(seed)
    truth = rng.integers(0, n_classes, n_items)
    accuracy = rng.uniform(0.2, 0.9, n_annotators)
    habit = (np.arange(n_classes)[None, :] + rng.integers(1, n_classes, (n_annotators, n_classes))) % n_classes
    who = np.argsort(rng.random((n_items, n_annotators)), axis=1)[:, :per_item]
    items = np.repeat(np.arange(n_items), per_item)
    annotators = who.ravel()
    right = rng.random(len(items)) < accuracy[annotators]
    uniform = (truth[items] + rng.integers(1, n_classes, len(items))) % n_classes
    wrong = np.where(rng.random(len(items)) < 0.7, habit[annotators, truth[items]], uniform)
    labels = np.where(right, truth[items], wrong)
    return truth, items, annotators, labels


def main(argv: list[str] | None = None) -> str:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="10x fewer judgments")
    args = p.parse_args(argv)
    n_items = 10_000 if args.quick else 100_000
    truth, items, anns, labels = simulated_crowd(n_items, 20, 50, 10)
    head = f"{len(items):,} judgments: {n_items:,} items, 20 annotators, 50 labels, 10 judgments per item."
    print(head)
    rows = []
    base = None
    for name, fn in [
        ("majority vote", lambda: majority_vote(items, anns, labels, n_classes=50)),
        ("Dawid-Skene (full)", lambda: dawid_skene(items, anns, labels, n_classes=50)),
        ("Dawid-Skene (one-coin)", lambda: dawid_skene(items, anns, labels, n_classes=50, one_coin=True)),
    ]:
        res, seconds = timed(fn)
        mb = peak_memory(fn)
        base = base or seconds
        rows.append([name, seconds, seconds / base, mb, res.iterations, (res.labels == truth).mean()])
    # The reference implementation (pandas EM) on a tenth of the items, for a like-for-like ratio.
    small = 2_000 if args.quick else 10_000
    st, si, sa, sl = simulated_crowd(small, 20, 50, 10, seed=1)
    try:
        import pandas as pd
        from crowdkit.aggregation import DawidSkene

        frame = pd.DataFrame({"task": si, "worker": sa, "label": sl})
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ref, ref_s = timed(lambda: DawidSkene(n_iter=100, tol=1e-5).fit(frame))
        ours, our_s = timed(lambda: dawid_skene(si, sa, sl, n_classes=50, tol=1e-5, max_iter=100))
        ref_acc = (ref.labels_.sort_index().to_numpy() == st[np.unique(si)]).mean()
        rows.append([f"crowd-kit DawidSkene, {len(si):,} judgments", ref_s, ref_s / our_s, float("nan"), len(ref.loss_history_), ref_acc])
        rows.append([f"heedmap, same {len(si):,} judgments", our_s, 1.0, float("nan"), ours.iterations, (ours.labels == st).mean()])
    except ImportError:
        print("crowd-kit is not installed; its row is left out.")
    return head + "\n\n" + print_table(["method", "seconds", "x first row", "peak MB", "iterations", "accuracy vs truth"], rows)


if __name__ == "__main__":
    main()
