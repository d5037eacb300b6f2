"""Keep numpy's unused submodules from loading at start-up.

scipy (1.14 and later) copies numpy's namespace into its bundled array-API layer with a
star import, and numpy loads every submodule named in its ``__all__`` on first touch: the
Fortran wrapper generator ``numpy.f2py``, ``numpy.testing``, ``numpy.polynomial`` and others.
That costs about 0.08 s of every command, a twentieth of the time of adjusting 100,000
marks, for modules the adjustment never uses. Registering them with the standard
library's ``importlib.util.LazyLoader`` first makes the star import bind module objects
whose code runs only on first attribute access, so they still work if anything uses them.
"""

import importlib.util
import sys

import numpy

# Submodules the adjustment never uses. numpy.random, numpy.fft and numpy.ma are left
# out: scipy touches the first two while importing and scipy.sparse.csgraph the third
# while checking a graph, so deferring them would save nothing.
_DEFERRED = ("f2py", "testing", "polynomial")


def defer_unused_numpy_modules() -> None:
    """Register numpy's unused submodules as lazily loaded, unless already loaded."""
    for name in _DEFERRED:
        qualified = f"numpy.{name}"
        if qualified in sys.modules:
            continue
        spec = importlib.util.find_spec(qualified)
        if spec is None or spec.loader is None:
            continue
        spec.loader = importlib.util.LazyLoader(spec.loader)
        module = importlib.util.module_from_spec(spec)
        sys.modules[qualified] = module
        spec.loader.exec_module(module)
        # Bound on numpy too, so the star import does not go through numpy's
        # module __getattr__, which would import the submodule eagerly.
        setattr(numpy, name, module)
