"""The power table's text: the compiled formatter against Python's own ``%.3f``.

Reference: Python's printf-style formatting (Python Language Reference,
"printf-style String Formatting"; ``%.3f`` rounds the exact binary value
correctly, half to even). The compiled formatter must give the same
characters for every float32, so a table written with or without the
kernels is the same file.
"""

import numpy as np
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from beamtap import powertable
from beamtap.service.engine import products

pytestmark = pytest.mark.skipif(products._kernels is None, reason="compiled kernels not installed")


def _python_text(values):
    return [",".join("%.3f" % v for v in row) for row in np.asarray(values, np.float32).tolist()]


@settings(max_examples=300, deadline=None)
@given(hnp.arrays(np.float32, hnp.array_shapes(min_dims=2, max_dims=2, max_side=40),
                  elements=st.floats(width=32, allow_nan=True, allow_infinity=True)))
@example(np.array([[0.0625, -0.0, -0.0004, 0.0005, 1.0005, -1.0005]], np.float32))  # ties and signed zeros
@example(np.array([[3.4028235e38, -3.4028235e38, 9.0e12, -9.0e12, 8.999e12, 1e-45]], np.float32))  # extremes
@example(np.array([[np.nan, -np.nan, np.inf, -np.inf]], np.float32))
@example(np.zeros((0, 3), np.float32))
def test_compiled_rows_match_python_percent_format(values):
    assert powertable.values_text(values) == _python_text(values)


def test_rows_text_lines_read_back_as_the_values():
    rng = np.random.default_rng(5)
    power = (rng.standard_normal((7, 2, 13)) * 30 - 50).astype(np.float32)
    text = powertable.rows_text(np.arange(7) * 1024, [None] * 6 + [1.8e9], power)
    lines = text.splitlines()
    assert len(lines) == 7 and text.endswith("\n")
    first = [int(line.split(",")[0]) for line in lines]
    assert first == list(range(0, 7 * 1024, 1024))
    assert lines[0].split(",")[1] == "" and lines[6].split(",")[1] == "2027-01-15T08:00:00.000000Z"
    back = np.array([[float(v) for v in line.split(",")[2:]] for line in lines]).reshape(power.shape)
    np.testing.assert_allclose(back, power, atol=0.0005 + 1e-6)  # three decimals: half a unit of 1e-3


@pytest.mark.parametrize("bad", [np.zeros(5, np.float64), "text"])
def test_formatter_refuses_a_buffer_of_the_wrong_size(bad):
    from beamtap.service.engine import _kernels
    with pytest.raises((ValueError, TypeError)):
        _kernels.fixed3(bad, 3, 4)
