"""Pure chunk kernels: numpy arrays in, numpy arrays out.

Nothing in this package does I/O, imports Prefect or Dask, or reads a config
object inside a kernel. ``errors`` and ``config`` live here because every
other room may import this one.
"""
