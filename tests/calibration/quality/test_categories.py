"""Category functioning on a seeded simulation: a deliberately disordered, rarely used category and a
miscoded one are flagged; the well-behaved categories are not. Modal ranges against the crossing points of
the category curves written out."""

from __future__ import annotations

import numpy as np

from calibration.estimation import calibrate_single_group
from calibration.irt.models import ItemParameters
from calibration.irt.scoring import eap_scores
from calibration.irt.simulate import simulate_items
from calibration.quality.categories import category_check


def test_disordered_and_miscoded_categories_are_flagged_and_no_other() -> None:
    rng = np.random.default_rng(90)
    rows: list[tuple[float, list[float], str, float | None]] = []
    for _ in range(8):  # well-behaved: steps well apart and in order
        a = float(rng.uniform(1.0, 1.6))
        steps = np.array([-1.6, -0.5, 0.5, 1.6]) + rng.normal(0.0, 0.1)
        rows.append((a, [float(v) for v in -a * steps], "gpcm", None))
    # Item 8: category 2 squeezed between reversed steps (1.2 then -0.4): rarely used, never most probable.
    rows.append((1.3, [float(v) for v in -1.3 * np.array([-1.5, 1.2, -0.4, 1.5])], "gpcm", None))
    truth = ItemParameters.stack(rows)
    x = simulate_items(truth, rng.normal(size=4000), rng)
    # Item 9: a copy of item 0 with codes 2 and 3 swapped (a miscoded rating guide).
    miscoded = x[:, 0].copy()
    miscoded[x[:, 0] == 2], miscoded[x[:, 0] == 3] = 3, 2
    x = np.column_stack([x, miscoded])
    models = ("gpcm",) * 10
    params = calibrate_single_group(x, np.full(10, 5), models=models).params
    theta = eap_scores(params, x).theta
    checks = [category_check(params, j, x[:, j], theta) for j in range(10)]
    assert all(not c.flags and c.steps_ordered for c in checks[:8])
    disordered = checks[8]
    assert not disordered.steps_ordered
    assert np.isnan(disordered.modal_from[2]) and len(disordered.flags) == 1
    assert disordered.flags[0].startswith("category 2 (") and "never the most probable" in disordered.flags[0]
    assert disordered.counts[2] == disordered.counts.min()  # the item's least used category
    swapped = checks[9]
    assert any("category 3" in f and "mean theta" in f and "not above category 2" in f for f in swapped.flags)
    assert all((np.diff(c.mean_theta) > 0).all() for c in checks[:8])


def test_modal_ranges_meet_where_adjacent_curves_cross() -> None:
    # For a GPCM item, categories k-1 and k are equally probable where a theta = -c_k, i.e. theta = b_k:
    # with ordered steps the modal ranges meet at the step difficulties (to the grid's step of 0.005).
    a, b = 1.4, np.array([-1.0, 0.3, 1.2])
    params = ItemParameters(np.array([a]), -a * b[None, :], np.array([4]), models=("gpcm",))
    check = category_check(params, 0, np.array([0.0, 1.0, 2.0, 3.0]), np.array([-1.5, 0.0, 0.8, 2.0]))
    assert np.isneginf(check.modal_from[0]) and np.isposinf(check.modal_to[3])
    np.testing.assert_allclose(check.modal_to[:3], b, atol=0.006)
    np.testing.assert_allclose(check.modal_from[1:], b, atol=0.006)
    np.testing.assert_array_equal(check.mean_theta, [-1.5, 0.0, 0.8, 2.0])


def test_a_reverse_keyed_item_is_checked_in_its_own_direction() -> None:
    # Seeded simulation: graded items, one of them reverse-keyed (its codes flipped, so the calibration gives it
    # a negative slope). Its categories fall with theta as they should: no "out of order" steps and no "not
    # above" means; the same item with the codes flipped back is read as the well-behaved item it is, and the
    # calibration's first warning names the reversed item with the recode to apply.
    from calibration.io import ResponseData
    from calibration.pipeline import calibrate_data

    rng = np.random.default_rng(91)
    a = rng.uniform(1.0, 1.8, 6)
    thresholds = np.sort(rng.normal(0.0, 0.3, (6, 3)) + np.array([-1.5, 0.0, 1.5]), axis=1)
    x = simulate_items(ItemParameters.from_thresholds(a, thresholds), rng.normal(size=3000), rng)
    x[:, 5] = 3 - x[:, 5]  # item 5 reverse-keyed in the file
    params = calibrate_single_group(x, np.full(6, 4)).params
    assert params.slopes[5] < 0 < params.slopes[:5].min()
    theta = eap_scores(params, x).theta
    reversed_check = category_check(params, 5, x[:, 5], theta)
    assert reversed_check.steps_ordered and not reversed_check.flags
    assert (np.diff(reversed_check.mean_theta) < 0).all()
    flipped = x.copy()
    flipped[:, 5] = 3 - flipped[:, 5]
    upright = calibrate_single_group(flipped, np.full(6, 4)).params
    upright_check = category_check(upright, 5, flipped[:, 5], eap_scores(upright, flipped).theta)
    assert upright_check.steps_ordered and not upright_check.flags
    data = ResponseData(
        ids=tuple(str(i) for i in range(3000)),
        item_ids=tuple(f"R{j}" for j in range(6)),
        responses=x,
        n_categories=np.full(6, 4),
        models=("grm",) * 6,
        source="simulated",
    )
    notes = calibrate_data(data, name="reversed").bundle.quality.warnings
    assert notes[0].startswith("item with a slope that is not positive, running against the others: R5 (-")
    assert "the top code minus each code" in notes[0] and sum("not positive" in n for n in notes) == 1
