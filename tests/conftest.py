"""Shared pytest configuration.

Fixtures that belong to one area live beside its tests (``tests/_<area>.py``);
this file holds only what every test needs.

The suite runs with one BLAS thread per process, as ``stabtool analyze`` and
``batch`` do: the matrices are small, and with two test workers on two cores
threaded BLAS makes them wait on each other (a Cholesky of 400 columns took
50 ms instead of 1.2 ms). A thread count set by the user wins.
"""

from stabtool.cli.main import _single_threaded_blas

_single_threaded_blas()

import matplotlib

matplotlib.use("Agg")
