"""The compiled backend: the whole time loop in one numba kernel.

The kernel does exactly what :mod:`cabletree.solver.reference` does (the
reference defines the semantics; tests hold the two to 1e-9 relative), but in
compiled loops over compartments:

- every channel block's gates are advanced by Rush-Larsen integration and its
  conductance is added to the diagonal (a rate loop and an update loop per gate,
  then one conductance loop; no per-compartment Python work);
- synapse states, the NMDA magnesium block, current injections;
- the tree system is solved by Gaussian elimination from the leaves to the
  root and back-substitution in depth order (Hines 1984, Int J Biomed Comput
  15:69-76): with compartments numbered by depth, ``parent[i] < i`` and a single
  backward sweep followed by a forward sweep is exact; a cell without channels
  or synapses has the same matrix at every step of a given size, so it is
  factored once and each step eliminates only the right-hand side;
- the potential at the requested sites is written into a preallocated array and
  a NaN or runaway potential stops the loop, reported with its time and
  compartment.

How channels get compiled
-------------------------
Channels are plain Python objects whose rate functions are numpy arithmetic
(:mod:`cabletree.channels.base`).  For a cell's channel set this module writes
the source of one kernel module: one gate-update function per channel (calling
the channel's rate functions on scalars, with ``p`` built per compartment as the
channel's own namedtuple) and the time loop calling them in turn.  The rate
functions are compiled with numba after replacing, recursively, every plain
Python function they call (helpers, closures) by its compiled version, and
``np.exp`` by :func:`fast_exp`, a branch-free exponential (within 2 ulp of the
libm value) that the compiler can vectorise, unlike the libm call: table-driven
(Tang 1989) or, on AMD processors, whose vector gathers are slow, a polynomial
(:data:`EXPONENTIAL_METHOD`).  Branch-free matters twice: the loops vectorise, and the
optimiser sees that a gate's steady state and time constant share an
exponential and computes it once.  The generated
source is written to a file in the kernel cache directory named by a hash of
all the code involved, so numba's on-disk cache (``cache=True``) lets later
processes skip compilation; within a process kernels are kept per channel set.

Compiler flags: ``error_model='numpy'`` (no divide-by-zero checks, which block
vectorisation) and ``fastmath={'nsz', 'arcp', 'contract'}`` only: the flags
that assume no NaN or infinity are left out so NaN detection stays exact, and
re-association is left out so :func:`fast_exp`'s rounding trick survives.

Rate tables: with ``RunSettings(rate_table_step_mV=...)`` a block with uniform
parameters reads its gates' steady states and rates from a table
(:mod:`cabletree.solver.tables`) instead of calling its rate functions; the
kernel for that combination is generated and cached like any other.

Vector width: on processors with AVX-512 the kernels are compiled for 512-bit
vectors (:data:`WIDE_VECTORS`; ``CABLETREE_VECTOR_BITS=256`` keeps LLVM's
default of 256).

Compartment order: the kernel numbers compartments its own way
(:func:`kernel_order`), parents first as the elimination needs, with each
channel block in one contiguous run (one per part of a split tree) where the
tree allows, so its gate loops read and write plain views; :class:`CompiledStepper` maps states, inputs and
records to and from the grid's order.

Strips and threads: each thread updates its compartments in strips of at most
:data:`STRIP_COMPARTMENTS`, every channel block in turn, so the gate loops'
scratch rows stay in cache (HH + A-type at N = 1e5 1.1x faster; neutral at
1e4).  ``CompiledStepper(cell, threads=2)`` splits the tree (:func:`split_tree`)
into a small top holding the root and one part per thread, each a union of whole
subtrees of about equal work.  In one ``numba.prange`` region per step each
thread updates its part's gates (thread 0 also the top's), adds its synapse and
injection terms and eliminates its part, sending what the part gives the top to
its own slots; the top is eliminated and back-substituted serially, and a second
region back-substitutes the parts.  Every thread thus works on its own data
(with a serial solve one core read the other's half of the system every step,
about 10 µs per 40 kB on the benchmark machine; benchmarks/README.md).  If no
even split with a small top exists (an unbranched cable), the tree solve stays
serial.  Off by default because sweeps
parallelise over runs instead.
"""

from __future__ import annotations

import hashlib
import importlib.util
import inspect
import math
import os
import sys
import types as pytypes

import numba
import numpy as np
from llvmlite import ir
from numba import types as nbtypes
from numba.core import cgutils
from numba.extending import intrinsic, overload

from ..cell import CellModel
from ..fileio import write_atomically
from ..errors import NumericalInstabilityError, SolverError
from ..inputs import double_exponential_peak
from .plan import RunSettings, SolverState, StepSchedule, check_threads, is_uniform
from .tables import tables_for_settings

__all__ = ["CompiledStepper", "fast_exp", "exp_by_polynomial", "exp_by_table",
           "EXPONENTIAL_METHOD", "kernel_cache_dir", "FASTMATH_FLAGS"]

#: LLVM fast-math flags used everywhere (no 'nnan'/'ninf', no 'reassoc').
FASTMATH_FLAGS = frozenset({"nsz", "arcp", "contract"})
_JIT = dict(fastmath=set(FASTMATH_FLAGS), error_model="numpy", nogil=True)
_CODE_VERSION = "1"


def _prefer_512_bit_vectors() -> bool:
    """Let the compiler vectorise with 512-bit registers where the processor has them.

    LLVM's tuning for most AVX-512 processors prefers 256-bit vectors; for the
    gate loops, which are pure arithmetic, full-width vectors measured about 1.4x
    faster per exponential and 1.2x per step (benchmarks/README.md).  numba keeps
    one code generator per process, created by its first compilation, so this
    takes effect only if cabletree is imported before anything else compiled, and
    it then applies to every numba function of the process.  It does nothing if
    the user set ``NUMBA_CPU_FEATURES``, if ``CABLETREE_VECTOR_BITS=256``, or if the
    processor lacks AVX-512.  Returns whether it took effect.
    """
    if os.environ.get("CABLETREE_VECTOR_BITS", "") == "256" or numba.config.CPU_FEATURES:
        return False
    if "_toplevel_target_context" in vars(numba.core.registry.cpu_target):
        return False  # the code generator exists already; its features are fixed
    from llvmlite import binding as llvm
    features = llvm.get_host_cpu_features()
    if not features.get("avx512f", False):
        return False
    numba.config.CPU_FEATURES = features.flatten() + ",-prefer-256-bit"
    return True


#: Whether this process compiles with 512-bit vectors (see :func:`_prefer_512_bit_vectors`).
WIDE_VECTORS = _prefer_512_bit_vectors()


def kernel_cache_dir() -> str:
    """Directory holding the generated kernel sources and numba's cache of them.

    ``$CABLETREE_KERNEL_DIR`` if set, else ``$XDG_CACHE_HOME/cabletree/kernels``
    (``~/.cache/cabletree/kernels``).
    """
    d = os.environ.get("CABLETREE_KERNEL_DIR")
    if not d:
        base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
        d = os.path.join(base, "cabletree", "kernels")
    os.makedirs(d, exist_ok=True)
    return d


# --- a vectorisable exponential ----------------------------------------------

@intrinsic
def _bits_to_float(typingctx, x):
    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], ir.DoubleType())
    return nbtypes.float64(nbtypes.int64), codegen


@intrinsic
def _float_to_bits(typingctx, x):
    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], ir.IntType(64))
    return nbtypes.int64(nbtypes.float64), codegen


_ROUND_MAGIC = 6755399441055744.0  # 1.5 * 2**52: adding it rounds to an integer
_LOG2E = 1.4426950408889634
_LN2_HI = 0.6931471803691238
_LN2_LO = 1.9082149292705877e-10


@intrinsic
def _select(typingctx, condition, x, y):
    """``x if condition else y`` as one LLVM ``select``, never a branch.

    Straight-line code lets the optimiser recognise the same computation made
    twice (say the exponential shared by a gate's steady state and its time
    constant) and compute it once; if-then branches hid that and doubled
    the work of the A-type gates.
    """
    if x != y:
        return None

    def codegen(context, builder, signature, args):
        return builder.select(args[0], args[1], args[2])
    return x(nbtypes.boolean, x, y), codegen


@intrinsic
def _clamp(typingctx, x, lo, hi):
    """``min(max(x, lo), hi)`` for floats as LLVM ``maxnum``/``minnum`` (no compare
    and branch); a NaN ``x`` gives ``lo``, so callers deal with NaN themselves."""
    if not (x == lo == hi == nbtypes.float64):
        return None

    def codegen(context, builder, signature, args):
        fnty = ir.FunctionType(ir.DoubleType(), [ir.DoubleType(), ir.DoubleType()])
        fmax = cgutils.get_or_insert_function(builder.module, fnty, "llvm.maxnum.f64")
        fmin = cgutils.get_or_insert_function(builder.module, fnty, "llvm.minnum.f64")
        a = builder.call(fmax, [args[0], args[1]], fastmath=("nnan",))
        return builder.call(fmin, [a, args[2]], fastmath=("nnan",))
    return nbtypes.float64(nbtypes.float64, nbtypes.float64, nbtypes.float64), codegen


