"""The one numba decorator of the project.

Every compiled kernel is declared with :func:`kernel`. Setting the environment variable
``RIDGEWATCH_NO_JIT=1`` (before import) turns every kernel into its plain Python
function, which is how the test suite checks the kernels against their plain path;
each compiled kernel also keeps that plain function as ``.py_func``.

``cache=True`` keeps compiled code between runs (first import compiles, about a few
seconds); ``fastmath`` stays off so compiled and plain paths agree to rounding.

When numba finds no writable place for that cache (a read-only install, with no
writable ``__pycache__`` beside this package, ``~/.cache`` or ``NUMBA_CACHE_DIR``), the
kernels are compiled without it, and one warning on the ``"ridgewatch"`` logger says
so: every start then compiles again, which costs seconds, not results. Pointing
``NUMBA_CACHE_DIR`` at a temporary folder instead was not chosen: the folder would be
shared with every other user of the machine (numba loads the cached code it finds
there, so anyone who can write it can plant code), it would have to be set before
numba is imported, and it would override where the user keeps the cache. A user who
wants the cache back sets ``NUMBA_CACHE_DIR`` to a folder of their own.
"""

from __future__ import annotations

import logging
import os

JIT_ENABLED = os.environ.get("RIDGEWATCH_NO_JIT", "") not in ("1", "true", "yes")

if JIT_ENABLED:
    try:
        import numba
    except ImportError:  # pragma: no cover - numba is a declared dependency
        numba = None
        JIT_ENABLED = False
else:
    numba = None

_NO_CACHE_REPORTED = False


def kernel(func):
    """Compile ``func`` with numba in nopython mode, or return it unchanged when JIT is off."""
    if not JIT_ENABLED:
        func.py_func = func
        return func
    try:
        return numba.njit(cache=True, fastmath=False, nogil=True)(func)
    except RuntimeError as exc:
        # numba raises RuntimeError("cannot cache function ...: no locator available")
        # when it finds no writable cache folder; without the cache the same error
        # cannot occur, so anything else raises again below.
        compiled = numba.njit(cache=False, fastmath=False, nogil=True)(func)
        _report_no_cache(exc)
        return compiled


def _report_no_cache(exc: Exception) -> None:
    global _NO_CACHE_REPORTED
    if _NO_CACHE_REPORTED:
        return
    _NO_CACHE_REPORTED = True
    logging.getLogger("ridgewatch").warning(
        "compiled kernels are not cached: numba cannot write its cache (%s); every start "
        "compiles them again (slower start, same results). Set NUMBA_CACHE_DIR to a "
        "writable folder to keep them", exc)
