"""covextract: environmental covariates from rasters, at the resolution of a health study."""

__version__ = "0.1.0"