def _exponential_method() -> str:
    """How :func:`fast_exp` computes: ``"polynomial"`` or ``"table"``.

    ``$CABLETREE_EXP`` if set (``table`` or ``polynomial``), else by processor:
    the table's lookup is a vector gather, which was the faster way on the Intel
    Xeon (AVX-512) the kernel was first tuned on, while on an AMD EPYC of LLVM's
    ``znver5`` type the gather-free polynomial measured 0.465 ns per exponential
    against the table's 0.53 ns, and HH + A-type 4-6 % faster per step
    (benchmarks/README.md).  The polynomial is chosen for the whole ``znver``
    family, whose vector gathers are microcoded and slow (from memory of
    published instruction tables; only the Zen 5 was measured).  Both are within
    2 ulp of libm and give the same results to far below the kernel's agreement
    with the reference backend.
    """
    chosen = os.environ.get("CABLETREE_EXP", "").strip().lower()
    if chosen in ("table", "polynomial"):
        return chosen
    if chosen:
        raise SolverError(f"CABLETREE_EXP={chosen!r} is not a method of the compiled "
                          f"exponential; expected 'table' or 'polynomial' (or unset)")
    from llvmlite import binding as llvm
    return "polynomial" if llvm.get_host_cpu_name().startswith("znver") else "table"


#: The method of :func:`fast_exp` in this process (see :func:`_exponential_method`).
EXPONENTIAL_METHOD = _exponential_method()

#: 2**(j/64), j = 0..63, correctly rounded, as integer bits (the scale of exp_by_table)
_EXP_TABLE_SIZE = 64
_EXP_TABLE_BITS = np.array([np.float64(np.exp2(np.longdouble(j) / _EXP_TABLE_SIZE))
                            for j in range(_EXP_TABLE_SIZE)]).view(np.int64)
_EXP_SCALE = _EXP_TABLE_SIZE * _LOG2E
_EXP_LN2_HI = _LN2_HI / _EXP_TABLE_SIZE  # exact: a division by a power of two
_EXP_LN2_LO = _LN2_LO / _EXP_TABLE_SIZE


# neither is inlined at numba IR level (LLVM inlines them): copying their IR into
# every call site made kernels take much longer to compile
@numba.njit(**_JIT)
def exp_by_table(x):
    """``exp(x)`` without a library call, so loops around it vectorise.

    Table-driven, after Tang PTP (1989) Table-driven implementation of the
    exponential function in IEEE floating-point arithmetic, ACM Trans Math Softw
    15:144-157: ``x = (64 m + j) ln2/64 + r`` with ``|r| <= ln2/128`` (Cody-Waite
    split of ln2/64), ``e^x = 2^m 2^(j/64) e^r`` with ``2^(j/64)`` from a table of
    64 values and ``e^r`` by its Taylor polynomial of degree 5 (truncation
    < 4e-17 relative); ``2^m`` is added to the table value's exponent bits.
    Within 2 ulp of ``np.exp`` (the single-rounded table values add up to 1 ulp
    to the polynomial's); 20 % cheaper than a degree-12 polynomial on
    ``|r| <= ln2/2`` in Horner form on an Intel Xeon.  Returns 0 below -708, inf
    above 709 and NaN for NaN, like ``np.exp`` (which gives subnormals between
    -745 and -708).  Branch-free.
    """
    xc = _clamp(x, -708.0, 709.0)
    t = xc * _EXP_SCALE + _ROUND_MAGIC
    kf = t - _ROUND_MAGIC
    ki = _float_to_bits(t) - _float_to_bits(_ROUND_MAGIC)
    r = xc - kf * _EXP_LN2_HI - kf * _EXP_LN2_LO
    p = 1.0 + r * (1.0 + r * (0.5 + r * (0.16666666666666666 + r * (
        0.041666666666666664 + r * 0.008333333333333333))))
    scale = _bits_to_float(_EXP_TABLE_BITS[ki & (_EXP_TABLE_SIZE - 1)] + ((ki >> 6) << 52))
    y = p * scale
    return _exp_special_cases(x, y)


@numba.njit(**_JIT)
def exp_by_polynomial(x):
    """``exp(x)`` without a library call or table lookup, so loops around it
    vectorise with no gather.

    ``x = m ln2 + r`` with ``|r| <= ln2/2`` (Cody WJ, Waite W (1980) Software
    Manual for the Elementary Functions, Prentice-Hall: ln2 split in two so
    ``m ln2`` is exact), ``e^x = 2^m e^r`` with ``e^r - 1 = r + r^2 q(r)`` from
    the Taylor polynomial of degree 12 (truncation < 2.4e-16 relative), ``q``
    evaluated by Estrin's scheme (Estrin G (1960) Organization of computer
    systems, Proc Western Joint Computer Conference 33-40: independent pairs
    joined by powers of ``r^2``, a short dependency chain) and the leading 1
    added last, so the sum is rounded once.  Measured within 2 ulp of ``np.exp``
    (3.3e-16 relative over 10^6 arguments in [-30, 30] and a grid of [-700,
    700]).  Same limits as :func:`exp_by_table`; branch-free.
    """
    xc = _clamp(x, -708.0, 709.0)
    t = xc * _LOG2E + _ROUND_MAGIC
    kf = t - _ROUND_MAGIC
    ki = _float_to_bits(t) - _float_to_bits(_ROUND_MAGIC)
    r = xc - kf * _LN2_HI - kf * _LN2_LO
    r2 = r * r
    r4 = r2 * r2
    r8 = r4 * r4
    a1 = 0.5 + r * (1 / 6)
    a2 = 1 / 24 + r * (1 / 120)
    a3 = 1 / 720 + r * (1 / 5040)
    a4 = 1 / 40320 + r * (1 / 362880)
    a5 = 1 / 3628800 + r * (1 / 39916800)
    q = (a1 + r2 * a2) + r4 * (a3 + r2 * a4) + r8 * (a5 + r2 * (1 / 479001600))
    y = (1.0 + (r + r2 * q)) * _bits_to_float((ki + 1023) << 52)
    return _exp_special_cases(x, y)


@numba.njit(**_JIT)
def _exp_special_cases(x, y):
    # inf above 709, 0 below -708, NaN for NaN; y (computed from the clamped x) else
    y = _select(x > 709.0, np.inf, y)
    y = _select(x < -708.0, 0.0, y)
    return _select(x != x, x, y)  # NaN in, NaN out


#: ``exp(x)`` inside compiled rate functions: :func:`exp_by_polynomial` or
#: :func:`exp_by_table`, as :data:`EXPONENTIAL_METHOD` says.
fast_exp = exp_by_polynomial if EXPONENTIAL_METHOD == "polynomial" else exp_by_table


def scalar_where(condition, x, y):
    """``np.where`` for scalars (numba's version allocates a 0-d array per call).

    Used inside compiled rate functions only.  Floating-point operands give one
    ``select`` (no branch, see :func:`_select`); other types a conditional.
    """
    return x if condition else y


@overload(scalar_where, jit_options=dict(_JIT))
def _scalar_where_compiled(condition, x, y):
    if isinstance(x, nbtypes.Float) and isinstance(y, nbtypes.Float):
        return lambda condition, x, y: _select(condition, float(x), float(y))
    return lambda condition, x, y: x if condition else y


class _FastNumpy(pytypes.ModuleType):
    """A stand-in for ``numpy`` inside compiled rate functions.

    ``exp`` is :func:`fast_exp` and ``where`` is :func:`scalar_where` (the kernel
    calls rate functions on scalars); everything else is numpy's own.
    """

    def __getattr__(self, name):
        return getattr(np, name)


_FAST_NP = _FastNumpy("cabletree_fast_numpy")
_FAST_NP.exp = fast_exp
_FAST_NP.where = scalar_where


# --- compiling rate functions -------------------------------------------------

_JITTED: dict = {}


def _referenced_functions(func):
    """Plain Python functions referenced by ``func`` as globals or closure cells."""
    code = func.__code__
    out = {}
    for name in code.co_names:
        val = func.__globals__.get(name)
        if isinstance(val, pytypes.FunctionType):
            out[("g", name)] = val
    for name, cell in zip(code.co_freevars, func.__closure__ or ()):
        try:
            val = cell.cell_contents
        except ValueError:
            continue
        if isinstance(val, pytypes.FunctionType):
            out[("c", name)] = val
    return out


def jit_rate_function(func):
    """The numba-compiled version of a channel rate function (or a helper it calls).

    Every plain Python function it references (module globals or closure cells)
    is compiled the same way and substituted, and ``np`` is replaced by a
    namespace whose ``exp`` is :func:`fast_exp`.  Compilation itself is lazy.
    """
    key = func
    if key in _JITTED:
        return _JITTED[key]
    if isinstance(func, numba.core.registry.CPUDispatcher):
        return func
    refs = _referenced_functions(func)
    g = dict(func.__globals__)
    for (kind, name), f in refs.items():
        if kind == "g":
            g[name] = jit_rate_function(f)
    for name in func.__code__.co_names:
        if g.get(name) is np:
            g[name] = _FAST_NP
    closure = None
    if func.__closure__:
        cells = []
        for name, cell in zip(func.__code__.co_freevars, func.__closure__):
            val = cell.cell_contents
            if isinstance(val, pytypes.FunctionType):
                val = jit_rate_function(val)
            elif val is np:
                val = _FAST_NP
            cells.append(pytypes.CellType(val))
        closure = tuple(cells)
    clone = pytypes.FunctionType(func.__code__, g, func.__name__, func.__defaults__, closure)
    clone.__qualname__ = func.__qualname__
    clone.__module__ = func.__module__
    jitted = numba.njit(inline="always", **_JIT)(clone)
    _JITTED[key] = jitted
    return jitted


def _fingerprint(func, seen=None) -> str:
    """Hash input describing a function's code, constants, closure values and callees."""
    seen = set() if seen is None else seen
    if id(func) in seen:
        return ""
    seen.add(id(func))
    code = func.__code__
    parts = [func.__module__ or "", func.__qualname__, code.co_code.hex(), repr(code.co_consts),
             repr(code.co_names)]
    for name in code.co_names:
        val = func.__globals__.get(name)
        if isinstance(val, (int, float)) and not isinstance(val, bool):
            parts.append(f"{name}={val!r}")
    for name, cell in zip(code.co_freevars, func.__closure__ or ()):
        val = cell.cell_contents
        if isinstance(val, (int, float, str)):
            parts.append(f"{name}={val!r}")
    for f in _referenced_functions(func).values():
        parts.append(_fingerprint(f, seen))
    return "|".join(parts)


