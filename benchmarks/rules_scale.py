"""Per-class concept rules at scale: heedmap's rules (with significance columns) against what an
analyst would script with mlxtend (one-hot class columns, fpgrowth, association_rules, keep the
rules whose consequent is one class), on the same table, side by side in one run.

    .venv/bin/python -m benchmarks.rules_scale            # 100k and 1M images x 500 concepts
    .venv/bin/python -m benchmarks.rules_scale --quick    # 100k only

The table: 10 classes, 3-8 concepts per image drawn with Zipf-like frequencies (p ~ 1/rank), and a
class-specific concept in half of the images, so that rules exist. Minimum support 0.001, concept
sets of up to 3. Both start from the same sparse table and class array; time and peak memory
(Python-tracked allocations, numpy included) cover each whole script.
"""

from __future__ import annotations

import argparse
import warnings

import numpy as np
import pandas as pd
from scipy import sparse

from analysis.rules import mine_rules

from .measure import peak_memory, print_table, timed

N_CONCEPTS = 500
N_CLASSES = 10


def zipf_table(n: int, seed: int = 0) -> tuple[sparse.csr_matrix, np.ndarray]:
    rng = np.random.default_rng(seed)
    per_image = rng.integers(3, 9, n)
    p = 1.0 / np.arange(1, N_CONCEPTS + 1)
    p /= p.sum()
    classes = rng.integers(0, N_CLASSES, n)
    rows = np.repeat(np.arange(n), per_image)
    cols = rng.choice(N_CONCEPTS, size=len(rows), p=p)
    marked = np.nonzero(rng.random(n) < 0.5)[0]
    rows = np.concatenate([rows, marked])
    cols = np.concatenate([cols, (classes[marked] * 7 + 20) % N_CONCEPTS])
    x = sparse.csr_matrix((np.ones(len(rows), dtype=bool), (rows, cols)), shape=(n, N_CONCEPTS))
    x.sum_duplicates()
    return x, classes


def names() -> list[str]:
    return [f"concept {i:03d}" for i in range(N_CONCEPTS)]


def heedmap_rules(x: sparse.csr_matrix, classes: np.ndarray) -> pd.DataFrame:
    table = pd.DataFrame.sparse.from_spmatrix(x, columns=names())
    labels = pd.Series(np.char.add("class ", classes.astype(str)))
    return mine_rules(table, labels, min_support=0.001, max_len=3, min_lift=0.0).rules


def scripted_mlxtend(x: sparse.csr_matrix, classes: np.ndarray) -> pd.DataFrame:
    from mlxtend.frequent_patterns import association_rules, fpgrowth

    onehot = pd.DataFrame(x.toarray(), columns=names())
    labels = pd.get_dummies(pd.Series(np.char.add("class ", classes.astype(str)))).add_prefix("= ")
    data = pd.concat([onehot, labels.astype(bool)], axis=1)
    frequent = fpgrowth(data, min_support=0.001, use_colnames=True, max_len=4)
    with warnings.catch_warnings(), np.errstate(divide="ignore", invalid="ignore"):
        warnings.simplefilter("ignore")
        rules = association_rules(frequent, num_itemsets=len(data), metric="confidence", min_threshold=0.0)
    one_class = rules["consequents"].map(lambda s: len(s) == 1 and next(iter(s)).startswith("= "))
    concepts_only = rules["antecedents"].map(lambda s: not any(i.startswith("= ") for i in s))
    return rules[one_class & concepts_only]


def same_rules(ours: pd.DataFrame, ref: pd.DataFrame) -> tuple[bool, float]:
    """Whether both found the same (class, concept set) rules, and the largest metric difference."""
    theirs = pd.DataFrame({
        "class": ref["consequents"].map(lambda s: next(iter(s))[2:]),
        "concepts": ref["antecedents"].map(lambda s: " & ".join(sorted(s))),
        "support": ref["support"], "confidence": ref["confidence"], "lift": ref["lift"],
    }).set_index(["class", "concepts"]).sort_index()
    mine = ours.set_index(["class", "concepts"])[["support", "confidence", "lift"]].sort_index()
    if not mine.index.equals(theirs.index):
        return False, float("nan")
    return True, float(np.abs(mine.to_numpy() - theirs.to_numpy()).max())


def main(argv: list[str] | None = None) -> str:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="100k images only")
    args = p.parse_args(argv)
    rows = []
    for n in [100_000] if args.quick else [100_000, 1_000_000]:
        x, classes = zipf_table(n)
        ours, our_s = timed(lambda: heedmap_rules(x, classes))
        our_mb = peak_memory(lambda: heedmap_rules(x, classes))
        ref, ref_s = timed(lambda: scripted_mlxtend(x, classes))
        ref_mb = peak_memory(lambda: scripted_mlxtend(x, classes))
        same, diff = same_rules(ours, ref)
        rows.append([f"{n:,}", len(ours), "yes" if same else "NO", diff, ref_s, our_s, ref_s / our_s, ref_mb, our_mb, ref_mb / our_mb])
        print(f"{n:,} images done", flush=True)
    return print_table(
        ["images", "rules", "same rules", "max metric diff", "mlxtend s", "heedmap s", "speed-up", "mlxtend MB", "heedmap MB", "memory ratio"], rows
    )


if __name__ == "__main__":
    main()
