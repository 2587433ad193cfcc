"""Shared parts of the bundle schema: versions, name patterns, publishable ranges, the frozen base model."""

from __future__ import annotations

import re

from pydantic import BaseModel, ConfigDict

SCHEMA_VERSION = "4"
# Schema versions this code reads. A version-1 document is verified against its stored bytes, then
# upgraded in memory (see :func:`upgrade_document`); it keeps ``schema_version`` "1" so that a reader
# knows its hash was taken over the version-1 form. Version 3 added the optional ``link`` section (left
# out of a document without one): a version-2 document is read, and written back, as it is. Version 4
# added the 3PL, GPCM and PCM item models and the asymptote fields (left out while empty): a bundle that
# uses one of those models must say version 4, so an older reader refuses it instead of misreading it.
READABLE_SCHEMA_VERSIONS = ("1", "2", "3", "4")
MODELS_SINCE_VERSION_4 = ("3pl", "gpcm", "pcm")
NAME_PATTERN = r"^[a-z0-9][a-z0-9._-]{0,63}$"
ALIAS_PATTERN = r"^[a-z][a-z0-9_-]{0,31}$"


# Sanity bounds on published parameters (equitheta's own, generous for any real bank): a slope of 20
# makes an item a step function, an intercept of 200 puts a threshold 10 SD out at that slope, and
# latent means and SDs of 10 are far outside any grid. A document beyond them is refused on publish.
MAX_ABS_SLOPE = 20.0
MAX_ABS_INTERCEPT = 200.0
MAX_ABS_LATENT_MEAN = 10.0
MAX_LATENT_SD = 10.0
MAX_QUADRATURE_POINTS = 1001
# A stated threshold must equal -intercept / slope to this relative precision.
THRESHOLD_TOLERANCE = 1e-6


class Frozen(BaseModel):
    # No NaN or infinity anywhere: JSON has neither, and 1e999 would otherwise read as infinity.
    """Base of every bundle model: unknown fields refused, immutable, no NaN or infinity."""

    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


def check_item_parameters(
    where: str, slope: float, intercepts: list[float], *, ordered: bool = True, guessing: float | None = None
) -> None:
    """Range and order checks shared by the shared parameters and group-specific ones (a partial-credit
    item's steps need no order; a 3PL asymptote lies in [0, 1))."""
    if abs(slope) > MAX_ABS_SLOPE:
        raise ValueError(f"{where}: slope {slope:g} is outside -{MAX_ABS_SLOPE:g}..{MAX_ABS_SLOPE:g}")
    for m, c in enumerate(intercepts):
        if abs(c) > MAX_ABS_INTERCEPT:
            raise ValueError(
                f"{where}: intercept {m + 1} = {c:g} is outside -{MAX_ABS_INTERCEPT:g}..{MAX_ABS_INTERCEPT:g}"
            )
    if ordered and any(later >= earlier for earlier, later in zip(intercepts, intercepts[1:], strict=False)):
        raise ValueError(f"{where}: intercepts must be strictly decreasing")
    if guessing is not None and not 0.0 <= guessing < 1.0:
        raise ValueError(f"{where}: lower asymptote {guessing:g} is outside [0, 1)")


def valid_name(name: str) -> bool:
    """Whether ``name`` is a valid bundle name."""
    return re.fullmatch(NAME_PATTERN, name) is not None


def valid_alias(alias: str) -> bool:
    """Whether ``alias`` is a valid alias name."""
    return re.fullmatch(ALIAS_PATTERN, alias) is not None
