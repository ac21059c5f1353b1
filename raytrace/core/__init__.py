"""What every stage shares, below all of them.

In: nothing of raytrace. Out: the error types and argument checks (``errors``),
safe writing of outputs with provenance (``provenance``), which run owns a file
(``companions``), the HDF5 result-file format (``resultfiles``) and the
matplotlib plumbing of figures (``figures``).
"""
