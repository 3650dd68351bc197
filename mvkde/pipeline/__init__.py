"""The pipeline layer: from a workflow and its inputs to a labelled, provenance-stamped output.

The stages, in the order a run goes through them (see :mod:`mvkde.pipeline.run`):
``workflow`` (TOML schema, defaults, validation), ``inputs`` (open, select,
tile into blocks; the shared grid), ``blocks`` (one task per block: ONE call
of :func:`mvkde.cells.fit_cells`), ``schedule`` (dask, progress), ``resume``
(the block store), ``output`` (labelled Dataset, atomic write),
``products`` (the workflow's [products] on the gridded densities) and
``provenance``.  ``readers`` holds the input file formats.
"""
