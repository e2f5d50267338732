"""Every path and file format: SEG-Y, the zarr survey store, checkpoints,
run log and lock. No other package builds a path or opens a file."""