def _gate_functions(gate) -> tuple:
    """Names of a gate's rate functions, in the order the generated kernel numbers
    them (``R_<block>_<gate>_<q>``): the pair, then the combined function if any."""
    names = ("alpha", "beta") if gate.uses_rates else ("steady_state", "tau_ms")
    if gate.steady_state_and_tau_ms is not None:
        names += ("steady_state_and_tau_ms",)
    return names


def _rate_functions(channel):
    """(label, function) of every rate function of a channel.

    A gate's combined ``steady_state_and_tau_ms`` comes before the pair defined
    from it, so a diagnosis names it rather than its callers.
    """
    out = []
    for gate in channel.gates:
        names = _gate_functions(gate)
        for n in names[2:] + names[:2]:
            out.append((f"{channel.name}.{gate.name}.{n}", getattr(gate, n)))
    return out


# --- generated source ------------------------------------------------------------

def _block_source(b: int, channel, contiguous: bool, tabulated: bool = False,
                  uniform: tuple = (False, ()), per_capacitance: bool = False) -> str:
    """Source of the gate-update + conductance function of channel block ``b``.

    The function updates the block's entries ``k0 <= k < k1`` (all of them on one
    thread; with more threads, each thread calls it for the entries whose
    compartments lie in its own compartment range, so no two threads ever write
    the same element of ``d`` or ``r``; each thread has its own rows of scratch
    ``w0``, ``w1``, ``wf``, ``wi``).  The block's conductance is added to the
    diagonal ``d`` of the step's tree system and its current to the right-hand
    side ``r``.  A block whose entries in every strip form one run of
    compartments is called, for each strip, with views of ``v``, ``d`` and ``r``
    offset so that the strip's entries index them directly.
    Any other block first gathers ``v`` into a contiguous scratch array, runs the
    same loops writing its conductances to a second scratch array, and then adds
    them to ``d`` and ``r`` through ``index``: a gather inside the rate loop keeps
    it from vectorising.

    Each gate takes two loops: the first evaluates the rate functions and stores
    the steady state and the exponent of the Rush-Larsen factor in ``w0`` and
    ``w1`` (calling a gate's ``steady_state_and_tau_ms`` once where it has one),
    the second advances the gate; a last loop forms the conductance.
    Short loop bodies let the processor overlap the long dependency chains of
    consecutive compartments (measured 5-15 % faster per step than one fused loop
    over all gates).
    Divisions are avoided where a product does: the gate factor is
    ``exp(-dt (alpha + beta) phi)`` rather than ``exp(-dt / tau)``.

    A ``tabulated`` block reads each gate's steady state and rate from its rate
    table ``tb`` (lookup constants ``tv``, see :mod:`cabletree.solver.tables`)
    by linear interpolation, the arithmetic of
    :func:`cabletree.solver.tables.interpolate`, in place of the rate loop.

    ``uniform = (reversal, parameters)`` says whether the block's reversal
    potential and each of its named parameters (a tuple of bools) take one value
    over all its compartments; such a value is read once, as a scalar, instead of
    per compartment (less memory traffic per step).

    A ``per_capacitance`` block (contiguous only) is called with the strip's
    membrane capacitances (nF) in place of its maximal conductances and with
    ``gscale``, their uniform ratio (µS/nF): a channel of uniform density on a
    membrane of uniform specific capacitance needs no array of its own (less
    memory traffic per step, which counts once the cell outgrows the caches).
    """
    npar = len(channel.parameter_names)
    uniform_reversal, uniform_parameters = uniform
    uniform_parameters = tuple(uniform_parameters) or (False,) * npar
    lines = ["@numba.njit(**_JIT)",
             f"def block_{b}(v, index, k0, k1, x, par, gmax, gscale, erev, celsius, phi, "
             "dt_gate, d, r, w0, w1, wf, wi, vg, gg, tb, tv):",
             # k0 < 0 never happens; it tells the compiler k >= 0 (no negative-index
             # wraparound); an empty range must not read the scalars below
             "    if k0 < 0 or k1 <= k0:",
             "        return",
             "    dts = dt_gate * phi"]
    if uniform_reversal:
        lines.append("    e0 = erev[0]")
    lines += [f"    p{q} = par[{q}, 0]" for q in range(npar) if uniform_parameters[q]]
    if not contiguous:
        lines += ["    m = k1 - k0",
                  "    for k in range(m):",
                  "        vg[k] = v[index[k0 + k]]"]
    vi = "v[k]" if contiguous else "vg[kk]"
    ptuple = f"PT_{b}(" + "".join(f"p{q}, " if uniform_parameters[q] else f"par[{q}, k], "
                                  for q in range(npar)) + ")"
    if tabulated:
        # grid cell and fraction once per block (vectorised: int32 conversion)
        lines += ["    v0 = tv[0]",
                  "    inv_h = tv[1]",
                  "    top = tv[2]",
                  "    last = tv[3]",
                  "    for kk in range(k1 - k0):",
                  "        k = k0 + kk",
                  f"        u = ({vi} - v0) * inv_h",
                  "        u = u if u >= 0.0 else 0.0  # NaN too",
                  "        u = top if u > top else u",
                  "        c = np.floor(u)",
                  "        c = last if c > last else c",
                  "        wf[kk] = u - c",
                  "        wi[kk] = np.int32(c)"]
    for j, gate in enumerate(channel.gates):
        step = "dts" if gate.temperature_scaled else "dt_gate"
        lines += ["    for kk in range(k1 - k0):",
                  "        k = k0 + kk"]
        if tabulated:
            lines += ["        i = wi[kk]",
                      "        f = wf[kk]",
                      f"        a0 = tb[{j}, i, 0]",
                      f"        r0 = tb[{j}, i, 1]",
                      f"        w0[kk] = a0 + f * (tb[{j}, i + 1, 0] - a0)",
                      f"        w1[kk] = (r0 + f * (tb[{j}, i + 1, 1] - r0)) * -{step}"]
        elif gate.uses_rates:
            lines += [f"        vi = {vi}",
                      f"        p = {ptuple}",
                      f"        a = R_{b}_{j}_0(vi, celsius, p)",
                      f"        s = a + R_{b}_{j}_1(vi, celsius, p)",
                      "        w0[kk] = a * (1.0 / s)",
                      f"        w1[kk] = -{step} * s"]
        elif gate.steady_state_and_tau_ms is not None:
            lines += [f"        vi = {vi}",
                      f"        p = {ptuple}",
                      f"        inf, tau = R_{b}_{j}_2(vi, celsius, p)",
                      "        w0[kk] = inf",
                      f"        w1[kk] = -{step} / tau"]
        else:
            lines += [f"        vi = {vi}",
                      f"        p = {ptuple}",
                      f"        inf = R_{b}_{j}_0(vi, celsius, p)",
                      f"        tau = R_{b}_{j}_1(vi, celsius, p)",
                      "        w0[kk] = inf",
                      f"        w1[kk] = -{step} / tau"]
        lines += ["    for kk in range(k1 - k0):",
                  "        k = k0 + kk",
                  "        inf = w0[kk]",
                  f"        x[{j}, k] = inf + (x[{j}, k] - inf) * np.exp(w1[kk])"]
    lines += ["    for kk in range(k1 - k0):",
              "        k = k0 + kk",
              "        g = gmax[k] * gscale" if per_capacitance else "        g = gmax[k]"]
    for j, gate in enumerate(channel.gates):
        if int(gate.power) > 0:
            lines.append(f"        xj = x[{j}, k]")
        for _ in range(int(gate.power)):
            lines.append("        g = g * xj")
    if contiguous:
        lines += ["        d[k] += g", f"        r[k] += g * {'e0' if uniform_reversal else 'erev[k]'}", ""]
    else:
        lines += ["        gg[kk] = g",
                  "    for k in range(m):",
                  "        i = index[k0 + k]",
                  "        d[i] += gg[k]",
                  f"        r[i] += gg[k] * {'e0' if uniform_reversal else 'erev[k0 + k]'}", ""]
    return "\n".join(lines)


