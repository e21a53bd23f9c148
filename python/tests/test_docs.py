"""The examples in the package's docstrings run and print what they say."""

import doctest

import ellipsoid


def test_docstring_examples():
    result = doctest.testmod(ellipsoid)
    assert result.attempted >= 10
    assert result.failed == 0
