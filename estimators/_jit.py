"""The one numba decorator of the project.

Every compiled kernel is declared with :func:`kernel`. Setting the environment variable
``RIDGEWATCH_NO_JIT=1`` (before import) turns every kernel into its plain Python
function, which is how the test suite checks the kernels against their plain path;
each compiled kernel also keeps that plain function as ``.py_func``.

``cache=True`` keeps compiled code between runs (first import compiles, about a few
seconds); ``fastmath`` stays off so compiled and plain paths agree to rounding.
"""

from __future__ import annotations

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


def kernel(func):
    """Compile ``func`` with numba in nopython mode, or return it unchanged when JIT is off."""
    if not JIT_ENABLED:
        func.py_func = func
        return func
    return numba.njit(cache=True, fastmath=False, nogil=True)(func)
