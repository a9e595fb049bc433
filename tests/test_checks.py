"""The shared validators (likelihood.checks): accepted values come back converted, rejected ones
raise one line in the ``NAME = VALUE: expected ...`` style."""
import numpy as np
import pytest

from likelihood.checks import finite_number, increasing_array, multipole_list, positive_number
from likelihood.errors import ConfigError, ErgofitError


def test_accepted_values():
    assert finite_number("2.5", "x") == 2.5
    assert positive_number(3, "r") == 3.0 and positive_number(None, "r", allow_none=True) is None
    np.testing.assert_array_equal(increasing_array([0.0, 0.1, 0.2], "edges"), [0.0, 0.1, 0.2])
    assert multipole_list([0, 2, 4.0], "ells", max_ell=10) == (0, 2, 4)


@pytest.mark.parametrize("call, needle", [
    (lambda: finite_number("abc", "x"), "x = 'abc': expected a number"),
    (lambda: finite_number(np.inf, "x"), "x = inf: expected a finite number"),
    (lambda: positive_number(-1.0, "radius"), "radius = -1.0: expected a positive number"),
    (lambda: increasing_array([0.1, 0.05], "edges"), "strictly increasing"),
    (lambda: increasing_array([-0.1, 0.05], "edges", non_negative=True), "non-negative"),
    (lambda: multipole_list([0, 0], "ells"), "distinct integers"),
    (lambda: multipole_list([0, 12], "ells", max_ell=10), "between 0 and 10"),
    (lambda: multipole_list([0.5], "ells"), "distinct integers"),
])
def test_rejected_values(call, needle):
    with pytest.raises(ErgofitError, match=needle) as exc:
        call()
    assert "\n" not in str(exc.value)


def test_error_class_chosen_by_caller():
    with pytest.raises(ConfigError):
        finite_number(None, "observer smoothing", ConfigError)


def test_finite_number_refuses_ints_beyond_the_float_range():
    """A YAML integer like 2**80 cannot become a float: one clear error, not an OverflowError."""
    with pytest.raises(ErgofitError, match="expected a finite number"):
        finite_number(2 ** 1100, "sampling.seed")
