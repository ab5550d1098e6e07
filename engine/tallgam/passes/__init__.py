"""Data passes: the only code that touches every row.

A batch is encoded into sparse design rows (:mod:`.design`) or into codes of tables of
distinct rows (:mod:`.binned`); numba kernels (:mod:`.kernels`) add it to a partial state
(:mod:`.state`) that merges by addition. :mod:`.run` runs one pass in this process,
:mod:`.cluster` the same pass as partition tasks on a Dask cluster."""
