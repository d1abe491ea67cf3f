"""The base of every analysis result: a frozen dataclass with a short, readable repr.

The repr shows arrays by shape (never their contents), floats to four significant digits, and
small dicts and strings as they are, so a result printed in a notebook or a log stays one line.
"""

from __future__ import annotations

import dataclasses

import numpy as np


def _short(value) -> str:
    if value is None:
        return "None"
    if isinstance(value, np.ndarray):
        if value.ndim == 0:
            return _short(value.item())
        return f"array{tuple(value.shape)}"
    if isinstance(value, bool | np.bool_):
        return str(bool(value))
    if isinstance(value, int | np.integer):
        return str(int(value))
    if isinstance(value, float | np.floating):
        return f"{float(value):.4g}"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{k!r}: {_short(v)}" for k, v in value.items()) + "}"
    if isinstance(value, tuple):
        return "(" + ", ".join(_short(v) for v in value) + ("," if len(value) == 1 else "") + ")"
    if isinstance(value, str):
        return repr(value)
    return type(value).__name__


class Result:
    """Mixin for frozen dataclasses: ``Name(field=short, ...)`` with arrays shown by shape."""

    def __repr__(self) -> str:
        parts = [
            f"{f.name}={_short(getattr(self, f.name))}"
            for f in dataclasses.fields(self)
            if f.repr
        ]
        return f"{type(self).__name__}({', '.join(parts)})"


# -- saving a result and reading it back, every field as it was ---------------------------------
#: Where the classes of a record may come from: a record names its classes, and only frozen
#: `Result` dataclasses of this package are rebuilt from it.
_PACKAGE = "ntkcalc."


def _encode(value, arrays: dict, where: str):
    """``value`` as JSON-ready data; its arrays go into ``arrays`` under the keys it names."""
    if value is None or isinstance(value, bool | str):
        return value
    if type(value) in (int, float):
        return value
    if isinstance(value, np.ndarray | np.generic):
        arr = np.asarray(value)
        if arr.dtype.hasobject:
            raise TypeError(f"{where} is an array of Python objects; a record holds numbers.")
        key = f"a{len(arrays)}"
        arrays[key] = arr
        return {"__array__": key, "scalar": isinstance(value, np.generic)}
    if isinstance(value, tuple):
        return {"__tuple__": [_encode(v, arrays, f"{where}[{i}]") for i, v in enumerate(value)]}
    if isinstance(value, list):
        return [_encode(v, arrays, f"{where}[{i}]") for i, v in enumerate(value)]
    if isinstance(value, dict):
        return {"__dict__": [[_encode(k, arrays, f"{where} key"), _encode(v, arrays,
                                                                           f"{where}[{k!r}]")]
                             for k, v in value.items()]}
    cls = type(value)
    if isinstance(value, Result) and dataclasses.is_dataclass(value) and (
            cls.__module__.startswith(_PACKAGE)):
        return {"__type__": f"{cls.__module__}:{cls.__qualname__}",
                "fields": {f.name: _encode(getattr(value, f.name), arrays, f"{where}.{f.name}")
                           for f in dataclasses.fields(value)}}
    raise TypeError(f"{where} is a {cls.__name__}, which a record cannot hold.")


def _decode(tree, arrays):
    if isinstance(tree, list):
        return [_decode(v, arrays) for v in tree]
    if not isinstance(tree, dict):
        return tree
    if "__array__" in tree:
        arr = arrays[tree["__array__"]]
        return arr[()] if tree["scalar"] else arr
    if "__tuple__" in tree:
        return tuple(_decode(v, arrays) for v in tree["__tuple__"])
    if "__dict__" in tree:
        return {_decode(k, arrays): _decode(v, arrays) for k, v in tree["__dict__"]}
    module, _, name = tree["__type__"].partition(":")
    if not module.startswith(_PACKAGE):
        raise ValueError(f"the record names the class {tree['__type__']!r}, not one of ntkcalc's.")
    import importlib

    cls = getattr(importlib.import_module(module), name, None)
    if not (isinstance(cls, type) and issubclass(cls, Result) and dataclasses.is_dataclass(cls)):
        raise ValueError(f"the record names {tree['__type__']!r}, which is no ntkcalc result.")
    return cls(**{k: _decode(v, arrays) for k, v in tree["fields"].items()})


def save_record(value, path) -> None:
    """Save ``value`` (results, tuples, dicts, arrays, numbers, strings) to the ``.npz`` file
    ``path``: the structure as JSON, every array as it is (dtype and shape kept), no pickle."""
    import json

    arrays: dict = {}
    tree = _encode(value, arrays, "the result")
    np.savez(path, __record__=np.array(json.dumps(tree, allow_nan=True)), **arrays)


def read_record(path):
    """What `save_record` saved at ``path``, every field and array as it was."""
    import json

    with np.load(path, allow_pickle=False) as data:
        arrays = {k: data[k] for k in data.files}
    return _decode(json.loads(str(arrays.pop("__record__"))), arrays)
