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
#: The layout of a record (``{"format", "ntkcalc", "tree"}``); raised when the layout changes.
RECORD_FORMAT = 1


class OtherVersionError(ValueError):
    """A record written by another version of ntkcalc, whose results had other fields (or other
    classes) than this version's: it cannot be read back as it was. ``written_by`` is the
    version that wrote it (None for a record from before records named their version);
    ``detail`` says what differs."""

    def __init__(self, detail: str, written_by: str | None):
        from .._version import __version__

        self.detail, self.written_by = detail, written_by
        by = ("an earlier ntkcalc, one that did not record its version" if written_by is None
              else f"ntkcalc {written_by}")
        super().__init__(f"written by {by}; this is ntkcalc {__version__}: {detail}")


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


def _decode(tree, arrays, version):
    if isinstance(tree, list):
        return [_decode(v, arrays, version) for v in tree]
    if not isinstance(tree, dict):
        return tree
    if "__array__" in tree:
        arr = arrays[tree["__array__"]]
        return arr[()] if tree["scalar"] else arr
    if "__tuple__" in tree:
        return tuple(_decode(v, arrays, version) for v in tree["__tuple__"])
    if "__dict__" in tree:
        return {_decode(k, arrays, version): _decode(v, arrays, version)
                for k, v in tree["__dict__"]}
    cls = _result_class(tree["__type__"], version)
    _check_fields(cls, tree["fields"], version)
    return cls(**{k: _decode(v, arrays, version) for k, v in tree["fields"].items()})


def _result_class(named: str, version):
    """The result class a record names; one this version lacks was another version's."""
    import importlib

    module, _, name = named.partition(":")
    if not module.startswith(_PACKAGE):
        raise ValueError(f"the record names the class {named!r}, not one of ntkcalc's.")
    try:
        cls = getattr(importlib.import_module(module), name, None)
    except ModuleNotFoundError:
        cls = None
    if cls is None:
        raise OtherVersionError(f"its result class {named} is not in this version", version)
    if not (isinstance(cls, type) and issubclass(cls, Result) and dataclasses.is_dataclass(cls)):
        raise ValueError(f"the record names {named!r}, which is no ntkcalc result.")
    return cls


def _check_fields(cls, saved: dict, version) -> None:
    """The record's fields of ``cls`` against this version's: a field this version lacks, or
    one it requires and the record lacks, means another version wrote it."""
    fields = {f.name: f for f in dataclasses.fields(cls)}
    unknown = [n for n in saved if n not in fields]
    missing = [n for n, f in fields.items() if n not in saved and f.init
               and f.default is dataclasses.MISSING
               and f.default_factory is dataclasses.MISSING]
    if unknown or missing:
        what = "; ".join(part for part in (
            unknown and f"fields {', '.join(unknown)} that this version's lacks",
            missing and f"no fields {', '.join(missing)}, which this version's requires") if part)
        raise OtherVersionError(f"its {cls.__name__} has {what}", version)


def save_record(value, path) -> None:
    """Save ``value`` (results, tuples, dicts, arrays, numbers, strings) to the ``.npz`` file
    ``path``: the structure as JSON, every array as it is (dtype and shape kept), no pickle."""
    import json

    from .._version import __version__

    arrays: dict = {}
    tree = _encode(value, arrays, "the result")
    record = {"format": RECORD_FORMAT, "ntkcalc": __version__, "tree": tree}
    np.savez(path, __record__=np.array(json.dumps(record, allow_nan=True)), **arrays)


def read_record(path):
    """What `save_record` saved at ``path``, every field and array as it was.

    Raises:
        OtherVersionError: the record was written by a version of ntkcalc whose results had
            other fields or classes, or in another record layout (the message says which).
        ValueError, KeyError, OSError: the file is no record, or a damaged one.
    """
    import json

    with np.load(path, allow_pickle=False) as data:
        arrays = {k: data[k] for k in data.files}
    record = json.loads(str(arrays.pop("__record__")))
    if isinstance(record, dict) and "format" in record:
        version = record.get("ntkcalc")
        if record["format"] != RECORD_FORMAT:
            raise OtherVersionError(f"its record layout is format {record['format']!r}, this "
                                    f"version reads format {RECORD_FORMAT}", version)
        return _decode(record["tree"], arrays, version)
    return _decode(record, arrays, None)  # from before records named their version