_KERNEL_TEMPLATE = '''
@numba.njit(**_JIT)
def start_rows(v, d, r, refactor, rheff, cap, static_diag, leak_j):
    # rows of the tree system: capacitive and static terms (leak, axial coupling);
    # with LEAK_PER_CAP (a constant of the generated module) leak_j holds one number,
    # the leak current per capacitance (nA/nF), instead of a current per compartment
    if LEAK_PER_CAP:
        j = leak_j[0]
        if refactor:
            for i in range(v.size):
                c = cap[i] * rheff
                d[i] = c + static_diag[i]
                r[i] = cap[i] * (rheff * v[i] + j)
        else:
            for i in range(v.size):
                r[i] = cap[i] * (rheff * v[i] + j)
    elif refactor:
        for i in range(v.size):
            c = cap[i] * rheff
            d[i] = c + static_diag[i]
            r[i] = c * v[i] + leak_j[i]
    else:
        for i in range(v.size):
            r[i] = cap[i] * rheff * v[i] + leak_j[i]


@numba.njit(**_JIT)
def thread_strips(t, v, dt_gate, d, r, refactor, rheff, cap, static_diag, leak_j, bounds,
                  ws, wi, tp, celsius{block_params}):
    # thread t updates strips tp[t] <= s < tp[t + 1], compartments bounds[s] <= i <
    # bounds[s + 1], each a short range of compartments in every block (sp<b>[s]:sp<b>[s + 1]
    # are the block entries in strip s), with its own scratch rows ws[t], wi[t].  A strip's
    # system rows start from the capacitive and static terms (leak and axial coupling), and
    # its channels then add their conductances to the diagonal d and currents to the
    # right-hand side r.
    w0 = ws[t, 0]
    w1 = ws[t, 1]
    wf = ws[t, 2]
    vg = ws[t, 3]
    gg = ws[t, 4]
    wit = wi[t]
    for s in range(tp[t], tp[t + 1]):
        lo = bounds[s]
        hi = bounds[s + 1]
        if LEAK_PER_CAP:
            start_rows(v[lo:hi], d[lo:hi], r[lo:hi], refactor, rheff, cap[lo:hi],
                       static_diag[lo:hi], leak_j)
        else:
            start_rows(v[lo:hi], d[lo:hi], r[lo:hi], refactor, rheff, cap[lo:hi],
                       static_diag[lo:hi], leak_j[lo:hi])
{block_calls}


@numba.njit(**_JIT_PAR)
def gates_and_currents(v, dt_gate, d, r, refactor, rheff, cap, static_diag, leak_j, bounds,
                       ws, wi, tp, celsius{block_params}):
    # one parallel region: every thread its own strips
    for t in numba.prange(N_CHUNKS):
        thread_strips(t, v, dt_gate, d, r, refactor, rheff, cap, static_diag, leak_j, bounds,
                      ws, wi, tp, celsius{block_args})
    return 0


@numba.njit(**_JIT_PAR)
def gates_and_parts(v, dt_gate, d, r, refactor, rheff, cap, static_diag, leak_j, bounds,
                    ws, wi, tp, celsius, part_bounds, eparent, offdiag, slot_stride,
                    syn_comp, syn_g, syn_j, syn_thread_ptr, syn_by_thread,
                    inj_comp, inj_row, inj_thread_ptr, inj_by_thread{block_params}):
    # a tree split into a top and one part per thread (split_tree): in one parallel
    # region, thread t updates its strips, adds the terms of the synapses and
    # injections on its compartments and eliminates its part from the leaves up;
    # what a part gives a top compartment goes to the thread's own slots beyond the
    # compartments (d[n + t * slot_stride + p]), added up serially afterwards
    n = v.size
    for t in numba.prange(N_CHUNKS):
        thread_strips(t, v, dt_gate, d, r, refactor, rheff, cap, static_diag, leak_j, bounds,
                      ws, wi, tp, celsius{block_args})
        for q in range(syn_thread_ptr[t], syn_thread_ptr[t + 1]):
            s = syn_by_thread[q]
            c = syn_comp[s]
            d[c] += syn_g[s]
            r[c] += syn_j[s]
        for q in range(inj_thread_ptr[t], inj_thread_ptr[t + 1]):
            k = inj_by_thread[q]
            r[inj_comp[k]] += inj_row[k]
        base = n + t * slot_stride
        for k in range(base, base + slot_stride):
            d[k] = 0.0
            r[k] = 0.0
        eliminate_part(part_bounds[t], part_bounds[t + 1], offdiag, eparent, d, r)
    return 0


@numba.njit(**_JIT_INLINE)
def eliminate_part(lo, hi, offdiag, parent, d, r):
    # Gaussian elimination of compartments hi - 1 down to lo (leaves first) into their
    # parents; d[i] is final when i is reached, so its reciprocal replaces it and the
    # back-substitution multiplies instead of dividing again
    for i in range(hi - 1, lo - 1, -1):
        p = parent[i]
        rd = 1.0 / d[i]
        d[i] = rd
        f = offdiag[i] * rd
        d[p] -= f * offdiag[i]
        r[p] -= f * r[i]


@numba.njit(**_JIT_INLINE)
def eliminate(lo, hi, offdiag, parent, d, r):
    # elimination of compartments lo <= i < hi (lo >= 1) and then of the root
    eliminate_part(lo, hi, offdiag, parent, d, r)
    d[0] = 1.0 / d[0]


@numba.njit(**_JIT_INLINE)
def back_substitute_root(v, cn, d, r, limit):
    # the root's new potential (see back_substitute); 1 if it is NaN or runaway
    vo = r[0] * d[0]
    r[0] = vo
    vn = 2.0 * vo - v[0] if cn else vo
    v[0] = vn
    return 0 if abs(vn) <= limit else 1


@numba.njit(**_JIT_INLINE)
def back_substitute(lo, hi, v, cn, offdiag, parent, d, r, limit):
    # back-substitution of compartments lo <= i < hi, whose parents are done, with the
    # new potential (Crank-Nicolson: extrapolated from the half step); returns the
    # count of NaN or runaway values.  r[i] is spent once v_out(i) is known: it holds
    # v_out from here on
    n_bad = 0
    for i in range(lo, hi):
        vo = (r[i] - offdiag[i] * r[parent[i]]) * d[i]
        r[i] = vo
        vn = 2.0 * vo - v[i] if cn else vo
        v[i] = vn
        n_bad += 0 if abs(vn) <= limit else 1  # NaN counts as bad
    return n_bad


@numba.njit(**_JIT_PAR)
def back_parts(v, cn, part_bounds, offdiag, parent, d, r, limit, n_bad):
    # back-substitution of the parts of a split tree, one thread each (the top is done)
    for t in numba.prange(N_CHUNKS):
        n_bad[8 * t] = back_substitute(part_bounds[t], part_bounds[t + 1], v, cn, offdiag,
                                       parent, d, r, limit)
    return 0


@numba.njit(**_JIT_INLINE)
def synapse_terms(v, h, cn, first_half, second_half, step, dt,
                  syn_comp, syn_kind, syn_tau_a, syn_tau_b, syn_rev, syn_mg, syn_weight,
                  sa, sb, sa_old, sb_old, ea_h, eb_h, ev_ptr, ev_syn, ev_off, ev_first,
                  syn_g, syn_j):
    # advance every synapse's state over h (adding the events of this step's
    # selected halves) and give its conductance syn_g (µS) and current term syn_j
    ns = sa.size
    if ns > 0:
        for s in range(ns):
            a0 = sa[s]
            b0 = sb[s]
            sa_old[s] = a0
            sb_old[s] = b0
            if syn_kind[s] == 0:
                sb[s] = (b0 + a0 * h / syn_tau_a[s]) * ea_h[s]
            else:
                sb[s] = b0 * eb_h[s]
            sa[s] = a0 * ea_h[s]
        for e in range(ev_ptr[step], ev_ptr[step + 1]):
            off = ev_off[e]
            if not (first_half and second_half):
                if first_half:
                    if not ev_first[e]:
                        continue
                    off = off - 0.5 * dt
                elif ev_first[e]:
                    continue
            s = ev_syn[e]
            w = syn_weight[s]
            ta = syn_tau_a[s]
            if syn_kind[s] == 0:
                ex = np.exp(-off / ta)
                sa[s] += w * ex
                sb[s] += w * (off / ta) * ex
            else:
                sa[s] += w * np.exp(-off / ta)
                sb[s] += w * np.exp(-off / syn_tau_b[s])
        for s in range(ns):
            if cn:
                ga = 0.5 * (sa_old[s] + sa[s])
                gb = 0.5 * (sb_old[s] + sb[s])
            else:
                ga = sa[s]
                gb = sb[s]
            if syn_kind[s] == 0:
                g = 1e-3 * gb
            else:
                g = 1e-3 * (ga - gb)
            c = syn_comp[s]
            if syn_mg[s] == syn_mg[s]:
                g = g * (1.0 / (1.0 + (syn_mg[s] / 3.57) * np.exp(-0.062 * v[c])))
            syn_g[s] = g
            syn_j[s] = g * syn_rev[s]


@numba.njit(**_JIT)
def substep(v, h, cn, dt_gate, inj_row, first_half, second_half, step, dt,
            cap, static_diag, leak_j, offdiag, parent, d, r, mult, limit,
            fixed_matrix, factor_rheff,
            inj_comp, syn_comp, syn_kind, syn_tau_a, syn_tau_b, syn_rev, syn_mg, syn_weight,
            sa, sb, sa_old, sb_old, ea_h, eb_h, ev_ptr, ev_syn, ev_off, ev_first, syn_g, syn_j,
            n_parts, part_bounds, eparent, slot_stride, syn_thread_ptr, syn_by_thread,
            inj_thread_ptr, inj_by_thread, n_bad_t,
            ws, wi, tp, bounds, celsius{block_params}):
    n = v.size
    rheff = 2.0 / h if cn else 1.0 / h
    synapse_terms(v, h, cn, first_half, second_half, step, dt,
                  syn_comp, syn_kind, syn_tau_a, syn_tau_b, syn_rev, syn_mg, syn_weight,
                  sa, sb, sa_old, sb_old, ea_h, eb_h, ev_ptr, ev_syn, ev_off, ev_first,
                  syn_g, syn_j)
    # the matrix is the same as at the last factorisation (a cell without channels
    # or synapses at the same step size): only the right-hand side is needed
    refactor = not (fixed_matrix and rheff == factor_rheff[0])
    if SPLIT and n_parts > 1:
        # a split tree (threads only; never a fixed matrix, so refactor is True):
        # gates, synapse and injection terms and the parts' elimination in one
        # parallel region (SPLIT, a constant, keeps this out of serial kernels)
        gates_and_parts(v, dt_gate, d, r, refactor, rheff, cap, static_diag, leak_j, bounds,
                        ws, wi, tp, celsius, part_bounds, eparent, offdiag, slot_stride,
                        syn_comp, syn_g, syn_j, syn_thread_ptr, syn_by_thread,
                        inj_comp, inj_row, inj_thread_ptr, inj_by_thread{block_args})
        m = part_bounds[0]
        for t in range(n_parts):
            base = n + t * slot_stride
            for p in range(m):
                d[p] += d[base + p]
                r[p] += r[base + p]
        eliminate(1, m, offdiag, parent, d, r)
        n_bad = back_substitute_root(v, cn, d, r, limit)
        n_bad += back_substitute(1, m, v, cn, offdiag, parent, d, r, limit)
        back_parts(v, cn, part_bounds, offdiag, parent, d, r, limit, n_bad_t)
        for t in range(n_parts):
            n_bad += n_bad_t[8 * t]
        return n_bad
    # the tree system of the step: capacitive, static and channel terms (by strips),
    # then synapses and injections, all added into the diagonal d and the
    # right-hand side r
    gates_and_currents(v, dt_gate, d, r, refactor, rheff, cap, static_diag, leak_j, bounds,
                       ws, wi, tp, celsius{block_args})
    for s in range(sa.size):
        d[syn_comp[s]] += syn_g[s]
        r[syn_comp[s]] += syn_j[s]
    for q in range(inj_comp.size):
        r[inj_comp[q]] += inj_row[q]
    if not refactor:
        # eliminate the right-hand side only, with the multipliers the
        # factorisation stored (one array read instead of two)
        for i in range(n - 1, 0, -1):
            r[parent[i]] -= mult[i] * r[i]
    else:
        eliminate(1, n, offdiag, parent, d, r)
        if fixed_matrix:
            # keep the multipliers for the steps to come (the products the
            # elimination used: d[i] holds the pivot's reciprocal now)
            for i in range(1, n):
                mult[i] = offdiag[i] * d[i]
            factor_rheff[0] = rheff
    return back_substitute_root(v, cn, d, r, limit) + back_substitute(1, n, v, cn, offdiag,
                                                                      parent, d, r, limit)


@numba.njit(**_JIT_CACHE)
def run(n_steps, dt, cn_method, smoothing, limit, record_every, lag0, fixed_matrix,
        cap, static_diag, leak_j, offdiag, parent, v, records, record_index,
        inj_comp, inj_mid, inj_end,
        syn_comp, syn_kind, syn_tau_a, syn_tau_b, syn_rev, syn_mg, syn_weight, sa, sb,
        ea_full, eb_full, ea_half, eb_half, ev_ptr, ev_syn, ev_off, ev_first,
        n_parts, part_bounds, eparent, slot_stride, syn_thread_ptr, syn_by_thread,
        inj_thread_ptr, inj_by_thread, tp, bounds, max_strip, celsius{block_params}):
    n = v.size
    # the tree system's diagonal and right-hand side; with a split tree, followed by
    # each thread's slots for what its part gives the top
    d = np.empty(n + n_parts * slot_stride)  # slot_stride is 0 without a split
    r = np.empty(n + n_parts * slot_stride)
    n_bad_t = np.zeros(8 * n_parts, dtype=np.int64)  # one cache line per thread
    syn_g = np.empty(sa.size)
    syn_j = np.empty(sa.size)
    # scratch of the gate loops, rows of one strip per thread (indexed by entry
    # within the strip): steady states, exponents, table fractions, gathered
    # potentials and conductances of non-contiguous blocks; table grid cells
    ws = np.empty((N_CHUNKS, 5, max_strip))
    wi = np.empty((N_CHUNKS, max_strip), dtype=np.int32)
    factor_rheff = np.full(1, np.nan)  # h-factor of the stored factorisation (none yet)
    # elimination multipliers of the stored factorisation (a fixed matrix only)
    mult = np.empty(n if fixed_matrix else 0)
    sa_old = np.empty(sa.size)
    sb_old = np.empty(sa.size)
    lag = lag0
    for q in range(record_index.size):
        records[0, q] = v[record_index[q]]
    rec = 1
    for k in range(n_steps):
        smooth = cn_method and smoothing[k]
        n_sub = 2 if smooth else 1
        for j in range(n_sub):
            if cn_method and not smooth:
                h = dt
                cn = True
                dt_gate = 0.5 * dt + lag
                inj_row = inj_mid[k]
                first_half = True
                second_half = True
                new_lag = 0.5 * dt
            elif cn_method:
                h = 0.5 * dt
                cn = False
                dt_gate = 0.5 * dt + lag
                inj_row = inj_mid[k] if j == 0 else inj_end[k]
                first_half = j == 0
                second_half = j == 1
                new_lag = 0.0
            else:
                h = dt
                cn = False
                dt_gate = dt + lag
                inj_row = inj_end[k]
                first_half = True
                second_half = True
                new_lag = 0.0
            ea = ea_full if h == dt else ea_half
            eb = eb_full if h == dt else eb_half
            n_bad = substep(v, h, cn, dt_gate, inj_row, first_half, second_half, k, dt,
                    cap, static_diag, leak_j, offdiag, parent, d, r, mult,
                    limit, fixed_matrix, factor_rheff,
                    inj_comp, syn_comp, syn_kind, syn_tau_a, syn_tau_b, syn_rev, syn_mg, syn_weight,
                    sa, sb, sa_old, sb_old, ea, eb, ev_ptr, ev_syn, ev_off, ev_first, syn_g, syn_j,
                    n_parts, part_bounds, eparent, slot_stride, syn_thread_ptr, syn_by_thread,
                    inj_thread_ptr, inj_by_thread, n_bad_t,
                    ws, wi, tp, bounds, celsius{block_args})
            lag = new_lag
        if n_bad > 0:
            bad = 0
            while abs(v[bad]) <= limit:
                bad += 1
            return k, bad, rec, lag
        if (k + 1) % record_every == 0:
            for q in range(record_index.size):
                records[rec, q] = v[record_index[q]]
            rec += 1
    return -1, -1, rec, lag
'''


