"""Compiling small hot loops with numba, lazily and with a safe fallback.

Several fits evaluate a recursion over the whole history dozens of times. Those inner
loops are written once as plain Python over floats (the *interpreted twin*, which tests
compare against the numpy or statsmodels reference) and compiled here on first use.
Importing numba takes about a second and the interface and short advances never need
it, so nothing is compiled at import time. numba's on-disk cache needs a writable folder
beside the module; without one the kernel is compiled in memory for this process. If
numba cannot be imported at all, callers get ``None`` and use the interpreted function:
the same numbers, slower.
"""
from __future__ import annotations

from collections.abc import Callable

# Below this many rows callers use the interpreted function: compiling costs about a
# second per kernel and process when the on-disk cache is cold, and short passes are cheap.
MIN_ROWS = 400

_made: dict[Callable, Callable | None] = {}


def compiled(fn: Callable, probe: tuple) -> Callable | None:
    """``fn`` compiled by numba (made once per process), or None without numba.

    ``probe`` is a call with the argument types of real use; it triggers the compilation
    (or the cache load) here, so a failure falls back instead of surfacing mid-fit.
    """
    if fn in _made:
        return _made[fn]
    _made[fn] = None
    try:
        from numba import njit
    except ImportError:  # pragma: no cover - numba is a declared dependency
        return None
    for cache in (True, False):
        try:
            jitted = njit(cache=cache, nogil=True)(fn)
            jitted(*probe)
        except Exception:  # pragma: no cover - depends on the machine's folders
            continue
        _made[fn] = jitted
        break
    return _made[fn]


def prepare_all() -> dict[str, float]:
    """Compile (or load from numba's on-disk cache) every kernel of the estimation layer.

    Returns seconds per kernel. The benchmark calls this before it times anything: the
    first run after an install, or after a kernel's source changed, compiles for several
    seconds, and that one-off cost is not what a refit costs. With the on-disk cache
    writable, every later process only loads the kernels.
    """
    import time

    from tracker.estimation import gaussian_hmm, kim_compiled, local_level, regime_em_compiled

    seconds = {}
    for name, make in (("local level filter", local_level._compiled_loop),
                       ("regime EM pass", regime_em_compiled.kernel),
                       ("Kim filter pass", kim_compiled.compiled),
                       ("market EM pass", gaussian_hmm.kernel)):
        t0 = time.perf_counter()
        make()
        seconds[name] = time.perf_counter() - t0
    return seconds
