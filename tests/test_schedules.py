"""Temperature schedules against their defining formulas (computed here)."""

import math

import numpy as np
import pytest

from mrfclean.schedules import Constant, Geometric, Linear, Logarithmic, make_schedule


def test_geometric_is_exponential_cooling():
    s = Geometric(4.0, 0.04)
    T = s.temperatures(11)
    assert T[0] == pytest.approx(4.0) and T[-1] == pytest.approx(0.04)
    np.testing.assert_allclose(T[1:] / T[:-1], (0.04 / 4.0) ** 0.1)  # constant ratio


def test_linear_steps_evenly():
    T = Linear(3.0, 1.0).temperatures(5)
    np.testing.assert_allclose(T, [3.0, 2.5, 2.0, 1.5, 1.0])


def test_logarithmic_follows_geman_geman_form_and_floor():
    s = Logarithmic(2.0, 0.5)
    c = 2.0 * math.log(2.0)
    for k in (0, 1, 10, 100):
        assert s.temperature(k, 200) == pytest.approx(max(c / math.log(2 + k), 0.5))
    assert s.temperature(10**9, 10) == 0.5


def test_constant_and_errors():
    assert np.all(Constant(1.0).temperatures(4) == 1.0)
    with pytest.raises(ValueError):
        Geometric(0.0, 1.0)
    with pytest.raises(ValueError):
        make_schedule("fast")
    assert make_schedule("linear", start=2, end=1).describe() == {"schedule": "linear", "start": 2, "end": 1}
