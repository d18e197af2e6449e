"""Public names of a subpackage that load on first use (PEP 562 module __getattr__).

A subpackage's __init__ maps each public name to the private module it lives in; the
module is imported when the name is first read, so `import plantrig.io` costs almost
nothing and a process imports only what it uses (bench/bench_imports.py).
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterable
from importlib import import_module
from typing import Any


def lazy_names(package: str, home: dict[str, str],
               public: Iterable[str]) -> tuple[Callable[[str], Any], Callable[[], list[str]]]:
    """The ``__getattr__`` and ``__dir__`` of ``package``, whose public name ``n`` lives
    in the module ``package.home[n]``."""
    listed = sorted(public)

    def __getattr__(name: str) -> Any:
        if name not in home:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        value = getattr(import_module(f"{package}.{home[name]}"), name)
        setattr(sys.modules[package], name, value)  # the next lookup is a plain attribute
        return value

    def __dir__() -> list[str]:
        return listed

    return __getattr__, __dir__
