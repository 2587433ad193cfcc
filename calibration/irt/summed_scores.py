"""Summed scores: their likelihood by the Lord-Wingersky recursion and the summed-score to theta table."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from calibration.irt.likelihood import QuadratureGrid, normal_weights
from calibration.irt.models import FloatArray, IntArray, ItemParameters, category_probabilities
from calibration.irt.scoring import NormalPrior


def summed_score_likelihoods(params: ItemParameters, points: FloatArray) -> FloatArray:
    """``P(summed score = s | theta_q)`` by the Lord & Wingersky (1984) recursion.

    Returns an array of shape (max_score + 1, n_points), max_score = sum_j (K_j - 1).
    """
    prob = category_probabilities(params, points)
    max_score = int(np.sum(params.n_categories - 1))
    dist = np.zeros((max_score + 1, points.shape[0]))
    dist[0] = 1.0
    top = 0
    for j in range(params.n_items):
        k_j = int(params.n_categories[j])
        new = np.zeros_like(dist)
        for k in range(k_j):
            new[k : top + k + 1] += dist[: top + 1] * prob[j, k][None, :]
        dist = new
        top += k_j - 1
    return dist


@dataclass(frozen=True)
class SummedScoreTable:
    """Summed-score to theta conversion (Thissen, Pommerich, Billeaud & Williams 1995)."""

    summed_score: IntArray
    theta: FloatArray
    se: FloatArray
    probability: FloatArray


def summed_score_table(
    params: ItemParameters, *, grid: QuadratureGrid | None = None, prior: NormalPrior | None = None
) -> SummedScoreTable:
    """EAP[theta | summed score] and posterior SD for every summed score, with its model probability."""
    grid = grid or QuadratureGrid()
    prior = prior or NormalPrior()
    points = grid.points
    weights = normal_weights(points, prior.mean, prior.sd)
    joint = summed_score_likelihoods(params, points) * weights[None, :]
    marginal = joint.sum(axis=1)
    post = joint / np.where(marginal > 0, marginal, 1.0)[:, None]
    mean = post @ points
    var = np.maximum(post @ (points * points) - mean * mean, 0.0)
    return SummedScoreTable(
        summed_score=np.arange(joint.shape[0], dtype=np.int64),
        theta=mean,
        se=np.sqrt(var),
        probability=marginal,
    )
