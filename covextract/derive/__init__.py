"""Derived layers and covariates: band-math indices."""
