"""equitheta calibration: IRT models, estimation, DIF, quality checks and calibration bundles."""

__version__ = "0.1.0"
