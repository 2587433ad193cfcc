"""The score request's plain-JSON path against pydantic's own validation of the same bodies.

The plain path may only ever accept a body pydantic accepts, with the same values; everything else
must fall through to pydantic (None), which gives the error answer. Checked on hand-written edge cases
and on seeded random mutations of a valid body.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pytest
from pydantic import ValidationError

from service.schemas import ScoreRequest


def _pydantic(raw: bytes) -> ScoreRequest | None:
    try:
        return ScoreRequest.model_validate_json(raw)
    except ValidationError:
        return None


def _agrees(raw: bytes) -> str:
    """'plain' when the plain path read the body, 'pydantic' when it left it to pydantic; fails on disagreement."""
    plain, full = ScoreRequest.from_plain_json(raw), _pydantic(raw)
    if plain is None:
        return "pydantic"
    assert full is not None, f"plain path accepted a body pydantic refuses: {raw[:200]!r}"
    assert plain.model_dump() == full.model_dump()
    np.testing.assert_array_equal(plain.answer_codes(), full.answer_codes())
    return "plain"


VALID: dict[str, Any] = {
    "responses": [
        {"id": "r1", "group": "north", "answers": {"A": 1, "B": 0, "C": 2}},
        {"id": "r2", "answers": {"B": 1, "A": 0}},
        {"id": "r3", "group": None, "answers": {}},
    ],
    "options": {"method": "map", "include_summed_score": True},
}


@pytest.mark.parametrize(
    ("raw", "expected"),
    [
        (json.dumps(VALID), "plain"),
        (json.dumps({"responses": VALID["responses"]}), "plain"),
        ('{"responses":[{"id":"a","id":"b","answers":{"A":1,"A":0}}]}', "plain"),  # duplicates: the last wins
        ('{"responses":[{"id":"' + "\U0001f600" * 200 + '","answers":{}}]}', "plain"),  # 200 characters
        ('{"responses":[{"id":"' + "\U0001f600" * 201 + '","answers":{}}]}', "pydantic"),
        ('{"responses":[{"id":"","answers":{}}]}', "pydantic"),
        ('{"responses":[]}', "pydantic"),
        ('{"responses":[{"id":"a","answers":{"A":true}}]}', "pydantic"),
        ('{"responses":[{"id":"a","answers":{"A":1.0}}]}', "pydantic"),
        ('{"responses":[{"id":"a","answers":{"A":"1"}}]}', "pydantic"),
        ('{"responses":[{"id":"a","answers":{"A":null}}]}', "pydantic"),
        ('{"responses":[{"id":"a","answers":{"A":1000}}]}', "pydantic"),
        ('{"responses":[{"id":"a","answers":{"A":-1}}]}', "pydantic"),
        ('{"responses":[{"id":"a","answers":{"A":99999999999999999999999}}]}', "pydantic"),
        ('{"responses":[{"id":"a","answers":{"A":1},"extra":1}]}', "pydantic"),
        ('{"responses":[{"id":"a","answers":{"A":1}}],"extra":1}', "pydantic"),
        ('{"responses":[{"id":"a","answers":{"A":1}}],"options":null}', "pydantic"),
        ('{"responses":[{"id":"a","answers":{"A":1}}],"options":{"method":"median"}}', "pydantic"),
        ('{"responses":[{"id":"a","group":7,"answers":{}}]}', "pydantic"),
        ('{"responses":[{"id":7,"answers":{}}]}', "pydantic"),
        ('{"responses":[{"answers":{}}]}', "pydantic"),
        ('{"responses":[{"id":"a"}]}', "pydantic"),
        ('{"responses":[{"id":"a","answers":[1,0]}]}', "pydantic"),
        ('{"responses":[{"id":"a","answers":{"A":NaN}}]}', "pydantic"),
        ('{"responses":[1]}', "pydantic"),
        ("[]", "pydantic"),
        ("{", "pydantic"),
    ],
)
def test_plain_path_reads_only_what_pydantic_accepts(raw: str, expected: str) -> None:
    assert _agrees(raw.encode()) == expected


def test_random_mutations_never_make_the_two_paths_disagree() -> None:
    # Seeded mutations of a valid body: a value, a key or a container swapped for something else.
    rng = np.random.default_rng(12)
    oddities: list[Any] = [True, False, None, 1.5, 2.0, "1", -3, 1000, 999, 0, [], {}, "", "x" * 201, 2**64]
    outcomes = set()
    for _ in range(400):
        body = json.loads(json.dumps(VALID))
        vector = body["responses"][int(rng.integers(0, 3))]
        target = int(rng.integers(0, 4))
        odd = oddities[int(rng.integers(0, len(oddities)))]
        if target == 0:
            vector["answers"][str(rng.choice(["A", "B", "C"]))] = odd
        elif target == 1:
            vector["id"] = odd
        elif target == 2:
            vector["group"] = odd
        else:
            body["options"][str(rng.choice(["method", "include_summed_score"]))] = odd
        outcomes.add(_agrees(json.dumps(body).encode()))
    assert outcomes == {"plain", "pydantic"}
