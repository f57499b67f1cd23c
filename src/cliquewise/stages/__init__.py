"""Stages: orchestration over dask, each reading from and writing to the run store.

Each module exposes ``NAME``, ``UPSTREAM`` (the stages it reads), ``params_from``
(settings -> the parameters hashed into its key) and ``run(ctx, ...)``. No stage
imports another; they meet through the files upstream manifests list.
"""
