"""A parallel kernel and its one-thread twin, compiled only when each is first used.

Compiling a kernel with ``parallel=...`` costs about two and a half times the CPU of the same
body compiled serially (measured on this project's real-space, structure-factor and reciprocal
kernels: 26 s against 10 s of one core in all, see benchmarks/startup.py). The Python side runs
small jobs on one thread (``geometry.thread_budget``), and a first command on a new machine is
almost always a small job; so each parallel kernel gets a serial twin, the same function compiled
with ``parallel=False`` (``prange`` is then ``range``, and the work is still split into the same
fixed chunks, so the sums are added in the same order), used whenever Numba runs on one thread.
Each twin is compiled and cached on its first call only.

References
----------
S. K. Lam, A. Pitrou, S. Seibert, *Numba: a LLVM-based Python JIT compiler*, Proc. LLVM-HPC (2015)
(``parallel=True`` and the on-disk cache).
"""

import types

from numba import get_num_threads, njit


def _renamed(function, suffix):
    """A copy of ``function`` under another qualified name, so that its on-disk cache entries (named
    after the function) stay apart from those of the original."""
    copy = types.FunctionType(function.__code__, function.__globals__, function.__name__ + suffix,
                              function.__defaults__, function.__closure__)
    copy.__qualname__ = function.__qualname__ + suffix
    copy.__doc__, copy.__module__ = function.__doc__, function.__module__
    copy.__kwdefaults__ = function.__kwdefaults__
    return copy


class SerialOnOneThread:
    """Calls the serial twin when Numba runs on one thread, else the parallel kernel.

    Every other attribute (``py_func``, ``signatures``, ``targetoptions``, ``compile`` ...) is the
    parallel dispatcher's; :attr:`serial` is the twin.
    """

    def __init__(self, parallel, serial):
        self.parallel, self.serial = parallel, serial
        self.__doc__, self.__name__, self.__wrapped__ = parallel.__doc__, parallel.__name__, parallel.py_func

    def __call__(self, *args):
        return (self.serial if get_num_threads() == 1 else self.parallel)(*args)

    def __getattr__(self, name):
        return getattr(self.parallel, name)

    def __repr__(self):
        return f"<parallel kernel {self.parallel.py_func.__qualname__} with a one-thread twin>"


def parallel_kernel(**options):
    """Like ``numba.njit(**options)`` (with ``parallel`` set), plus a one-thread twin; for kernels
    called from Python only (another kernel cannot call the returned object)."""
    def decorate(function):
        serial = dict(options, parallel=False)
        return SerialOnOneThread(njit(**options)(function), njit(**serial)(_renamed(function, "_one_thread")))
    return decorate
