"""The calibration report for reviewers and evaluators: the evidence per cell, the plots, the HTML page."""
