"""The model math and scoring: the only copy of both (numpy and scipy only)."""
