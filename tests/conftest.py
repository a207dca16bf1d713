"""Fixtures shared by the test modules."""

import numba
import pytest


@pytest.fixture
def one_numba_thread():
    """Run the numba kernels on one thread for the duration of a test."""
    before = numba.get_num_threads()
    numba.set_num_threads(1)
    yield
    numba.set_num_threads(before)
