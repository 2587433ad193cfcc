"""An invented data set for the demo: a fictional workforce-skills assessment.

"Tidewater Regional Skills Check" (fictional) assesses adults in a workforce
programme with 16 right/wrong tasks (practical numeracy NUM, workplace documents
DOC) and 8 four-category rated tasks on digital work (DIG: 0 not done .. 3 done
independently). It runs at three sites of the programme (port-ellery, the
reference; marsh-creek; ridgeview). Some respondents took a short form, so about
8% of answers are missing by design. Two items are built to behave differently
by site: NUM06 (a task about a local unit of measure) is harder at marsh-creek
(uniform DIF), and DIG07 (a rated task on a piece of software one site does not
use) discriminates less at ridgeview (non-uniform DIF). Everything here is
simulated; no real person's data.

A second cycle (``cycle=2``: the next year's intake) adds two tasks (NUM09, DIG09),
finds every site's intake 0.3 SD stronger, and has one task that became easier because
its content circulated (DOC03: drift between cycles); the two DIF items behave as before.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from calibration.irt.simulate import simulate_responses


def demo_item_parameters() -> tuple[list[str], np.ndarray, np.ndarray]:
    """Invented generating parameters: item ids, slopes, thresholds (NaN-padded, 3 columns)."""
    ids = [f"NUM{i:02d}" for i in range(1, 9)] + [f"DOC{i:02d}" for i in range(1, 9)]
    ids += [f"DIG{i:02d}" for i in range(1, 9)]
    slopes = np.array(
        [
            1.4,
            1.1,
            0.9,
            1.7,
            1.2,
            0.8,
            1.5,
            1.0,
            1.3,
            0.9,
            1.6,
            1.1,
            0.7,
            1.2,
            1.4,
            1.0,
            1.8,
            1.5,
            1.2,
            2.0,
            1.6,
            1.3,
            1.1,
            1.7,
        ]
    )
    b = np.full((24, 3), np.nan)
    b[:16, 0] = [-1.6, -1.0, -0.6, -0.2, 0.1, 0.4, 0.9, 1.5, -1.3, -0.8, -0.3, 0.0, 0.3, 0.7, 1.1, 1.8]
    b[16:, :] = [
        [-1.8, -0.6, 0.5],
        [-1.5, -0.4, 0.8],
        [-1.2, 0.0, 1.1],
        [-2.0, -0.9, 0.2],
        [-1.0, 0.2, 1.3],
        [-1.4, -0.3, 0.9],
        [-0.8, 0.4, 1.6],
        [-1.6, -0.5, 0.6],
    ]
    return ids, slopes, b


# The second cycle: two new tasks, every site 0.3 stronger, DOC03 0.9 easier (it circulated).
NEW_TASKS = ("NUM09", "DIG09")
NEW_TASK_SLOPES = (1.3, 1.4)
NEW_TASK_THRESHOLDS = ((0.6, np.nan, np.nan), (-1.1, 0.1, 1.2))
CYCLE_SHIFT = 0.3
DRIFTED_TASK, DRIFT = "DOC03", -0.9


def cycle_item_parameters(cycle: int) -> tuple[list[str], np.ndarray, np.ndarray]:
    """The generating parameters of a cycle: the first cycle's, and in the second the new tasks and the drift."""
    ids, slopes, b = demo_item_parameters()
    if cycle == 1:
        return ids, slopes, b
    b = b.copy()
    b[ids.index(DRIFTED_TASK), 0] += DRIFT
    return ids + list(NEW_TASKS), np.concatenate([slopes, NEW_TASK_SLOPES]), np.vstack([b, NEW_TASK_THRESHOLDS])


SITES = ("port-ellery", "marsh-creek", "ridgeview")
SITE_MEANS = (0.0, -0.25, 0.2)
SITE_SDS = (1.0, 1.1, 0.9)


def make_demo_responses(
    n_respondents: int = 3000,
    *,
    seed: int = 20261201,
    with_sites: bool = True,
    with_dif: bool = True,
    cycle: int = 1,
) -> pd.DataFrame:
    """Simulated responses with ids ``TW-000001`` ... and a ``site`` column; empty cells mark omissions.

    ``with_dif=False`` leaves out the two DIF items' site effects (every item invariant); ``cycle=2``
    is the next year's intake (ids ``TW2-...``; see the module docstring).
    """
    rng = np.random.default_rng(seed)
    ids, slopes, b = cycle_item_parameters(cycle)
    site = rng.integers(0, len(SITES), n_respondents) if with_sites else np.zeros(n_respondents, dtype=int)
    shift = CYCLE_SHIFT if cycle == 2 else 0.0
    theta = rng.normal(np.take(SITE_MEANS, site) + shift, np.take(SITE_SDS, site))
    slope = np.broadcast_to(slopes, (n_respondents, len(ids))).copy()
    location = np.broadcast_to(b, (n_respondents,) + b.shape).copy()
    if with_sites and with_dif:
        location[site == 1, ids.index("NUM06"), 0] += 0.8  # harder at marsh-creek
        slope[site == 2, ids.index("DIG07")] *= 0.45  # weaker at ridgeview
    codes = simulate_responses(slope, location, theta, rng)
    short_form = rng.random(n_respondents) < 0.25
    dropped = rng.random((n_respondents, len(ids))) < 0.32
    codes[short_form[:, None] & dropped] = np.nan
    frame = pd.DataFrame(codes, columns=ids).astype("Int64")
    prefix = "TW" if cycle == 1 else f"TW{cycle}"
    frame.insert(0, "id", [f"{prefix}-{i:06d}" for i in range(1, n_respondents + 1)])
    if with_sites:
        frame.insert(1, "site", [SITES[s] for s in site])
    return frame
