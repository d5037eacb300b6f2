"""Stationfit: least-squares adjustment of survey control networks."""

import sys

if "scipy" not in sys.modules:  # before anything imports scipy; see the module's note
    from server._deferred_numpy import defer_unused_numpy_modules

    defer_unused_numpy_modules()

__version__ = "0.1.0"
