"""DIF: observed-score screening, logistic regression, anchored IRT LR tests, anchors, FDR, effect sizes."""
