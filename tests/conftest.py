"""Shared fixtures: reference data files and small seeded data sets."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

DATA = Path(__file__).parent / "data"


def load_reference(name: str) -> dict:
    return json.loads((DATA / name).read_text())


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


def simulate_responses(
    slopes: np.ndarray,
    thresholds: np.ndarray,
    theta: np.ndarray,
    rng: np.random.Generator,
) -> np.ndarray:
    """Graded (or 2PL) responses drawn from the model; thresholds NaN-padded per item.

    Used only for simulations (recovery studies); the reference checks use outside data.
    """
    thresholds = np.atleast_2d(np.asarray(thresholds, dtype=np.float64))
    if thresholds.shape[0] != slopes.shape[0]:
        thresholds = thresholds.T
    z = slopes[None, :, None] * (theta[:, None, None] - thresholds[None, :, :])
    star = np.where(np.isnan(z), 0.0, 1.0 / (1.0 + np.exp(-np.nan_to_num(z))))
    u = rng.random((theta.shape[0], slopes.shape[0], 1))
    return np.sum(u < star, axis=2).astype(np.float64)


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
