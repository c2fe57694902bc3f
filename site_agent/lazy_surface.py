"""One way for a package to expose its public surface: names imported on first use.

Each package's ``__init__`` lists its public names and the module that defines each, then
calls :func:`lazy_surface` (PEP 562 module ``__getattr__`` and ``__dir__``). Importing a
package therefore costs nothing until a name is used, so ``import coordinator`` does not
load torch, Flower or OpenDP. A ``TYPE_CHECKING`` block beside the mapping gives type
checkers the same names.
"""

from __future__ import annotations

import importlib
import sys
from collections.abc import Callable, Mapping
from typing import Any


def lazy_surface(
    package: str, exports: Mapping[str, str]
) -> tuple[Callable[[str], Any], Callable[[], list[str]]]:
    """Return the ``__getattr__`` and ``__dir__`` of *package* for the names in *exports*.

    Parameters
    ----------
    package
        The package's ``__name__``.
    exports
        Public name -> dotted module that defines it.
    """

    def __getattr__(name: str) -> Any:
        module = exports.get(name)
        if module is None:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        value = getattr(importlib.import_module(module), name)
        vars(sys.modules[package])[name] = value
        return value

    def __dir__() -> list[str]:
        return sorted({*vars(sys.modules[package]), *exports})

    return __getattr__, __dir__
