"""Pure numeric core: filter design, effective length, block kernel, block planning, checks.

Nothing in this package does I/O or imports prefect, zarr or dask.
"""
