"""Per-class concept rules at scale: heedmap's rules (with significance columns) against what an
analyst would script with mlxtend (one-hot class columns, fpgrowth, association_rules, keep the
rules whose consequent is one class), and against a C library for the same mining (pyfim's
association rules, class items allowed only on the right-hand side), on the same table, side by
side in one run.

    nice -n 10 .venv/bin/python -m benchmarks.rules_scale            # 100k and 1M images x 500 concepts
    nice -n 10 .venv/bin/python -m benchmarks.rules_scale --quick    # 100k only

pyfim (``pip install 'heedmap[bench]'``; the table is left out without it) mines from a list of
transactions, heedmap from its image-by-concept DataFrame (pandas sparse columns): each gets its
own input made before the clock starts (making 1M Python transactions takes several seconds and
is not counted). Both are timed as the process's CPU time, best of three runs taken alternately,
so other work on a shared machine does not count. pyfim is timed twice: with support, confidence
and lift only, and with its Fisher exact test as the rule evaluation ('fetprob'); heedmap's time
always includes every column (support, confidence, its Wilson lower end, lift, leverage,
conviction, one-sided Fisher p, Benjamini-Hochberg q, families, ranking). The ratio is against
pyfim's faster run (without any p-value). Goal: heedmap / pyfim >= 1.

The table: 10 classes, 3-8 concepts per image drawn with Zipf-like frequencies (p ~ 1/rank), and a
class-specific concept in half of the images, so that rules exist. Minimum support 0.001, concept
sets of up to 3. Both start from the same sparse table and class array; time and peak memory
(Python-tracked allocations, numpy included) cover each whole script.
"""

from __future__ import annotations

import argparse
import gc
import os
import time
import warnings
from collections.abc import Callable

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


def transactions(x: sparse.csr_matrix, classes: np.ndarray) -> list[list[int]]:
    """pyfim's input: per image its concept columns and its class as item N_CONCEPTS + class."""
    x = sparse.csr_matrix(x)
    ind, ptr = x.indices, x.indptr
    return [[*ind[ptr[i] : ptr[i + 1]].tolist(), N_CONCEPTS + int(classes[i])] for i in range(x.shape[0])]


def pyfim_rules(tracts: list[list[int]], n: int, *, fisher: bool) -> list[tuple[object, ...]]:
    """Rules 'concepts => one class' with support >= 0.001 of the images (of set and class together,
    as heedmap counts it), up to 3 concepts, any confidence: support, confidence, lift (+ Fisher p)."""
    import fim

    from analysis.rules import support_count

    appear = {None: "a", **{N_CONCEPTS + k: "c" for k in range(N_CLASSES)}}
    return fim.arules(tracts, supp=-support_count(0.001, n), conf=0, zmin=2, zmax=4, report="ascle" if fisher else "ascl",  # type: ignore[no-any-return]
                      eval="f" if fisher else "x", thresh=100, mode="o", appear=appear)


def same_as_pyfim(ours: pd.DataFrame, ref: list[tuple[object, ...]]) -> tuple[bool, float]:
    """Whether pyfim found the same (class, concept set) rules, and the largest support/confidence/lift difference."""
    cols = names()
    theirs = pd.DataFrame({
        "class": [f"class {int(r[0]) - N_CONCEPTS}" for r in ref],  # type: ignore[call-overload]
        "concepts": [" & ".join(sorted(cols[int(i)] for i in r[1])) for r in ref],  # type: ignore[attr-defined]
        "support": [r[3] for r in ref], "confidence": [r[4] for r in ref], "lift": [r[5] for r in ref],
    }).set_index(["class", "concepts"]).sort_index()
    mine = ours.set_index(["class", "concepts"])[["support", "confidence", "lift"]].sort_index()
    if not mine.index.equals(theirs.index):
        return False, float("nan")
    return True, float(np.abs(mine.to_numpy() - theirs.to_numpy(dtype=float)).max())


def cpu_best(fns: dict[str, Callable[[], object]], repeat: int = 3) -> tuple[dict[str, object], dict[str, float]]:
    """Each function's last result and best CPU time, the functions run in turn ``repeat`` times."""
    best = {k: float("inf") for k in fns}
    out: dict[str, object] = {}
    for _ in range(repeat):
        for k, fn in fns.items():
            gc.collect()
            t = time.process_time()
            out[k] = fn()
            best[k] = min(best[k], time.process_time() - t)
    return out, best


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
    try:
        import fim  # noqa: F401
        have_fim = True
    except ImportError:
        print("pyfim is not installed (pip install 'heedmap[bench]'): the C library comparison is left out", flush=True)
        have_fim = False
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"load average at start {load:.1f} on {os.cpu_count()} CPUs", flush=True)
    rows, c_rows = [], []
    for n in [100_000] if args.quick else [100_000, 1_000_000]:
        x, classes = zipf_table(n)
        ours, our_s = timed(lambda: heedmap_rules(x, classes))
        our_mb = peak_memory(lambda: heedmap_rules(x, classes))
        ref, ref_s = timed(lambda: scripted_mlxtend(x, classes))
        ref_mb = peak_memory(lambda: scripted_mlxtend(x, classes))
        same, diff = same_rules(ours, ref)
        rows.append([f"{n:,}", len(ours), "yes" if same else "NO", diff, ref_s, our_s, ref_s / our_s, ref_mb, our_mb, ref_mb / our_mb])
        del ref
        if have_fim:
            table = pd.DataFrame.sparse.from_spmatrix(x, columns=names())
            labels = pd.Series(np.char.add("class ", classes.astype(str)))
            tracts = transactions(x, classes)
            found, cpu = cpu_best({
                "heedmap": lambda: mine_rules(table, labels, min_support=0.001, max_len=3, min_lift=0.0).rules,
                "pyfim": lambda: pyfim_rules(tracts, n, fisher=False),
                "pyfim_fisher": lambda: pyfim_rules(tracts, n, fisher=True),
            })
            c_same, c_diff = same_as_pyfim(found["heedmap"], found["pyfim"])  # type: ignore[arg-type]
            c_rows.append([f"{n:,}", len(found["pyfim"]), "yes" if c_same else "NO", c_diff, cpu["pyfim"], cpu["pyfim_fisher"],  # type: ignore[arg-type]
                           cpu["heedmap"], cpu["pyfim"] / cpu["heedmap"]])
            del tracts, table, found
        print(f"{n:,} images done", flush=True)
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"load average at the end {load:.1f}", flush=True)
    text = print_table(
        ["images", "rules", "same rules", "max metric diff", "mlxtend s", "heedmap s", "speed-up", "mlxtend MB", "heedmap MB", "memory ratio"], rows
    )
    if c_rows:
        text += "\n\n" + print_table(
            ["images", "pyfim rules", "same rules", "max metric diff", "pyfim CPU-s (support, confidence, lift)", "pyfim CPU-s (+ Fisher)",
             "heedmap CPU-s (every column)", "heedmap speed / pyfim"], c_rows
        )
    return text


if __name__ == "__main__":
    main()
