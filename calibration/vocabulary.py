"""The project's vocabulary: every closed set of words, as a ``Literal`` type and the tuple derived from it.

The bundle schema, the service's request models, the command line and the library validate
against these, so a word is added or renamed in one place.
"""

from __future__ import annotations

from typing import Literal, get_args

ItemModel = Literal["2pl", "1pl", "grm", "3pl", "gpcm", "pcm"]
"""2PL (right/wrong), 1PL (right/wrong, one slope shared by every 1PL and PCM item), graded response,
3PL (right/wrong with a lower asymptote), generalized partial credit, partial credit (GPCM with the
shared Rasch-family slope)."""
ScoringMethod = Literal["eap", "map", "ml"]
"""Expected a posteriori, maximum a posteriori, maximum likelihood."""
PolicyStatus = Literal["invariant", "group_specific", "excluded"]
"""An item's policy in a group: shared parameters, its own parameters, or left out of the score."""
DifAction = Literal["exclude", "free"]
"""What a DIF flag does by default: leave the item out for the group, or give it group-specific parameters."""
EffectLevel = Literal["negligible", "moderate", "large", "uncertain"]
"""Band of a theta-scale DIF effect; ``uncertain`` when its 95% interval spans a band boundary."""
DifStage = Literal["screening", "test"]
"""Screening (every other item as anchors) or the test against the chosen anchor set."""
ObservedMethod = Literal["mantel-haenszel", "mantel"]
"""Observed-score DIF method: MH for right/wrong items, Mantel for graded ones."""
InvarianceModel = Literal["configural", "metric", "scalar", "partial"]
"""Rungs of the invariance ladder."""
Scope = Literal["score", "read", "publish"]
"""What an API key may do."""
LinkMethod = Literal["fixed-parameter", "stocking-lord", "haebara"]
"""How a new calibration is put on an earlier one's scale: its link items held at the earlier values, or
linking constants that match the link items' test (Stocking-Lord) or item (Haebara) characteristic curves."""

ITEM_MODELS: tuple[str, ...] = get_args(ItemModel)
SCORING_METHODS: tuple[str, ...] = get_args(ScoringMethod)
POLICY_STATUSES: tuple[str, ...] = get_args(PolicyStatus)
DIF_ACTIONS: tuple[str, ...] = get_args(DifAction)
EFFECT_LEVELS: tuple[str, ...] = get_args(EffectLevel)
SCOPES: tuple[str, ...] = get_args(Scope)
LINK_METHODS: tuple[str, ...] = get_args(LinkMethod)
