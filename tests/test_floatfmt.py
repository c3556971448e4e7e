"""Float text for traces: every string is exactly Python's repr (CPython's shortest
round-trip conversion is the reference), from the numpy code and from the compiled one."""
import os

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from sim.traces import floatfmt
from sim.traces.floatfmt import format_block, format_block_numpy, reprs

FORMATTERS = [format_block_numpy] + ([format_block] if floatfmt._csvtext is not None else [])


def expected(block) -> bytes:
    """The reference: repr of each value, NaN blank, CRLF rows."""
    return b"".join(b",".join(b"" if v != v else repr(v).encode() for v in row) + b"\r\n"
                    for row in np.asarray(block).tolist())


def hard_values():
    """Values near every difficulty: powers of two (lopsided gaps), exact halfway
    cases, decade edges, extremes, subnormals, and random bit patterns."""
    rng = np.random.default_rng(0)
    edges = [0.0, -0.0, 1.0, 0.1, 0.3, 0.1 + 0.2, 1e16, 1e15, 9007199254740993.0, 1e-4, 1e-5,
             1.5e-5, 1e100, 5e-324, 2.2250738585072014e-308, 1.7976931348623157e308, np.inf, -np.inf,
             1 / 3, 100.0, 1e22, 1e23, 12.25, -7.5e-5, 1e300, 1e-280, 1e280, 71446825950599.625,
             5e-5, 9.999999999999999e15, 0.9999999999999999]
    halves = (rng.integers(1, 2 ** 40, size=4000) + 0.5) * 2.0 ** rng.integers(-8, 30, size=4000)
    return np.concatenate([
        edges, 2.0 ** np.arange(-1074, 1024), -(2.0 ** np.arange(-60, 80)), halves,
        np.nextafter(10.0 ** np.arange(-300, 300), np.inf), np.nextafter(10.0 ** np.arange(-300, 300), 0),
        rng.normal(size=20000), 10 ** rng.uniform(-12, 20, size=20000),
        np.frombuffer(rng.bytes(8 * 20000), dtype=np.float64), np.arange(20000) * 0.001])


@pytest.mark.parametrize("fmt", FORMATTERS, ids=lambda f: f.__name__)
def test_identical_to_repr_on_hard_values(fmt):
    vals = hard_values()
    vals = vals[~np.isnan(vals)].reshape(-1, 1)
    assert fmt(vals) == expected(vals)


def test_reprs_match_repr():
    vals = hard_values()[:30000]
    assert reprs(vals) == ["" if v != v else repr(v) for v in vals.tolist()]


@pytest.mark.parametrize("fmt", FORMATTERS, ids=lambda f: f.__name__)
def test_nan_is_blank_and_block_layout(fmt):
    assert fmt(np.array([[0.0, np.nan, 1.5], [-2.0, 3e-7, np.nan]])) == b"0.0,,1.5\r\n-2.0,3e-07,\r\n"
    # a run of equal values is formatted once, but -0.0 after 0.0 is a new value
    assert fmt(np.array([[0.0], [-0.0], [-0.0], [np.nan], [np.nan], [2.5]])) == b"0.0\r\n-0.0\r\n-0.0\r\n\r\n\r\n2.5\r\n"
    assert fmt(np.zeros((0, 3))) == b""


def test_blocks_with_runs_match_between_formatters():
    rng = np.random.default_rng(5)
    block = np.column_stack([np.round(rng.normal(size=3000), d) for d in rng.integers(0, 17, size=9)])
    block[rng.random(size=block.shape) < 0.6] = np.nan
    block = np.repeat(block, rng.integers(1, 4, size=3000), axis=0)  # runs of repeated rows
    want = expected(block)
    for fmt in FORMATTERS:
        assert fmt(block) == want
        assert fmt(np.asfortranarray(block)) == want  # any memory layout


@settings(max_examples=300, deadline=None)
@given(st.lists(st.floats(), min_size=1, max_size=40))
def test_any_float_is_written_as_repr(xs):
    block = np.array(xs, dtype=float).reshape(-1, 1)
    for fmt in FORMATTERS:
        assert fmt(block) == expected(block)


@settings(max_examples=300, deadline=None)
@given(st.lists(st.integers(0, 2 ** 64 - 1), min_size=1, max_size=40))
def test_any_bit_pattern_is_written_as_repr(words):
    block = np.array(words, dtype=np.uint64).view(np.float64).reshape(-1, 1)
    for fmt in FORMATTERS:
        assert fmt(block) == expected(block)


def test_compiled_formatter_is_built_where_ci_asks_for_it():
    """CI (.ci/run) sets TRUNDLE_REQUIRE_COMPILED=1: there the C writer must have been built."""
    if floatfmt._csvtext is None and not os.environ.get("TRUNDLE_REQUIRE_COMPILED"):
        pytest.skip("sim/_csvtext.c was not compiled here: traces are written by the numpy formatter")
    assert floatfmt._csvtext is not None, "pip install -e . compiles sim/_csvtext.c (needs a C compiler)"
