"""What every kernel shares: point blocks, output buffers, the error for a point on a charge,
and the numba compilation with its cache and its Ctrl-C handling."""

from __future__ import annotations

import contextlib
import signal
import threading

import numba
import numpy as np
from llvmlite import ir
from numba.core import cgutils
from numba.core import types as nb_types
from numba.extending import intrinsic

# Kernels work on blocks of points small enough that their temporaries stay in cache.
_BLOCK_ELEMENTS = 1 << 15


def _blocks(n_points: int, per_point: int):
    """Yield slices of points so that one block's temporaries hold ~_BLOCK_ELEMENTS numbers."""
    step = max(1, _BLOCK_ELEMENTS // max(per_point, 1))
    for start in range(0, n_points, step):
        yield slice(start, min(start + step, n_points))


def _offsets(params: np.ndarray, pts: np.ndarray):
    """Observation point minus source centre, per component: three (S, m, N) arrays."""
    return tuple(np.subtract(pts[None, :, None, k], params[:, None, :, 1 + k]) for k in range(3))


def _jit(fn=None, **extra):
    """Compile ``fn`` once per machine (cached beside the module, or in the user's cache when
    that is read-only); without any writable cache, compile once per process instead.
    ``extra``: more numba options (``@_jit(fastmath=...)``)."""
    if fn is None:
        return lambda f: _jit(f, **extra)
    options = {"nogil": True, "error_model": "numpy", "boundscheck": False, **extra}
    try:
        return numba.njit(cache=True, **options)(fn)
    except RuntimeError:  # numba: "cannot cache function ...: no locator available"
        return numba.njit(**options)(fn)


def _call_compiled(fn, *args):
    """``fn(*args)``; on its first call in this process, with Ctrl-C held until it returns.

    The first call compiles the loop or loads it from numba's cache through callbacks from
    compiled code, where a KeyboardInterrupt would be printed as an ignored exception and
    lost; held, each press is handed to the previous handler once the call is done.
    """
    if (
        fn.overloads  # (a dict: cheaper than `signatures`, a list made anew on every call)
        or threading.current_thread() is not threading.main_thread()  # (signals go to main)
        or signal.getsignal(signal.SIGINT) is None  # a handler not set from Python: leave it
    ):
        return fn(*args)
    with _sigint_held():
        return fn(*args)


@contextlib.contextmanager
def _sigint_held():
    """Hold SIGINT in the block, then hand every press on to the handler that was in place
    before (the default one raises KeyboardInterrupt), also when the block raised."""
    held: list = []
    previous = signal.signal(signal.SIGINT, lambda *a: held.append(a))
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)
        for args in held:
            if callable(previous):
                previous(*args)
            elif previous != signal.SIG_IGN:
                raise KeyboardInterrupt


def _plain(a: np.ndarray) -> bool:
    """A writable C-ordered float64 array: the one layout the compiled loop takes."""
    return a.dtype == np.float64 and a.flags.c_contiguous and a.flags.writeable


def _jac_buffer(shape, want_jac: bool, out: np.ndarray | None, zero: bool = False):
    """The Jacobian output of a kernel: ``out`` when given (reused between calls: no fresh
    pages to fault in), else a new array. ``out`` must have exactly ``shape``."""
    if not want_jac:
        return None
    if out is None:
        return np.zeros(shape) if zero else np.empty(shape)
    if out.shape != shape:
        raise ValueError(f"`out` must have shape {shape}; got {out.shape}.")
    if zero:
        out.fill(0.0)
    return out


def _check_not_on_charge(mask: np.ndarray, pts_block: np.ndarray, blk: slice, what: str) -> None:
    """Raise naming the first point (global index) where ``mask`` (S, m, N) is true."""
    if np.any(mask):
        m = int(np.nonzero(np.any(mask, axis=(0, 2)))[0][0])
        _raise_on_charge(blk.start + m, pts_block[m], what)


_INFINITE_FIELD = (
    "the field is infinite (within 1 nm, as at the charge itself); move the point or use a "
    "finite-size source (sphere, gaussian)."
)


class SingularPointError(ValueError):
    """A point where the field is infinite: on a point charge, a line charge or a charged corner
    of a density grid. A ``ValueError``; the command that read the point (a layout, a config)
    reports it as that input's fault."""


def _raise_on_charge(index: int, point: np.ndarray, what: str, why: str = _INFINITE_FIELD) -> None:
    """One SingularPointError naming point ``index`` (among all points) and the ``what``."""
    raise SingularPointError(
        f"point {index} at ({point[0]:g}, {point[1]:g}, {point[2]:g}) m lies on a {what}, where "
        + why
    )


@intrinsic
def _stream_store(typingctx, arr, i0, i1, i2, i3, value):
    """``arr[i0, i1, i2, i3] = value`` with a non-temporal store, for compiled loops.

    A plain store to memory not in cache first reads the cache line it goes to ("read for
    ownership"), so writing an output larger than the caches moves each byte twice; a
    non-temporal store writes the line out whole (write-combining), about 2x faster for a
    96 MB Jacobian here. For outputs read again soon after (in cache), plain stores are
    better. Stores made this way must be followed by :func:`_store_fence` before another
    thread reads them."""
    sig = nb_types.void(arr, i0, i1, i2, i3, value)

    def codegen(context, builder, signature, args):
        arr_t = signature.args[0]
        ary = context.make_array(arr_t)(context, builder, args[0])
        ptr = cgutils.get_item_pointer(
            context, builder, arr_t, ary, list(args[1:5]), wraparound=False
        )
        value = context.cast(builder, args[5], signature.args[5], arr_t.dtype)
        store = builder.store(value, ptr)
        store.set_metadata("nontemporal", builder.module.add_metadata([ir.IntType(32)(1)]))
        return context.get_dummy_value()

    return sig, codegen


@intrinsic
def _store_fence(typingctx):
    """A full memory fence (orders the non-temporal stores of :func:`_stream_store` before
    what follows)."""

    def codegen(context, builder, signature, args):
        builder.fence("seq_cst")
        return context.get_dummy_value()

    return nb_types.void(), codegen
