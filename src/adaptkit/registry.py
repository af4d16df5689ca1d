"""A name → factory table, one per kind of component (methods, encoders, heads, shifts).

A component registers itself at import with ``@REGISTRY.register("name")``; ``REGISTRY.get(name)`` returns the
factory or raises a ``ValueError`` that lists the accepted names. The registry name is also the config name
(``method=dann``, its schema built from the component's own ``Options``) and the file name (``methods/dann.py``).
"""
from __future__ import annotations

import importlib
import os
import re
import sys
from typing import Any, Callable, Dict, Generic, List, TypeVar

T = TypeVar("T")
_IMPORT_PATH = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)+$")


class Registry(Generic[T]):
    def __init__(self, kind: str):
        self.kind = kind  # e.g. "method": used in error messages
        self._table: Dict[str, T] = {}

    def register(self, name: str) -> Callable[[T], T]:
        def deco(obj: T) -> T:
            if name in self._table and self._table[name] is not obj:
                raise ValueError(f"{self.kind} {name!r} is registered twice")
            self._table[name] = obj
            return obj

        return deco

    def get(self, name: str) -> T:
        if not isinstance(name, str):
            raise TypeError(f"The {self.kind} name must be a string; got {type(name).__name__} {name!r}.")
        try:
            return self._table[name]
        except KeyError:
            raise ValueError(
                f"Unknown {self.kind} {name!r}. Available {self.kind}s: {', '.join(self.names())}."
            ) from None

    def names(self) -> List[str]:
        return sorted(self._table)

    def __contains__(self, name: object) -> bool:
        return name in self._table


def import_object(path: str) -> Any:
    """The object named by ``'package.module.attribute'``. A module in the current directory is found too (as
    ``python -m`` would find it): the directory is appended to ``sys.path``, last, so it never shadows an installed
    package. Importing runs the module's code: a config naming one deserves the same care as code.

    Raises ImportError or AttributeError (callers turn them into errors that name their parameter).
    """
    mod_name, _, attr = path.rpartition(".")
    if not isinstance(path, str) or not _IMPORT_PATH.match(path):
        raise ImportError(f"{path!r} is not of the form 'package.module.attribute' (dotted Python names)")
    cwd = os.getcwd()
    if cwd not in sys.path and "" not in sys.path:
        sys.path.append(cwd)
    return getattr(importlib.import_module(mod_name), attr)
