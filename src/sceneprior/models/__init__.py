"""Intensity models: plain numpyro functions of the binned statistics (or of the points).

Each model module exposes its numpyro function; ``registry.py`` binds a model kind named in a
fit specification to that function, its priors and its per-cell intensity.
"""
