"""A numpy ``Generator``'s bit stream, read from compiled code without handing over the Generator.

Handing a ``numpy.random.Generator`` to a numba function costs about 10 microseconds a call
(numba unboxes its ctypes interface every time), which is a whole small market's round. The
Generator's bit generator publishes, through ``bit_generator.ctypes``, the address of its state
and of its C functions ``next_uint64``, ``next_uint32`` and ``next_double``. :func:`bits_of`
packs those four addresses into one small integer array (a cheap argument), and the jitted
functions here call the bit generator's own C functions through them. So a compiled loop draws
exactly the numbers the Generator itself would, from the same state, and leaves it in the same
state: ``uniform`` is ``Generator.random``, ``standard_normal`` is NumPy's ziggurat (the
algorithm and tables numba compiles for ``Generator.standard_normal``), ``interval`` and
``shuffle`` are the bounded integers and Fisher-Yates shuffle behind ``Generator.permutation``.
tests/plugins/test_numba_bits.py checks each against the Generator, bit for bit.

The Generator must outlive the call: :func:`bits_of` keeps the last few it served alive.

The draws are inlined (``inline="always"``) into the loops that call them: a call that hands a
jitted function an array pays a reference count on it, which doubled the cost of a normal draw
(1e3 draws: 11 microseconds called, 4-6 inlined, on this project's 2-core machine).
"""

from __future__ import annotations

import ctypes

import numba
import numpy as np
from llvmlite import ir
from numba.core import types
from numba.core.extending import intrinsic
from numba.np.random._constants import (  # NumPy's ziggurat tables, as numba copies them
    fi_double,
    ki_double,
    wi_double,
    ziggurat_nor_inv_r,
    ziggurat_nor_r,
)

#: Positions in a bits array: the state's address, then the three C functions' addresses.
STATE, NEXT_UINT64, NEXT_UINT32, NEXT_DOUBLE = 0, 1, 2, 3

_served: dict[int, tuple[object, np.ndarray]] = {}
_KEEP = 64  # Generators kept alive (and their arrays cached), oldest dropped first


def bits_of(rng: np.random.Generator) -> np.ndarray:
    """The addresses compiled code needs to draw from ``rng`` (int64, shape (4,)).

    Cached per Generator; the cache holds the Generator, so an address stays valid while it is
    cached and an ``id`` cannot be reused by another object meanwhile.
    """
    key = id(rng)
    entry = _served.get(key)
    if entry is not None and entry[0] is rng:
        return entry[1]
    iface = rng.bit_generator.ctypes
    addr = [
        iface.state_address,
        ctypes.cast(iface.next_uint64, ctypes.c_void_p).value,
        ctypes.cast(iface.next_uint32, ctypes.c_void_p).value,
        ctypes.cast(iface.next_double, ctypes.c_void_p).value,
    ]
    bits = np.array(addr, dtype=np.uint64).view(np.int64)
    if len(_served) >= _KEEP:
        _served.pop(next(iter(_served)))
    _served[key] = (rng, bits)
    return bits


def _caller(return_type):
    """An intrinsic ``f(fn, state) -> return_type`` calling the C function at address ``fn``."""

    @intrinsic
    def call(typingctx, fn, state):
        sig = return_type(types.int64, types.int64)

        def codegen(context, builder, signature, args):
            ll_ret = context.get_value_type(return_type)
            ll_ptr = context.get_value_type(types.uintp)
            fnty = ir.FunctionType(ll_ret, (ll_ptr,))
            fptr = builder.inttoptr(args[0], fnty.as_pointer())
            return builder.call(fptr, (args[1],))

        return sig, codegen

    return call


_call_u64 = _caller(types.uint64)
_call_u32 = _caller(types.uint32)
_call_double = _caller(types.double)


@numba.njit(cache=True, nogil=True, inline="always")
def next_uint64(bits):
    """The bit generator's next 64 random bits."""
    return _call_u64(bits[NEXT_UINT64], bits[STATE])


@numba.njit(cache=True, nogil=True, inline="always")
def next_uint32(bits):
    """The bit generator's next 32 random bits (it may keep half of a 64-bit draw for later)."""
    return _call_u32(bits[NEXT_UINT32], bits[STATE])


@numba.njit(cache=True, nogil=True, inline="always")
def uniform(bits):
    """One draw of ``Generator.random()``: a double on [0, 1)."""
    return _call_double(bits[NEXT_DOUBLE], bits[STATE])


@numba.njit(cache=True, nogil=True, inline="always")
def standard_normal(bits):
    """One draw of ``Generator.standard_normal()`` (NumPy's 256-layer ziggurat).

    Marsaglia and Tsang, J. Stat. Softw. 5(8) (2000), as NumPy implements it
    (``random_standard_normal`` in numpy/random/src/distributions/distributions.c).
    """
    while True:
        r = next_uint64(bits)
        idx = r & 0xFF
        r >>= 8
        sign = r & 0x1
        rabs = (r >> 1) & 0x000FFFFFFFFFFFFF
        x = rabs * wi_double[idx]
        if sign & 0x1:
            x = -x
        if rabs < ki_double[idx]:
            return x  # about 99% of draws end here
        if idx == 0:
            while True:
                xx = -ziggurat_nor_inv_r * np.log1p(-uniform(bits))
                yy = -np.log1p(-uniform(bits))
                if yy + yy > xx * xx:
                    if (rabs >> 8) & 0x1:
                        return -(ziggurat_nor_r + xx)
                    return ziggurat_nor_r + xx
        elif (fi_double[idx - 1] - fi_double[idx]) * uniform(bits) + fi_double[idx] < np.exp(
            -0.5 * x * x
        ):
            return x


@numba.njit(cache=True, nogil=True, inline="always")
def interval(bits, max_val):
    """A uniform integer on ``[0, max_val]`` by masked rejection (NumPy's ``random_interval``)."""
    if max_val == 0:
        return 0
    top = np.uint64(max_val)
    mask = top
    mask |= mask >> np.uint64(1)
    mask |= mask >> np.uint64(2)
    mask |= mask >> np.uint64(4)
    mask |= mask >> np.uint64(8)
    mask |= mask >> np.uint64(16)
    mask |= mask >> np.uint64(32)
    if top <= np.uint64(0xFFFFFFFF):
        value = np.uint64(next_uint32(bits)) & mask
        while value > top:
            value = np.uint64(next_uint32(bits)) & mask
    else:
        value = next_uint64(bits) & mask
        while value > top:
            value = next_uint64(bits) & mask
    return np.int64(value)


@numba.njit(cache=True, nogil=True)
def shuffle(bits, x):
    """Shuffle 1-d ``x`` in place as ``Generator.shuffle`` does (Fisher-Yates, from the end)."""
    for i in range(x.shape[0] - 1, 0, -1):
        j = interval(bits, i)
        if i == j:
            continue
        t = x[j]
        x[j] = x[i]
        x[i] = t


@numba.njit(cache=True, nogil=True)
def permutation(bits, k):
    """``Generator.permutation(k)``: a random ordering of ``0 .. k-1``."""
    out = np.arange(k)
    shuffle(bits, out)
    return out


@numba.njit(cache=True, nogil=True)
def fill_uniform(bits, out):
    """``Generator.random(out=out)``: fill ``out`` with uniforms on [0, 1), in order."""
    for i in range(out.shape[0]):
        out[i] = uniform(bits)


@numba.njit(cache=True, nogil=True)
def fill_standard_normal(bits, out):
    """``Generator.standard_normal(out=out)``: fill ``out`` with standard normals, in order."""
    for i in range(out.shape[0]):
        out[i] = standard_normal(bits)
