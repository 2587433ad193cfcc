"""Shared fixtures (helpers are in tests/helpers.py)."""

from __future__ import annotations

import numpy as np
import pytest

from tests.helpers import load_reference


@pytest.fixture(scope="session")
def lsat6() -> dict:
    """LSAT Section 6 as a (1000, 5) response matrix plus the reference values."""
    ref = load_reference("lsat6.json")
    rows = []
    for pattern, count in enumerate(ref["pattern_frequencies"]):
        bits = [(pattern >> (4 - i)) & 1 for i in range(5)]
        rows.extend([bits] * count)
    ref["responses"] = np.array(rows, dtype=np.float64)
    return ref


@pytest.fixture(scope="session")
def lsat6_bundle(lsat6: dict):  # type: ignore[no-untyped-def]
    """An unpublished bundle calibrated on LSAT-6 (open data), built once per session."""
    from calibration.io import ResponseData
    from calibration.pipeline import calibrate_data

    x = lsat6["responses"]
    data = ResponseData(
        ids=tuple(f"r{i}" for i in range(x.shape[0])),
        item_ids=("L1", "L2", "L3", "L4", "L5"),
        responses=x,
        n_categories=np.full(5, 2),
        models=("2pl",) * 5,
        source="lsat6",
        source_sha256="0" * 64,
    )
    return calibrate_data(data, name="lsat6").bundle
