"""Pure numba kernels on numpy arrays.

Nothing in this package imports dask, pyarrow or pandas. Every kernel takes and
returns plain numpy arrays (CSR ``indptr``/``indices``/``data`` for graphs) and is
compiled with ``nogil=True`` so dask threads can run several at once, and
``cache=True`` so a process pays the compile cost once per machine.

Each fast kernel has a slow, obviously correct reference twin (pure Python,
networkx or scipy) next to it, named ``*_reference``; tests compare the two.
"""

from cliquewise import _numba_setup  # noqa: F401  (sets NUMBA_CACHE_DIR first)
