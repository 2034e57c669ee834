"""How many concept sets rule mining could have to count, known before mining starts.

Every (concept set, class) pair that reaches ``min_count`` images is made of ``min_count``
occurrences, and an image with ``r`` concepts holds ``C(r, k)`` sets of size ``k``. So the
number of pairs that can reach the count is at most ``sum over images of sum_k C(r_i, k)``
divided by ``min_count``: an upper bound that costs one pass over the row sums.
"""

from __future__ import annotations

from math import comb

import numpy as np
import numpy.typing as npt

from .errors import InvalidInputError

DEFAULT_MAX_CANDIDATES = 2_000_000


def candidate_bound(concepts_per_image: npt.ArrayLike, *, min_count: int, max_len: int) -> int:
    """Upper bound on the concept sets (with their class) that can reach ``min_count`` images, sets of 1..``max_len``."""
    if min_count < 1 or max_len < 1:
        raise InvalidInputError(f"min_count and max_len must be at least 1; got {min_count} and {max_len}.")
    r = np.asarray(concepts_per_image, dtype=np.int64)
    values, counts = np.unique(r, return_counts=True)
    total = sum(int(c) * sum(comb(int(v), k) for k in range(1, max_len + 1)) for v, c in zip(values, counts))
    return -(-total // min_count)


def check_rule_budget(concepts_per_image: npt.ArrayLike, *, min_count: int, max_len: int, n_columns: int,
                      max_candidates: int = DEFAULT_MAX_CANDIDATES) -> int:
    """The bound, or InvalidInputError with what to change when it passes ``max_candidates``."""
    bound = candidate_bound(concepts_per_image, min_count=min_count, max_len=max_len)
    if bound > max_candidates:
        raise InvalidInputError(
            f"these settings could make up to {bound:,} concept sets to count over {n_columns:,} concept columns, past the limit of "
            f"{max_candidates:,} (time and memory grow with it). Raise the fewest images a rule needs (min_count {min_count}, or min_support), "
            f"lower the concepts per rule (max_len {max_len}), or drop concept columns that nearly every image has."
        )
    return bound
