"""Fixtures shared by the test modules."""

import weakref

import numba
import pytest


@pytest.fixture
def one_numba_thread():
    """Run the numba kernels on one thread for the duration of a test."""
    before = numba.get_num_threads()
    numba.set_num_threads(1)
    yield
    numba.set_num_threads(before)


@pytest.fixture
def states_alive():
    """``states_alive(model, **run_kw)``: run ``sampler.run(model, **run_kw)`` and return, for
    each chain, whether the earlier chains' states were still alive once it had started
    (weak references to their images; a model may drop a cached state inside ``start``)."""
    from mrfclean import sampler

    def check(model, **run_kw):
        refs, alive = [], []
        start = model.start

        def tracked(chain, seed):
            state = start(chain, seed)
            alive.append([r() is not None for r in refs])
            refs.append(weakref.ref(getattr(state, "x", state)))  # grey state or spin array
            return state

        model.start = tracked
        sampler.run(model, **run_kw)
        return alive

    return check