def _module_source(channels: tuple, contiguous: tuple, tabulated: tuple, uniform: tuple,
                   per_capacitance: tuple, leak_per_capacitance: bool) -> str:
    """Source of the kernel module for a sequence of channel blocks."""
    params = "".join(f", x{b}, idx{b}, sp{b}, par{b}, gm{b}, gs{b}, er{b}, phi{b}, tb{b}, tv{b}"
                     for b in range(len(channels)))
    calls = []
    for b, c in enumerate(contiguous):
        rng = f"sp{b}[s], sp{b}[s + 1]"
        if c:
            # the strip's entries k0 <= k < k1 sit at compartments o + k
            view = f"idx{b}[sp{b}[s]] - sp{b}[s]:idx{b}[sp{b}[s]] - sp{b}[s] + sp{b}[s + 1]"
            gmax = f"cap[{view}]" if per_capacitance[b] else f"gm{b}"
            calls.append(f"        if sp{b}[s] < sp{b}[s + 1]:\n"
                         f"            block_{b}(v[{view}], idx{b}, {rng}, x{b}, par{b}, "
                         f"{gmax}, gs{b}, er{b}, celsius, phi{b}, dt_gate, d[{view}], r[{view}], "
                         f"w0, w1, wf, wit, vg, gg, tb{b}, tv{b})\n")
        else:
            calls.append(f"        block_{b}(v, idx{b}, {rng}, x{b}, par{b}, gm{b}, gs{b}, er{b}, "
                         f"celsius, phi{b}, dt_gate, d, r, w0, w1, wf, wit, vg, gg, tb{b}, "
                         f"tv{b})\n")
    calls = "".join(calls)
    head = ("# generated by cabletree.solver.compiled; do not edit\n"
            "import numba\n\n"
            f"LEAK_PER_CAP = {bool(leak_per_capacitance)}\n\n")
    blocks = "\n".join(_block_source(b, ch, c, tab, u, pc) for b, (ch, c, tab, u, pc)
                        in enumerate(zip(channels, contiguous, tabulated, uniform,
                                         per_capacitance)))
    return (head + blocks + _KERNEL_TEMPLATE.format(block_params=params, block_args=params,
                                                    block_calls=calls or "        pass\n"))


_KERNELS: dict = {}
# stand-ins passed for the rate table of a block with exact rates (never read)
_NO_TABLE = np.zeros((0, 1, 2))
_NO_TABLE_CONSTANTS = np.zeros(4)


def _load_kernel(channels: tuple, contiguous: tuple, threads: int, tabulated: tuple,
                 uniform: tuple, per_capacitance: tuple, leak_per_capacitance: bool):
    """The compiled ``run`` function for a channel set (built once per process).

    ``contiguous[b]`` says whether block ``b``'s entries form one run of
    compartments in every strip,
    ``tabulated[b]`` whether it reads a rate table instead of its rate functions,
    ``uniform[b]`` which of its per-compartment values are uniform and
    ``per_capacitance[b]`` whether its maximal conductances are read as the
    capacitances times one ratio (see :func:`_block_source`);
    ``leak_per_capacitance`` whether the leak current is (see :class:`CompiledStepper`).
    """
    key = (channels, contiguous, threads, tabulated, uniform, per_capacitance,
           leak_per_capacitance)
    if key in _KERNELS:
        return _KERNELS[key]
    source = _module_source(channels, contiguous, tabulated, uniform, per_capacitance,
                            leak_per_capacitance)
    digest = hashlib.sha256()
    digest.update(f"{_CODE_VERSION}|{numba.__version__}|{np.__version__}|{threads}|"
                  f"{EXPONENTIAL_METHOD}|".encode())
    digest.update(inspect.getsource(sys.modules[__name__]).encode())
    digest.update(source.encode())
    for ch in channels:
        for _, f in _rate_functions(ch):
            digest.update(_fingerprint(f).encode())
        digest.update(repr(ch.parameter_names).encode())
    name = f"cabletree_kernel_{digest.hexdigest()[:20]}"
    directory = kernel_cache_dir()
    path = os.path.join(directory, name + ".py")
    if not os.path.exists(path):
        write_atomically(path, lambda tmp: tmp.write_text(source))
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    par = dict(_JIT, parallel=threads > 1)
    # small helpers are inlined at numba's level: each function compiled on its own
    # costs compile time (an HH kernel's first build 5.5 -> 5.1 s)
    module.__dict__.update(np=_FAST_NP, _JIT=dict(_JIT), _JIT_CACHE=dict(_JIT, cache=True),
                           _JIT_INLINE=dict(_JIT, inline="always"),
                           _JIT_PAR=par, N_CHUNKS=int(threads), SPLIT=threads > 1)
    for b, ch in enumerate(channels):
        module.__dict__[f"PT_{b}"] = ch.parameter_tuple
        for j, gate in enumerate(ch.gates):
            for q, function_name in enumerate(_gate_functions(gate)):
                module.__dict__[f"R_{b}_{j}_{q}"] = jit_rate_function(getattr(gate, function_name))
    sys.modules[name] = module  # numba's cache finds the module's globals by name
    spec.loader.exec_module(module)
    _KERNELS[key] = module.run
    return module.run


