"""How the saliency job stores maps: the fast float16 conversion agrees with numpy's, bit for bit."""

from __future__ import annotations

import warnings

import numpy as np

from app.maps import as_float16


def test_float16_conversion_matches_numpy_on_every_class_of_value() -> None:
    halves = np.arange(0, 1 << 16, dtype=np.uint32).astype(np.uint16).view(np.float16)  # every float16 bit pattern
    exact = halves.astype(np.float32)
    finite = exact[np.isfinite(exact)]
    nxt = np.nextafter(finite, np.float32(np.inf))
    ordered = np.unique(finite).astype(np.float64)
    ties = ((ordered[:-1] + ordered[1:]) / 2).astype(np.float32)  # halfway between neighbouring float16 values: round to even
    rng = np.random.default_rng(0)
    spread = (rng.standard_normal(200_000) * 10.0 ** rng.integers(-12, 7, 200_000)).astype(np.float32)  # subnormal to overflow
    values = np.concatenate([exact, nxt, ties, spread, np.array([np.inf, -np.inf, np.nan, 1e-45, 65519.99, 65520.0], np.float32)])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # numpy warns on overflow to inf
        want = values.astype(np.float16)
    got = as_float16(values.reshape(1, -1))
    assert got.dtype == np.float16 and got.shape == (1, values.size)
    same = (got.ravel().view(np.uint16) == want.view(np.uint16)) | (np.isnan(got.ravel()) & np.isnan(want))
    assert same.all(), values[~same][:10]
    # A stack of maps keeps its shape.
    maps = np.abs(spread[: 3 * 64 * 64]).reshape(3, 64, 64)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        np.testing.assert_array_equal(as_float16(maps).view(np.uint16), maps.astype(np.float16).view(np.uint16))
