"""sceneprior: Bayesian clutter and birth intensities for multi-object trackers."""

__version__ = "0.1.0"
