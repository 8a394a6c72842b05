"""The version of covextract (recorded in manifests, fingerprints and codebooks)."""

__version__ = "0.1.0"
