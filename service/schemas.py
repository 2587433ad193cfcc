"""Request and response schemas of the scoring service (named by role, extra fields forbidden)."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from itertools import chain
from typing import Annotated, Any, Literal, NotRequired

import numpy as np
import orjson
from pydantic import BaseModel, ConfigDict, Field, PrivateAttr, StrictInt, ValidationError, with_config
from typing_extensions import TypedDict  # pydantic needs this one before Python 3.12

from calibration.vocabulary import ScoringMethod

CAUTION = (
    "Every score has measurement error: report the SE with it. Scores from few answered items or with low "
    "reliability must not drive individual high-stakes decisions on their own. Items left out for a group come "
    "from a statistical DIF screen that content experts must review; follow the professional testing standards "
    "and the local rules that govern the assessment."
)


# Largest answer code the schema accepts: far above any item's categories, far below any integer overflow.
MAX_ANSWER_CODE = 999
# Longest respondent id and group name.
MAX_ID_LENGTH = 200
MAX_GROUP_LENGTH = 200
# Largest version number (the path parameter has the same bound).
MAX_VERSION = 2**31 - 1


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


class ScoreOptions(_Strict):
    """How to score: the method (default: the bundle's) and whether to add summed-score results."""

    method: ScoringMethod | None = Field(None, description="default: the bundle's scoring method")
    include_summed_score: bool = Field(
        default=False,
        description="add the summed score and its EAP conversion when every item of the group was answered",
    )


# A typed dictionary rather than a model: a batch of a thousand validates in about half the time,
# with the same rules and the same error answers.
@with_config(ConfigDict(extra="forbid"))
class ResponseVector(TypedDict):
    """One respondent: an id, the group (when the bundle has several) and the answers by item."""

    id: Annotated[str, Field(min_length=1, max_length=MAX_ID_LENGTH, description="the respondent's id, echoed back")]
    group: NotRequired[
        Annotated[
            str | None, Field(max_length=MAX_GROUP_LENGTH, description="required when the bundle has several groups")
        ]
    ]
    answers: Annotated[
        dict[str, Annotated[StrictInt, Field(ge=0, le=MAX_ANSWER_CODE)]],
        Field(
            description="item id -> category code, a whole number 0 .. K-1 (strict: no strings, booleans or "
            "decimals); omit items not administered"
        ),
    ]


def flat_answer_codes(responses: Sequence[Mapping[str, Any]]) -> np.ndarray:
    """Every vector's answers, one after the other, as int64 (validated codes, in the order given)."""
    count = sum(len(vector["answers"]) for vector in responses)
    values = chain.from_iterable(vector["answers"].values() for vector in responses)
    return np.fromiter(values, dtype=np.int64, count=count)


_REQUEST_KEYS = frozenset({"responses", "options"})
_VECTOR_KEYS = frozenset(ResponseVector.__annotations__)


class ScoreRequest(_Strict):
    """A batch of response vectors and the scoring options."""

    responses: list[ResponseVector] = Field(min_length=1)
    options: ScoreOptions = Field(default_factory=ScoreOptions)
    _answer_codes: np.ndarray | None = PrivateAttr(default=None)

    def answer_codes(self) -> np.ndarray:
        """Every vector's answers, one after the other, as int64 (the validated codes, in the order given)."""
        if self._answer_codes is None:
            self._answer_codes = flat_answer_codes(self.responses)
        return self._answer_codes

    @classmethod
    def from_plain_json(cls, raw: bytes) -> ScoreRequest | None:
        """The request from a body that plainly keeps every rule of this schema, without a model pass per value.

        The rules checked are the schema's own: an object with ``responses`` (a non-empty list) and
        optionally ``options``; each vector an object with no other keys than ``id`` (a string of
        1..200 characters), ``group`` (null or a string of at most 200) and ``answers`` (an object of
        whole numbers 0..999, JSON integers only). The options are validated by their model. A body
        that breaks any rule, or that orjson cannot read, gives None: it then goes through the model's
        own validation, so every error answer is pydantic's. (orjson and pydantic read duplicate keys
        alike, the last one winning, and count string lengths in characters alike.)
        """
        try:
            document = orjson.loads(raw)
        except orjson.JSONDecodeError:
            return None
        if type(document) is not dict or not document.keys() <= _REQUEST_KEYS:
            return None
        responses = document.get("responses")
        if type(responses) is not list or not responses or not all(map(_plain_vector, responses)):
            return None
        values = chain.from_iterable(vector["answers"].values() for vector in responses)
        if not set(map(type, values)) <= {int}:  # no booleans, decimals, strings or nulls among the answers
            return None
        try:
            options = ScoreOptions.model_validate_json(orjson.dumps(document.get("options", {})))
            request = cls.model_construct(responses=responses, options=options)
            codes = request.answer_codes()
        except (OverflowError, ValidationError):  # an integer beyond 64 bits; options the model refuses
            return None
        if codes.size and (codes.min() < 0 or codes.max() > MAX_ANSWER_CODE):
            return None
        return request


def _plain_vector(vector: object) -> bool:
    """A response vector that keeps the schema's rules for its keys, id, group and the answers' container."""
    if type(vector) is not dict or not vector.keys() <= _VECTOR_KEYS:
        return False
    respondent, group = vector.get("id"), vector.get("group")
    return (
        type(respondent) is str
        and 1 <= len(respondent) <= MAX_ID_LENGTH
        and (group is None or (type(group) is str and len(group) <= MAX_GROUP_LENGTH))
        and type(vector.get("answers")) is dict
    )


@with_config(ConfigDict(extra="forbid"))
class SummaryVector(TypedDict):
    """One respondent of a summary: an id, the group, an optional cohort, and the answers by item."""

    id: Annotated[str, Field(min_length=1, max_length=MAX_ID_LENGTH, description="the respondent's id")]
    group: NotRequired[
        Annotated[
            str | None,
            Field(
                max_length=MAX_GROUP_LENGTH,
                description="the group to summarise (for a bundle with groups: one of them, whose item policy "
                "scores the respondent)",
            ),
        ]
    ]
    cohort: NotRequired[
        Annotated[str, Field(min_length=1, max_length=MAX_GROUP_LENGTH, description="a second breakdown")]
    ]
    answers: Annotated[
        dict[str, Annotated[StrictInt, Field(ge=0, le=MAX_ANSWER_CODE)]],
        Field(description="item id -> category code (strict whole numbers); omit items not administered"),
    ]


class SummaryOptions(_Strict):
    """How many plausible values, their seed, and which percentiles to report."""

    plausible_values: int = Field(10, ge=1, le=100, description="draws per respondent")
    seed: int = Field(20261202, ge=0, le=2**63 - 1, description="the same seed gives the same summaries")
    percentiles: list[Annotated[float, Field(gt=0, lt=100)]] = Field(default_factory=list, max_length=20)


class SummaryRequest(_Strict):
    """Response vectors to summarise by group (and cohort) with plausible values."""

    responses: list[SummaryVector] = Field(min_length=1)
    options: SummaryOptions = Field(default_factory=SummaryOptions)
    _answer_codes: np.ndarray | None = PrivateAttr(default=None)

    def answer_codes(self) -> np.ndarray:
        """Every vector's answers, one after the other, as int64."""
        if self._answer_codes is None:
            self._answer_codes = flat_answer_codes(self.responses)
        return self._answer_codes


class ExcludedItemOut(_Strict):
    """An item left out of a respondent's score, and why."""

    item: str
    reason: str


class ScoreResult(_Strict):
    """One respondent's theta and SE, reporting-scale score and SE, items answered, exclusions and flags."""

    id: str
    group: str
    theta: float | None
    se: float | None
    scale_score: float | None
    scale_se: float | None
    items_answered: int
    excluded_items: list[ExcludedItemOut]
    flags: list[str] = Field(description="no_answers, few_items, extreme_pattern, person_misfit, theta_at_bound")
    person_fit_lz_star: float | None = Field(
        description="person fit l_z* (Snijders' correction for the estimated theta); below -1.645 flags person_misfit"
    )
    summed_score: int | None = None
    summed_score_theta: float | None = None
    summed_score_se: float | None = None


class BundleRef(_Strict):
    """The bundle version that scored the batch."""

    name: str
    version: int
    hash: str


class ScoreResponse(_Strict):
    """Every respondent's result, the bundle that scored them, and the caution that goes with scores."""

    bundle: BundleRef
    method: str
    results: list[ScoreResult]
    caution: str = CAUTION


class BundleSummary(_Strict):
    """One bundle name with its versions and aliases."""

    name: str
    versions: list[int]
    aliases: dict[str, int]


class BundleList(_Strict):
    """Every bundle in the store."""

    bundles: list[BundleSummary]


class PublishResult(_Strict):
    """The version a publication created (201) or found already holding the content (200)."""

    name: str
    version: int
    hash: str
    created: bool


class AliasRequest(_Strict):
    """The version an alias is to point at."""

    version: int = Field(ge=1, le=MAX_VERSION, description="a published version of the bundle")


class AliasResult(_Strict):
    """Where an alias points now."""

    name: str
    alias: str
    version: int


class AliasMoveOut(_Strict):
    """One move of an alias: the version, when (UTC) and by whom (the API key's name, the command line's user)."""

    version: int
    moved_at: str
    by: str


class AliasHistory(_Strict):
    """Where an alias points now and every move that led there, oldest first (the current one last)."""

    name: str
    alias: str
    version: int
    history: list[AliasMoveOut]


class Health(_Strict):
    """The process answers."""

    status: Literal["ok"]


class Readiness(_Strict):
    """Whether the service can score: store reachable, bundles held, damaged versions."""

    status: Literal["ready", "degraded", "not_ready"]
    store: str
    bundles_loaded: int
    detail: str | None = None
    damaged_versions: list[str] = Field(
        default_factory=list, description="stored versions that failed verification (name@version)"
    )


class Problem(BaseModel):
    """RFC 9457 problem document."""

    model_config = ConfigDict(extra="allow")
    type: str
    title: str
    status: int
    detail: str
    instance: str | None = None