def _diagnose(channels: tuple, celsius: float, exc: Exception) -> SolverError:
    """Find the rate function that does not compile and say so."""
    for ch in channels:
        p = ch.make_parameters()
        p = ch.parameter_tuple(*(float(x) for x in p))
        for label, f in _rate_functions(ch):
            try:
                jit_rate_function(f)(-65.0, float(celsius), p)
            except Exception as inner:  # numba raises many error types
                first = str(inner).strip().splitlines()
                return SolverError(
                    f"rate function {label} ({f.__module__}.{f.__qualname__}) of channel "
                    f"{ch.name!r} cannot be compiled by numba: "
                    f"{first[0] if first else type(inner).__name__}; rewrite it with plain "
                    "numpy arithmetic (see cabletree.channels.base) or run with "
                    "backend='reference'")
    return SolverError(f"the compiled kernel failed to build ({type(exc).__name__}: "
                       f"{str(exc).strip().splitlines()[0] if str(exc).strip() else ''}); "
                       "run with backend='reference' and report this")


def _flat_synapses(cell: CellModel, sched: StepSchedule, position: np.ndarray):
    """Every synapse group flattened into per-synapse arrays and step-sorted events.

    ``position[c]`` is the kernel position of grid compartment ``c``.
    """
    comp, kind, ta, tb, rev, mg, weight = [], [], [], [], [], [], []
    ev_step, ev_syn, ev_off, ev_first = [], [], [], []
    base = 0
    for grp, st, off, half in zip(cell.synapses, sched.synapse_event_step,
                                  sched.synapse_event_offset_ms, sched.synapse_event_half):
        k = grp.kinetics
        s = grp.compartment.size
        if k.shape == "alpha":
            a, b, scale, code = k.tau_decay_ms, k.tau_decay_ms, math.e, 0
        else:
            a, b = k.tau_decay_ms, k.tau_rise_ms
            scale, code = double_exponential_peak(k.tau_rise_ms, k.tau_decay_ms)[1], 1
        comp.append(position[grp.compartment])
        kind.append(np.full(s, code, np.int64))
        ta.append(np.full(s, a))
        tb.append(np.full(s, b))
        rev.append(np.full(s, k.reversal_mV))
        mg.append(np.full(s, np.nan if k.mg_mM is None else k.mg_mM))
        weight.append(grp.weight_nS * scale)
        ev_step.append(st)
        ev_syn.append(grp.event_synapse[:st.size] + base)
        ev_off.append(off)
        ev_first.append(half)
        base += s

    def cat(parts, dtype):
        return np.ascontiguousarray(np.concatenate(parts) if parts else np.zeros(0), dtype=dtype)

    steps = cat(ev_step, np.int64)
    order = np.argsort(steps, kind="stable")
    ptr = np.searchsorted(steps[order], np.arange(sched.n_steps + 1), side="left")
    return dict(syn_comp=cat(comp, np.int64), syn_kind=cat(kind, np.int64),
                syn_tau_a=cat(ta, float), syn_tau_b=cat(tb, float), syn_rev=cat(rev, float),
                syn_mg=cat(mg, float), syn_weight=cat(weight, float),
                ev_ptr=np.ascontiguousarray(ptr, dtype=np.int64),
                ev_syn=cat(ev_syn, np.int64)[order], ev_off=cat(ev_off, float)[order],
                ev_first=cat(ev_first, np.bool_)[order])


def kernel_order(parent: np.ndarray, block_indices, part: np.ndarray | None = None) -> np.ndarray:
    """The compartment order of the kernel: channel blocks in contiguous runs.

    A channel block whose compartments are contiguous is updated through views
    with no gather or scatter (measured 2.6 ns per compartment-step of 24.7 for
    HH + A-type, whose proximal and distal kinetic types interleave in the grid's
    depth order).  Compartments are grouped by the set of blocks they belong to;
    the groups are placed parents first (a topological order of the group graph
    given by the tree's edges, preferring next the ready group that shares most
    blocks with the one just placed) and each group keeps the grid's depth order
    inside it, so ``parent[i] < i`` still holds in the new numbering and the
    elimination's neighbouring iterations stay independent.  If the groups cannot
    be ordered parents first (a block set that recurs further out along a path),
    the grid order is kept.

    With ``part`` (from :func:`split_tree`) the top of the tree comes first and
    then each part in turn, each ordered as above within itself.

    Parameters
    ----------
    parent : ndarray of int64, shape (n,)
        Parent of each compartment in grid order, -1 for the root; ``parent[i] < i``.
    block_indices : sequence of ndarray of int64
        Compartments (grid order, increasing) of each channel block.
    part : ndarray of int64, shape (n,), optional
        Part of each compartment, -1 for the top.

    Returns
    -------
    ndarray of int64, shape (n,)
        ``order[i]`` is the grid compartment at kernel position ``i``; ``order[0] == 0``.
    """
    parent = np.asarray(parent, dtype=np.int64)
    n = parent.size
    member = np.zeros((n, len(block_indices)), dtype=bool)
    for b, idx in enumerate(block_indices):
        member[idx, b] = True
    if part is None:
        return _grouped_order(parent, member, np.arange(n, dtype=np.int64))
    pieces = [_grouped_order(parent, member, np.flatnonzero(part == t))
              for t in range(-1, int(part.max()) + 1)]
    return np.concatenate(pieces).astype(np.int64)


def _grouped_order(parent: np.ndarray, member: np.ndarray, subset: np.ndarray) -> np.ndarray:
    """``subset`` (increasing grid compartments, each one's parent in it or not at
    all) reordered by block-membership groups, parents first (see :func:`kernel_order`)."""
    local = np.full(parent.size, -1, dtype=np.int64)
    local[subset] = np.arange(subset.size)
    above = parent[subset]
    local_parent = np.where(above >= 0, local[np.maximum(above, 0)], -1)
    signatures, group = np.unique(member[subset], axis=0, return_inverse=True)
    group = group.reshape(-1)
    n_groups = signatures.shape[0]
    if n_groups <= 1:
        return subset
    child = np.flatnonzero(local_parent >= 0)
    cross = group[local_parent[child]] != group[child]
    edges = set(zip(group[local_parent[child]][cross].tolist(), group[child][cross].tolist()))
    indegree = np.zeros(n_groups, dtype=np.int64)
    successors: dict = {g: [] for g in range(n_groups)}
    for a, b in edges:
        indegree[b] += 1
        successors[a].append(b)
    placed: list = []
    ready = [int(g) for g in np.flatnonzero(indegree == 0)]
    while ready:
        last = signatures[placed[-1]] if placed else signatures[group[0]]
        # most blocks shared with the group just placed; then the lowest group number
        pick = max(ready, key=lambda g: (int(np.sum(signatures[g] & last)), -g))
        if not placed and group[0] in ready:
            pick = int(group[0])  # the first compartment's group (the root's) first
        ready.remove(pick)
        placed.append(pick)
        for b in successors[pick]:
            indegree[b] -= 1
            if indegree[b] == 0:
                ready.append(b)
    if len(placed) < n_groups or placed[0] != group[0]:
        return subset
    rank = np.empty(n_groups, dtype=np.int64)
    rank[np.asarray(placed)] = np.arange(n_groups)
    return subset[np.argsort(rank[group], kind="stable")]


#: Largest share of the step's work a thread may get when the tree is split for the
#: solve, relative to an even share (see :func:`split_tree`).
SPLIT_IMBALANCE_LIMIT = 1.05


