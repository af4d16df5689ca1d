"""Plain values: the one conversion of configs, summaries and records to JSON/YAML-safe types.

Used wherever something is written to a run folder, compared across processes or hashed: dictionaries (keys as
strings), lists, ``None``, booleans, integers, floats and strings pass through; tuples become lists; numpy scalars
and arrays become numbers and lists; paths and devices become strings; a function or class becomes its import path
``module.qualname`` (which :func:`adaptkit.registry.import_object` resolves back); any other object becomes the
marker ``<module.Class>`` (a description, not something that can be rebuilt).

Example:
    >>> import math
    >>> to_plain({"a": (1, 2.5), 3: math.sqrt})
    {'a': [1, 2.5], '3': 'math.sqrt'}
"""
from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from pathlib import PurePath
from typing import Any


def _qualified(obj: Any) -> str:
    return f"{getattr(obj, '__module__', '?')}.{getattr(obj, '__qualname__', getattr(obj, '__name__', '?'))}"


def to_plain(obj: Any) -> Any:
    """``obj`` as JSON-safe plain values (see the module docstring for each kind)."""
    if obj is None or isinstance(obj, (bool, int, float, str)):
        return obj
    if isinstance(obj, Mapping):  # dict, OmegaConf DictConfig
        return {str(k): to_plain(v) for k, v in obj.items()}
    if isinstance(obj, Sequence) and not isinstance(obj, (str, bytes)):  # list, tuple, ListConfig
        return [to_plain(v) for v in obj]
    if isinstance(obj, PurePath):
        return str(obj)
    if type(obj).__module__ == "numpy":
        return to_plain(obj.tolist()) if hasattr(obj, "tolist") else str(obj)
    if type(obj).__module__.startswith("torch") and type(obj).__name__ == "device":
        return str(obj)
    if isinstance(obj, type) or callable(obj) and hasattr(obj, "__qualname__"):
        return _qualified(obj)
    return f"<{type(obj).__module__}.{type(obj).__qualname__}>"


def canonical_json(obj: Any) -> str:
    """One canonical text of ``obj`` (plain values, sorted keys): equal configs give equal texts and hashes."""
    return json.dumps(to_plain(obj), sort_keys=True)
