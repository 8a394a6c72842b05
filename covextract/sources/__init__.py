"""Layer sources: how a recipe's layer spec becomes what the engine reads.

- :mod:`covextract.sources.registry`: :func:`~covextract.sources.registry.open_source`
  and the list of kinds;
- :mod:`covextract.sources.base`: the ``SourceKind`` protocol and the opened
  ``LayerSource`` (input files, description);
- one module per kind: :mod:`~covextract.sources.raster` (one raster file),
  :mod:`~covextract.sources.bandmath` (band math, with
  :mod:`~covextract.sources.expression`), :mod:`~covextract.sources.template`
  (a series of files from a path template), :mod:`~covextract.sources.cube`
  (a NetCDF cube);
- sources built from other sources: :mod:`~covextract.sources.weighted`
  (``weight_by``) and :mod:`~covextract.sources.derived` (collapsed periods,
  change between periods).
"""
