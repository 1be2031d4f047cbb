"""Compiled draws through a Generator's published C functions equal NumPy's own, bit for bit.

The reference is NumPy itself (``Generator.random``, ``Generator.standard_normal``,
``Generator.permutation``): the same seed must give the same numbers and leave the bit
generator in the same state, including PCG64's buffered half-word that ``next_uint32`` keeps.
"""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("numba")

from propensim.plugins import numba_bits  # noqa: E402


def _pair(seed):
    return np.random.default_rng(seed), np.random.default_rng(seed)


@pytest.mark.parametrize("seed", [0, 7, 2026])
def test_uniforms_equal_generator_random(seed):
    ours, ref = _pair(seed)
    out = np.empty(5000)
    numba_bits.fill_uniform(numba_bits.bits_of(ours), out)
    np.testing.assert_array_equal(out, ref.random(5000))  # reference: numpy Generator.random
    assert ours.bit_generator.state == ref.bit_generator.state


@pytest.mark.parametrize("seed", [0, 7, 2026])
def test_normals_equal_generator_standard_normal(seed):
    # 2e5 draws reach the ziggurat's rare branches (wedges about 1%, the tail about 0.03%).
    ours, ref = _pair(seed)
    out = np.empty(200_000)
    numba_bits.fill_standard_normal(numba_bits.bits_of(ours), out)
    np.testing.assert_array_equal(out, ref.standard_normal(200_000))  # numpy's ziggurat
    assert ours.bit_generator.state == ref.bit_generator.state


@pytest.mark.parametrize("k", [0, 1, 2, 3, 17, 1000, 70_000])
def test_permutation_equals_generator_permutation(k):
    ours, ref = _pair(k + 11)
    ref.random()  # leave PCG64 in the middle of a 64-bit word half of the time
    ours.random()
    got = numba_bits.permutation(numba_bits.bits_of(ours), k)
    np.testing.assert_array_equal(got, ref.permutation(k))  # numpy Generator.permutation
    assert ours.bit_generator.state == ref.bit_generator.state


def test_interleaved_draws_keep_the_generator_in_step():
    ours, ref = _pair(99)
    bits = numba_bits.bits_of(ours)
    for k in (5, 1, 40):
        got_p = numba_bits.permutation(bits, k)
        got_u = np.empty(k)
        numba_bits.fill_uniform(bits, got_u)
        got_z = np.empty(k)
        numba_bits.fill_standard_normal(bits, got_z)
        np.testing.assert_array_equal(got_p, ref.permutation(k))
        np.testing.assert_array_equal(got_u, ref.random(k))
        np.testing.assert_array_equal(got_z, ref.standard_normal(k))
    # and numpy draws after ours continue the same stream
    assert ours.integers(0, 1 << 40) == ref.integers(0, 1 << 40)


def test_bits_are_cached_and_follow_the_generator():
    g = np.random.default_rng(1)
    assert numba_bits.bits_of(g) is numba_bits.bits_of(g)
    other = np.random.default_rng(1)
    assert numba_bits.bits_of(other)[numba_bits.STATE] != numba_bits.bits_of(g)[numba_bits.STATE]


def test_other_bit_generators_draw_their_own_stream():
    # Philox and MT19937 publish the same ctypes interface: the draws follow each one.
    for cls in (np.random.Philox, np.random.MT19937):
        ours, ref = np.random.Generator(cls(5)), np.random.Generator(cls(5))
        out = np.empty(1000)
        numba_bits.fill_standard_normal(numba_bits.bits_of(ours), out)
        np.testing.assert_array_equal(out, ref.standard_normal(1000))
        np.testing.assert_array_equal(
            numba_bits.permutation(numba_bits.bits_of(ours), 9), ref.permutation(9)
        )
