"""Pure per-partition functions: one read task, bucket or work unit in, arrays or files out.

They know nothing of dask or of the run store's manifests; stages call them
through the engine.
"""
