"""Overnight batch runs: chunking, executors (local pool, Dask), journal and resume."""
