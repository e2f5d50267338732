"""Wiring: stages mapped over chunks on Dask, the command line."""
