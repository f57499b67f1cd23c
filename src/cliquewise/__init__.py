"""cliquewise: overlapping weighted groups in large interaction networks.

The package is layered; imports only point down:

    cli -> analysis -> api -> pipeline -> stages -> kernels, store, engine

``kernels`` are numba functions on arrays, ``stages`` read and write the run
store through dask, ``api`` and ``cli`` are thin front ends.
"""

from cliquewise import _numba_setup  # noqa: F401

__version__ = "0.1.0"

from cliquewise.api import Run, decompose, open_run  # noqa: E402

__all__ = ["__version__", "Run", "decompose", "open_run"]
