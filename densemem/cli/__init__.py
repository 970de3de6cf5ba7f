"""The ``densemem`` command: parse, build an option model, call the library, print. No computation here.

The demo (``densemem demo``) lives here too: an invented scenario that drives
the library end to end.
"""

from ._main import main

__all__ = ["main"]
