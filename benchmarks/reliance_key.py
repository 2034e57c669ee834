"""Processor time of the intervention storage keys behind a results page: every rule's key (app.reliance._plan)
over a synthetic 20,000-image concept table, the per-call region walk of commit 0c6fb83 beside the per-table
digest now, side by side in one run.

    .venv/bin/python -m benchmarks.reliance_key
"""

from __future__ import annotations

import importlib
import subprocess
import time
from types import SimpleNamespace
from typing import Any

import numpy as np
import pandas as pd

from analysis.concept_table import build_concept_table

from .measure import print_table

NAMES = ["belt", "green belt", "grey belt", "tag", "yellow tag", "cap", "body", "rim", "neck", "label band", "pull tab", "print", "gable top",
         "dent", "paper scrap"]


def _old_evidence() -> Any:
    """The storage-key fingerprint as it was at commit 0c6fb83 (a walk over every region per call)."""
    src = subprocess.run(["git", "show", "0c6fb83:app/reliance.py"], capture_output=True, text=True, check=True).stdout
    ns: dict[str, Any] = {}
    exec("from __future__ import annotations\nimport hashlib, json\nimport numpy as np\nfrom typing import Any\nResults = Any\n"  # noqa: S102
         + src[src.index("def _evidence("):src.index("def _read_cached(")], ns)
    return ns["_evidence"]


def main(argv: list[str] | None = None) -> str:
    import app.reliance as rel

    rng = np.random.default_rng(0)
    n = 20000
    classes = np.array(["bottle", "can", "carton"])
    pred = classes[rng.integers(0, 3, n)]
    meta = pd.DataFrame({"true_class": pred, "predicted_class": pred, "confidence": 0.9, "split": "test"}, index=np.arange(1, n + 1))
    regions = {i: [i * 10 + k for k in range(3)] for i in range(1, n + 1)}
    concepts = {r: {NAMES[j]: 1.0 for j in rng.choice(len(NAMES), size=rng.integers(1, 3), replace=False)} for rs in regions.values() for r in rs}
    table = build_concept_table(meta, regions, {r: 0.3 for rs in regions.values() for r in rs}, concepts, method="majority",
                                families={"green belt": "belt", "grey belt": "belt", "yellow tag": "tag"})
    res = SimpleNamespace(table=table, campaign=SimpleNamespace(run_id=1), method="majority")
    rules = [(str(c), [x]) for c in classes for x in NAMES] + [(str(c), ["green belt", "cap"]) for c in classes]

    def every_key() -> float:
        t0 = time.process_time()
        for cls, cs in rules:
            rel._plan(res, "sha", cls, cs, 5, 200, 0)  # type: ignore[arg-type]
        return time.process_time() - t0

    rel._evidence = _old_evidence()  # type: ignore[assignment]
    old = every_key()
    importlib.reload(rel)
    first, again = every_key(), every_key()
    print(f"{len(rules)} rules over {n} images, {len(concepts)} regions; processor seconds for every rule's storage key")
    return print_table(["per-call walk (0c6fb83)", "per-table digest, first read", "per-table digest, next read", "first read / walk"],
                       [[f"{old:.2f}", f"{first:.2f}", f"{again:.2f}", f"{first / old:.3f}"]])


if __name__ == "__main__":
    main()
