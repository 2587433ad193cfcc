"""Request and response schemas of the scoring service (named by role, extra fields forbidden)."""

from __future__ import annotations

from typing import Annotated, Literal, NotRequired

from pydantic import BaseModel, ConfigDict, Field, StrictInt, with_config
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

    id: Annotated[str, Field(min_length=1, max_length=200, description="the respondent's id, echoed back")]
    group: NotRequired[
        Annotated[str | None, Field(max_length=200, description="required when the bundle has several groups")]
    ]
    answers: Annotated[
        dict[str, Annotated[StrictInt, Field(ge=0, le=MAX_ANSWER_CODE)]],
        Field(
            description="item id -> category code, a whole number 0 .. K-1 (strict: no strings, booleans or "
            "decimals); omit items not administered"
        ),
    ]


class ScoreRequest(_Strict):
    """A batch of response vectors and the scoring options."""

    responses: list[ResponseVector] = Field(min_length=1)
    options: ScoreOptions = Field(default_factory=ScoreOptions)


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
    flags: list[str] = Field(description="no_answers, few_items, extreme_pattern, person_misfit")
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
