"""Rays through the boxes: plans, tracers, batches, backends and clusters.

In: a box series, a mass grid and a run's options. Out: per-row arrays (ray or
HEALPix pixel): the kernel from the boxes, crossing counts, near-tangent events
and dispersion measures, plus the homogeneous background's part. Modules:
``checks`` (the run checks the later stages share), ``rays`` (the ray plan and
copy transforms), ``sightlines`` and ``lattice`` (random sightlines and the sky's
light cone, driving the numba kernels of :mod:`raytrace.kernels`), ``splits`` (a
sky pixel's rays in two independent splits), ``batches`` (rows in batches into a
backend), ``backends`` (the result file, written batch by batch, on disk or in
memory), ``cluster`` (batches on dask.distributed), ``devices`` and ``gputrace``
(the GPU path), ``progress`` and ``sizing`` (a run's rate measured on its own rows).
"""
