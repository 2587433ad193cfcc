"""Relations of the scores to other measures, by group: convergent and discriminant evidence.

For each group and external measure: the Pearson correlation of the respondents' EAP theta with the
measure over the rows that have both, its 95% interval by Fisher's z (``atanh r +- 1.96 / sqrt(n - 3)``),
and, where the measure's reliability is given, the correlation corrected for the unreliability of both
(Spearman's ``r / sqrt(rel_theta rel_measure)``, with the group's marginal reliability of theta from the
bundle: for EAP scores ``var(EAP) = rel var(theta)`` while the covariance with a measure that depends on
theta is not shrunk, so the correction applies as for observed scores). With two or more groups, the
test that a measure's correlation is the same in every group: ``Q = sum (n_g - 3)(z_g - z_bar)^2`` on
G - 1 df, z_bar weighted by n_g - 3. A stated expectation (positive, negative, or none: |rho| < 0.3) is
met when the whole interval agrees, contradicted when the whole interval disagrees, and otherwise the
evidence is inconclusive.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from pydantic import Field
from scipy import stats

from calibration.bundle.schema import Frozen
from calibration.bundle.scorer import BundleScorer
from calibration.irt.models import FloatArray

NONE_BAND = 0.3
"""An expectation of "none" (discriminant evidence) holds when the whole interval lies within +-0.3."""
EXPECTATIONS = ("positive", "negative", "none")

RELATIONS_CAUTION = (
    "Correlations are evidence about the scores' meaning for groups, not about individuals. A corrected "
    "correlation estimates the relation of the true scores and can exceed what any observed score shows; "
    "read it with its uncorrected value. Evidence for validity comes from many sources: weigh these "
    "figures with the content, the response processes and the consequences of use."
)


class RelationRow(Frozen):
    """One group's correlation of theta with one measure."""

    group: str
    measure: str
    n: int
    r: float | None
    ci_low: float | None
    ci_high: float | None
    reliability_theta: float | None = Field(description="the group's marginal reliability in the bundle")
    reliability_measure: float | None = Field(description="as given by the user")
    r_corrected: float | None = Field(description="r / sqrt(reliability_theta * reliability_measure)")
    expected: str | None = None
    evidence: str | None = Field(None, description="agrees, contradicts or inconclusive (with an expectation)")


class Homogeneity(Frozen):
    """The test that a measure's correlation with theta is the same in every group."""

    measure: str
    q: float
    df: int
    p_value: float


class Relations(Frozen):
    """Every group's correlations, the equality tests, the method and the caution."""

    bundle: str
    rows: list[RelationRow]
    homogeneity: list[Homogeneity]
    method: str
    caution: str = RELATIONS_CAUTION


def fisher_interval(r: float, n: int, *, level: float = 0.95) -> tuple[float, float]:
    """The interval of a correlation by Fisher's z; NaN with fewer than 4 pairs or |r| = 1."""
    if n < 4 or not np.isfinite(r) or abs(r) >= 1.0:
        return float("nan"), float("nan")
    half = stats.norm.ppf(0.5 + level / 2.0) / np.sqrt(n - 3)
    z = np.arctanh(r)
    return float(np.tanh(z - half)), float(np.tanh(z + half))


def _evidence(expected: str | None, low: float, high: float) -> str | None:
    if expected is None:
        return None
    if not (np.isfinite(low) and np.isfinite(high)):
        return "inconclusive"
    if expected == "positive":
        return "agrees" if low > 0 else ("contradicts" if high < 0 else "inconclusive")
    if expected == "negative":
        return "agrees" if high < 0 else ("contradicts" if low > 0 else "inconclusive")
    if -NONE_BAND < low and high < NONE_BAND:
        return "agrees"
    return "contradicts" if low >= NONE_BAND or high <= -NONE_BAND else "inconclusive"


def _none(value: float) -> float | None:
    return float(value) if np.isfinite(value) else None


def relate_measures(  # noqa: PLR0913 - the scorer, the data and keyword-only options
    scorer: BundleScorer,
    responses: FloatArray,
    groups: Sequence[str],
    *,
    scored_as: Sequence[str],
    measures: dict[str, FloatArray],
    reliabilities: dict[str, float] | None = None,
    expectations: dict[str, str] | None = None,
) -> Relations:
    """Correlate each respondent's EAP theta (scored under ``scored_as``'s item policy) with each measure, by
    reporting group (``groups``) and over everyone."""
    reliabilities, expectations = reliabilities or {}, expectations or {}
    theta = scorer.score(responses, tuple(scored_as), method="eap").theta
    labels = np.asarray(groups, dtype=object)
    names = sorted(set(groups))
    quality = scorer.bundle.quality.by_group
    rows, homogeneity = [], []
    for measure, values in measures.items():
        z_terms = []
        for group in [*names, *(["all"] if len(names) > 1 else [])]:
            members = np.ones(len(labels), dtype=bool) if group == "all" else labels == group
            ok = members & np.isfinite(values) & np.isfinite(theta)
            n = int(ok.sum())
            r = float(np.corrcoef(theta[ok], values[ok])[0, 1]) if n > 2 else float("nan")
            low, high = fisher_interval(r, n)
            bundle_group = scored_as[int(np.flatnonzero(members)[0])] if members.any() else None
            rel_theta = None
            if bundle_group is not None and (group != "all" or len(quality) == 1):
                rel_theta = quality[bundle_group].marginal_reliability
            rel_measure = reliabilities.get(measure)
            corrected = float("nan")
            if rel_theta and rel_measure and np.isfinite(r):
                corrected = r / np.sqrt(rel_theta * rel_measure)
            expected = expectations.get(measure)
            rows.append(
                RelationRow(
                    group=group,
                    measure=measure,
                    n=n,
                    r=_none(r),
                    ci_low=_none(low),
                    ci_high=_none(high),
                    reliability_theta=rel_theta,
                    reliability_measure=rel_measure,
                    r_corrected=_none(corrected),
                    expected=expected,
                    evidence=_evidence(expected, low, high),
                )
            )
            if group != "all" and n > 3 and np.isfinite(r) and abs(r) < 1:
                z_terms.append((n - 3, float(np.arctanh(r))))
        if len(z_terms) > 1:
            weights = np.array([w for w, _ in z_terms], dtype=np.float64)
            z = np.array([v for _, v in z_terms])
            q = float(np.sum(weights * (z - np.sum(weights * z) / weights.sum()) ** 2))
            df = len(z_terms) - 1
            homogeneity.append(Homogeneity(measure=measure, q=q, df=df, p_value=float(stats.chi2.sf(q, df))))
    method = (
        "Pearson correlations of EAP theta (each respondent scored on the items of their group's policy) with "
        "each measure over the rows that have both; 95% intervals by Fisher's z; corrected correlations "
        "r / sqrt(marginal reliability of theta x reliability of the measure) where the measure's reliability is "
        "given; equal correlations across groups by Q = sum (n - 3)(z - z_bar)^2 on G - 1 df"
    )
    return Relations(bundle=scorer.bundle.label, rows=rows, homogeneity=homogeneity, method=method)