def split_tree(parent: np.ndarray, work: np.ndarray, n_parts: int,
               max_top: int | None = None) -> np.ndarray | None:
    """Split a tree into a small top (with the root) and ``n_parts`` parts of about equal work.

    Every part is a union of whole subtrees hanging from the top, so each thread can
    update, eliminate and back-substitute its own part with its own data, and only
    the top is solved serially.  Greedy: the subtrees hanging from the top are dealt
    to the parts heaviest first, each to the part with the least work so far (the
    longest-processing-time rule, Graham 1969, SIAM J Appl Math 17:416-429; the top's
    own work counts towards part 0, whose thread also updates it); while the most
    loaded part exceeds ``SPLIT_IMBALANCE_LIMIT`` times an even share, the heaviest
    subtree's root moves into the top.

    Parameters
    ----------
    parent : ndarray of int64, shape (n,)
        Parent of each compartment (grid order, ``parent[i] < i``), -1 for the root.
    work : ndarray, shape (n,)
        Relative cost of each compartment per step.
    n_parts : int
        Number of parts (threads), at least 2.
    max_top : int, optional
        Most compartments the top may hold (default ``max(16, n // 50)``).

    Returns
    -------
    ndarray of int64, shape (n,), or None
        Part of each compartment (-1 for the top), or None if no split within the
        limits exists.
    """
    parent = np.asarray(parent, dtype=np.int64)
    n = parent.size
    max_top = max(16, n // 50) if max_top is None else max_top
    par = parent.tolist()
    weight = np.asarray(work, dtype=float).tolist()  # becomes each subtree's work
    for i in range(n - 1, 0, -1):
        weight[par[i]] += weight[i]
    children_sorted = np.argsort(parent[1:], kind="stable") + 1
    first = np.searchsorted(parent[children_sorted], np.arange(n + 1), side="left")
    even = weight[0] / n_parts
    top = [0]
    hanging = children_sorted[first[0]:first[1]].tolist()
    while True:
        hanging.sort(key=lambda c: -weight[c])
        loads = [0.0] * n_parts
        loads[0] = weight[0] - sum(weight[c] for c in hanging)  # the top's own work
        assign = {}
        for c in hanging:
            t = loads.index(min(loads))
            loads[t] += weight[c]
            assign[c] = t
        if max(loads) <= SPLIT_IMBALANCE_LIMIT * even:
            break
        if not hanging or len(top) >= max_top:
            return None
        c = hanging.pop(0)  # the heaviest subtree's root joins the top
        top.append(c)
        hanging += children_sorted[first[c]:first[c + 1]].tolist()
    part = np.full(n, -2, dtype=np.int64)
    part[np.asarray(top)] = -1
    for c, t in assign.items():
        part[c] = t
    labels = part.tolist()
    for i in range(1, n):
        if labels[i] == -2:
            labels[i] = labels[par[i]]
    part = np.asarray(labels, dtype=np.int64)
    if any(not np.any(part == t) for t in range(n_parts)):
        return None
    return part


#: Compartments per strip of the gate loops: each thread updates its range strip by
#: strip, every channel block in turn, so the gate scratch (five rows of doubles,
#: 160 kB) stays in the level-2 cache; 128-2048 measured slower (benchmarks/README.md).
STRIP_COMPARTMENTS = 4096


def _strip_bounds(cuts, owners, strip: int):
    """Strips of the gate loops: boundaries, and the strips of each thread.

    Piece ``j`` of the compartments, ``cuts[j] <= i < cuts[j + 1]``, is updated by
    thread ``owners[j]`` (non-decreasing), in strips of at most ``strip``
    compartments that never cross a cut.

    Returns
    -------
    bounds : ndarray of int64
        Increasing kernel positions from 0 to ``n``; strip ``s`` is
        ``bounds[s] <= i < bounds[s + 1]``.
    thread_strips : ndarray of int64, shape (n_threads + 1,)
        Thread ``t`` updates strips ``thread_strips[t] <= s < thread_strips[t + 1]``.
    """
    bounds = [0]
    thread_strips = [0]
    for j, (a, b) in enumerate(zip(cuts[:-1], cuts[1:])):
        k = max(1, -(-(int(b) - int(a)) // strip))
        bounds += [int(a) + (q * (int(b) - int(a))) // k for q in range(1, k)] + [int(b)]
        if j + 1 == len(owners) or owners[j + 1] != owners[j]:
            thread_strips.append(len(bounds) - 1)
    return np.asarray(bounds, dtype=np.int64), np.asarray(thread_strips, dtype=np.int64)


def _compartment_work(n: int, blocks) -> np.ndarray:
    """Relative cost of each compartment per step: 1 (the tree solve) plus, for every
    channel block on it (``blocks``: (channel, compartments) pairs), its number of
    gates plus one (the conductance)."""
    work = np.ones(n)
    for channel, compartments in blocks:
        work[compartments] += len(channel.gates) + 1
    return work


def _chunk_bounds(work: np.ndarray, n_chunks: int) -> np.ndarray:
    """Boundaries splitting compartments of the given work (:func:`_compartment_work`,
    in kernel order) into ``n_chunks`` ranges of about equal total.

    Returns ``n_chunks + 1`` increasing kernel positions from 0 to N.
    """
    cum = np.cumsum(work)
    inner = np.searchsorted(cum, cum[-1] * np.arange(1, n_chunks) / n_chunks)
    return np.concatenate([[0], inner, [work.size]]).astype(np.int64)


#: Largest relative spread of a block's maximal conductance (or of the leak current)
#: over capacitance still read as one ratio: the round-off of density x area /
#: (specific capacitance x area), a few ulp (4.4e-16 measured on the benchmark cells);
#: the kernel's conductances then differ from the reference backend's by as little.
GMAX_PER_CAPACITANCE_RTOL = 1e-12


def _uniform_ratio(numerator: np.ndarray, denominator: np.ndarray) -> float | None:
    """``numerator / denominator`` if it is one number to :data:`GMAX_PER_CAPACITANCE_RTOL`
    (its first element), else None; None for empty arrays or a zero denominator."""
    if numerator.size == 0 or np.any(denominator <= 0.0):
        return None
    ratio = numerator / denominator
    first = float(ratio[0])
    if not np.all(np.abs(ratio - first) <= GMAX_PER_CAPACITANCE_RTOL * abs(first)):
        return None
    return first


#: Fewest compartments per thread for which threads pay off when the tree can be split
#: (:func:`split_tree`): below it (or for a cell without channels, which has no gate
#: loops) a two-thread run was measured no faster than one thread, so the kernel runs
#: serially (HH + A-type, two threads against one: N = 1890 equal, N = 2408 1.38x).
MIN_COMPARTMENTS_PER_THREAD = 1200

#: The same for a tree that cannot be split, where only the gate loops use the threads
#: and the tree solve stays serial (measured before the split existed).
MIN_COMPARTMENTS_PER_THREAD_SERIAL_SOLVE = 2500


class CompiledStepper:
    """Integrates a :class:`CellModel` with the numba kernel.

    Parameters
    ----------
    cell : CellModel
    threads : int
        1 (default) runs serially; 2 or more split the tree into a small top and
        that many parts (:func:`split_tree`), each updated, eliminated and
        back-substituted by one thread of numba's pool, the top serially (if the
        tree cannot be split evenly, only the gate loops are split and the tree
        solve is serial).  Only used where it pays off: a cell with channels and at least
        :data:`MIN_COMPARTMENTS_PER_THREAD` compartments per thread
        (:data:`MIN_COMPARTMENTS_PER_THREAD_SERIAL_SOLVE` if the tree cannot be split); otherwise the
        kernel runs serially (``kernel_threads`` says which).

    Raises
    ------
    SolverError
        When a channel's rate function cannot be compiled (the message names it).
    """

    def __init__(self, cell: CellModel, threads: int = 1):
        self.cell = cell
        self.threads = check_threads(threads)
        grid = cell.grid
        n = cell.n_compartments
        pays_off = bool(cell.channels) and n >= MIN_COMPARTMENTS_PER_THREAD * self.threads
        self.kernel_threads = self.threads if pays_off else 1
        grid_parent = np.asarray(grid.parent, dtype=np.int64)
        block_indices = [np.asarray(b.index, dtype=np.int64) for b in cell.channels]
        # with threads, the tree is split into a small top and one part per thread
        # where that can be done evenly: each thread then also eliminates and
        # back-substitutes its own part (split_tree); else the tree solve is serial
        work = _compartment_work(n, zip((b.channel for b in cell.channels), block_indices))
        part = None
        if self.kernel_threads > 1:
            part = split_tree(grid_parent, work, self.kernel_threads)
            if part is None and n < MIN_COMPARTMENTS_PER_THREAD_SERIAL_SOLVE * self.threads:
                self.kernel_threads = 1
        self.n_parts = 1 if part is None else self.kernel_threads
        # the kernel numbers compartments its own way (kernel_order): every
        # per-compartment array below is in that order, and run() maps states,
        # inputs and records between it and the grid's order
        self.order = kernel_order(grid_parent, block_indices, part)
        self.position = np.empty(n, dtype=np.int64)
        self.position[self.order] = np.arange(n)
        order = self.order
        g = np.ascontiguousarray(cell.axial_conductance_uS[order], dtype=float)
        self.offdiag = -g
        parent = grid_parent[order]
        parent[1:] = self.position[parent[1:]]
        self.parent = np.ascontiguousarray(parent, dtype=np.int32)  # less memory traffic than int64
        leak_g = np.ascontiguousarray(cell.leak_uS[order], dtype=float)
        # the diagonal's terms that never change (leak and axial coupling), µS,
        # and the leak's current, nA: each step's system starts from them
        self.static_diag = leak_g + cell.axial_diagonal_uS[order]
        self.leak_j = leak_g * cell.leak_reversal_mV[order]
        self.cap = np.ascontiguousarray(cell.capacitance_nF[order], dtype=float)
        # the leak current is one number times the capacitance (nA/nF) for a uniform
        # leak on a uniform specific capacitance: the kernel then reads no leak array
        self.leak_per_capacitance = _uniform_ratio(self.leak_j, self.cap)
        self.channels = tuple(b.channel for b in cell.channels)
        # block entries sorted by kernel position; entry_order[b] maps them to the
        # block's own (grid) entry order, in which gate states are stored
        self.entry_order = []
        positions = []
        for index in block_indices:
            pos = self.position[index]
            e = np.argsort(pos, kind="stable")
            self.entry_order.append(e)
            positions.append(np.ascontiguousarray(pos[e]))
        if part is None:
            self.part_bounds = np.array([n, n], dtype=np.int64)  # no parts: all serial
            self.thread_ranges = _chunk_bounds(work[order], self.kernel_threads)
            self.eparent = self.parent
            self.slot_stride = 0
        else:
            # top, then part t at part_bounds[t] <= i < part_bounds[t + 1]; thread 0
            # updates the top with its part
            counts = np.bincount(part + 1, minlength=self.n_parts + 1)
            self.part_bounds = np.cumsum(counts).astype(np.int64)
            self.thread_ranges = np.concatenate([[0], self.part_bounds[1:]]).astype(np.int64)
            m = int(self.part_bounds[0])
            # each thread's slots for what its part gives the top, a multiple of 8
            # doubles apart (no two threads write the same cache line)
            self.slot_stride = -(-m // 8) * 8 + 8
            eparent = self.parent.astype(np.int64)
            to_top = np.flatnonzero((np.arange(n) >= m) & (eparent < m))
            eparent[to_top] += n + self._thread_of(to_top) * self.slot_stride
            self.eparent = np.ascontiguousarray(eparent, dtype=np.int32)
        # strips never cross a thread's range or the top's end
        cuts = np.unique(np.concatenate([self.thread_ranges, self.part_bounds[:1]]))
        owners = np.searchsorted(self.thread_ranges[1:], cuts[:-1], side="right")
        bounds, self.thread_strips = _strip_bounds(cuts, owners, STRIP_COMPARTMENTS)
        self.strip_bounds = bounds
        self.max_strip = int(max(1, np.max(np.diff(bounds))))
        self.block_static = []
        for block, idx, e in zip(cell.channels, positions, self.entry_order):
            split = np.searchsorted(idx, bounds).astype(np.int64)
            # the block's entries of every strip are one run of compartments
            first, last = split[:-1], split[1:] - 1
            has = last >= first
            contig = bool(np.all(idx[last[has]] - idx[first[has]] == last[has] - first[has]))
            self.block_static.append((
                idx, split, contig,
                np.ascontiguousarray(np.asarray(block.parameters, dtype=float).reshape(
                    len(block.channel.parameter_names), idx.size)[:, e]),
                np.ascontiguousarray(np.asarray(block.gmax_uS, dtype=float)[e]),
                np.ascontiguousarray(np.asarray(block.reversal_mV, dtype=float)[e]),
                float(block.channel.temperature_factor(cell.celsius))))
        self.contiguous = tuple(bs[2] for bs in self.block_static)
        # maximal conductance (µS) over capacitance (nF) of each block where that
        # ratio is one number (a uniform density on a uniform specific capacitance)
        # and the block is contiguous; else None (the kernel reads the block's array)
        self.gmax_per_capacitance = tuple(
            _uniform_ratio(gm, self.cap[idx]) if contig else None
            for idx, _, contig, _, gm, _, _ in self.block_static)
        self.per_capacitance = tuple(r is not None for r in self.gmax_per_capacitance)
        self.uniform = tuple((is_uniform(er), tuple(is_uniform(row) for row in par))
                             for _, _, _, par, _, er, _ in self.block_static)
        # without channels or synapses the matrix changes only with the step size,
        # so the kernel factors it once and then eliminates right-hand sides only
        self.fixed_matrix = not cell.channels and not cell.synapses
        self._kernels = {}
        self._table_cache = {}
        self.n_steps_done = 0

    def kernel(self, tabulated: tuple | None = None):
        """The compiled time loop for this cell's channel set (loaded or built on first use).

        ``tabulated[b]`` selects rate-table lookups for block ``b`` (default: none).
        """
        tabulated = (False,) * len(self.channels) if tabulated is None else tuple(tabulated)
        if tabulated not in self._kernels:
            try:
                self._kernels[tabulated] = _load_kernel(self.channels, self.contiguous,
                                                        self.kernel_threads, tabulated,
                                                        self.uniform, self.per_capacitance,
                                                        self.leak_per_capacitance is not None)
            except SolverError:
                raise
            except Exception as exc:
                raise _diagnose(self.channels, self.cell.celsius, exc) from exc
        return self._kernels[tabulated]

    def prepare(self, settings: RunSettings) -> None:
        """Load (or compile, the first time for this channel set) the kernel ``settings`` need."""
        tables = tables_for_settings(self.cell, settings, self._table_cache)
        self.kernel(tuple(t is not None for t in tables))

    def _thread_of(self, positions: np.ndarray) -> np.ndarray:
        """The thread whose range holds each kernel position."""
        return np.searchsorted(self.thread_ranges[1:], positions, side="right")

    def _by_thread(self, compartments: np.ndarray):
        """Entries of ``compartments`` (kernel positions) grouped by the thread whose
        range holds them: (pointer of shape (threads + 1,), entries in order)."""
        owner = self._thread_of(compartments)
        entries = np.argsort(owner, kind="stable").astype(np.int64)
        ptr = np.searchsorted(owner[entries], np.arange(self.kernel_threads + 1), side="left")
        return np.ascontiguousarray(ptr, dtype=np.int64), entries

    def run(self, settings: RunSettings, sched: StepSchedule, state: SolverState,
            record_index: np.ndarray):
        """Integrate ``sched.n_steps`` steps from ``state``.

        Returns
        -------
        (v_records, final_state) : (ndarray of shape (n_records, n_sites), SolverState)
        """
        tables = tables_for_settings(self.cell, settings, self._table_cache)
        kernel = self.kernel(tuple(t is not None for t in tables))
        pos = self.position
        v = np.ascontiguousarray(np.asarray(state.v_mV, dtype=float)[self.order])
        gates = [np.ascontiguousarray(
                     np.asarray(x, dtype=float).reshape(len(b.channel.gates), b.index.size)[:, e])
                 for b, x, e in zip(self.cell.channels, state.gates, self.entry_order)]
        syn = _flat_synapses(self.cell, sched, pos)
        n_syn = syn["syn_comp"].size
        sa = np.concatenate([s[0] for s in state.synapse_states]) if n_syn else np.zeros(0)
        sb = np.concatenate([s[1] for s in state.synapse_states]) if n_syn else np.zeros(0)
        sa = np.ascontiguousarray(sa, dtype=float)
        sb = np.ascontiguousarray(sb, dtype=float)
        dt = sched.dt_ms
        decay = {}
        for name, h in (("full", dt), ("half", 0.5 * dt)):
            decay[f"ea_{name}"] = np.exp(-h / syn["syn_tau_a"])
            decay[f"eb_{name}"] = np.exp(-h / syn["syn_tau_b"])
        rec_idx = np.ascontiguousarray(pos[np.asarray(record_index, dtype=np.int64)])
        records = np.empty((sched.n_records, rec_idx.size))
        m = sched.injection_compartment.size
        inj_mid = np.ascontiguousarray(sched.injection_mid_nA, dtype=float).reshape(sched.n_steps, m)
        inj_end = np.ascontiguousarray(sched.injection_end_nA, dtype=float).reshape(sched.n_steps, m)
        inj_comp = np.ascontiguousarray(pos[np.asarray(sched.injection_compartment, dtype=np.int64)])
        block_args = []
        for x, (idx, split, _, par, gm, er, phi), table, ratio in zip(
                gates, self.block_static, tables, self.gmax_per_capacitance):
            if table is None:
                tb, tv = _NO_TABLE, _NO_TABLE_CONSTANTS
            else:
                tb = np.ascontiguousarray(table.values)
                tv = table.lookup_constants()
            block_args += [x, idx, split, par, gm, 1.0 if ratio is None else ratio, er, phi, tb, tv]
        args = (sched.n_steps, float(dt), settings.method == "crank_nicolson",
                np.ascontiguousarray(sched.smoothing, dtype=np.bool_),
                float(settings.max_abs_v_mV), int(sched.record_every), float(state.gate_lag_ms),
                self.fixed_matrix,
                self.cap, self.static_diag,
                self.leak_j if self.leak_per_capacitance is None
                else np.array([self.leak_per_capacitance]),
                self.offdiag, self.parent,
                v, records, rec_idx, inj_comp, inj_mid, inj_end,
                syn["syn_comp"], syn["syn_kind"], syn["syn_tau_a"], syn["syn_tau_b"],
                syn["syn_rev"], syn["syn_mg"], syn["syn_weight"], sa, sb,
                decay["ea_full"], decay["eb_full"], decay["ea_half"], decay["eb_half"],
                syn["ev_ptr"], syn["ev_syn"], syn["ev_off"], syn["ev_first"],
                self.n_parts, self.part_bounds, self.eparent, self.slot_stride,
                *self._by_thread(syn["syn_comp"]), *self._by_thread(inj_comp),
                self.thread_strips, self.strip_bounds, self.max_strip, float(self.cell.celsius),
                *block_args)
        try:
            bad_step, bad_comp, n_rec, lag = kernel(*args)
        except numba.core.errors.NumbaError as exc:
            raise _diagnose(self.channels, self.cell.celsius, exc) from exc
        if bad_step >= 0:
            t = sched.t0_ms + (bad_step + 1) * dt
            limit = settings.max_abs_v_mV
            c = int(self.order[bad_comp])
            raise NumericalInstabilityError(
                f"membrane potential {float(v[bad_comp])!r} mV at compartment {c} (path distance "
                f"{self.cell.grid.path_distance_um[c]:.1f} µm) at t = {t:.6g} ms is NaN or "
                f"beyond ±{limit} mV; reduce dt_ms or check the channel densities",
                time_ms=t, compartment=c)
        self.n_steps_done += sched.n_steps
        split = np.cumsum([g.compartment.size for g in self.cell.synapses])[:-1]
        syn_states = tuple(np.array([a, b]) for a, b in zip(np.split(sa, split), np.split(sb, split)))
        grid_gates = []
        for x, e in zip(gates, self.entry_order):
            xg = np.empty_like(x)
            xg[:, e] = x
            grid_gates.append(xg)
        final = SolverState(sched.t0_ms + sched.n_steps * dt, v[pos], tuple(grid_gates), float(lag),
                            syn_states, tuple(b.channel.name for b in self.cell.channels))
        return records[:n_rec], final
