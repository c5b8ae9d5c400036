"""Reading and writing files: movies (stacks), track tables and atomic writers.

Submodules are imported on use so that ``import msdkit.io`` stays cheap.
"""

from __future__ import annotations

import importlib

_API = {
    "open_stack": "msdkit.io.stacks",
    "StackReader": "msdkit.io.stacks",
}

__all__ = list(_API)


def __getattr__(name: str):
    if name in _API:
        return getattr(importlib.import_module(_API[name]), name)
    raise AttributeError(f"module 'msdkit.io' has no attribute {name!r}")
