"""A JSON object kept as its compact text: :class:`JSONText`, a read-only mapping that decodes on first read.

A check's coordinator holds every model's payload until its verdicts are saved, and the ``charts`` block
(~3,000 floats a model) is most of a payload: ~85 KB as Python float lists, about 30 KB as JSON text. The
worker that builds a payload encodes that block once (:func:`as_json_text`); the coordinator then holds
bytes, a process pool or Dask ships bytes (a :class:`JSONText` pickles as its text), and the store writes
the text verbatim into the verdict row (``drift.store._strict_json`` splices it, so the row is the text the
whole payload would have given). Whoever reads ``payload["charts"][...]`` gets the decoded values, as before.

The text is orjson's with :data:`ORJSON_OPTIONS`, the options of the verdict rows, so spliced or encoded
whole the stored JSON is the same. Without orjson (or for a block orjson refuses) the block stays a plain
dict: nothing changes but the memory.

The standard :mod:`json` encoder does not know this type (``json.dumps(..., default=str)`` would write its
``str()``); encode with :func:`json_default` as ``default=``, or copy :meth:`JSONText.decoded` first.
"""

from __future__ import annotations

import json
from collections.abc import Iterator, Mapping
from typing import Any

try:
    import orjson as _orjson
except ImportError:  # pragma: no cover - orjson is a dependency
    _orjson = None  # type: ignore[assignment]

#: orjson options of the text: those of the verdict rows (numpy values as numbers, non-str keys as strings;
#: NaN and infinities are written null)
ORJSON_OPTIONS = (_orjson.OPT_SERIALIZE_NUMPY | _orjson.OPT_NON_STR_KEYS) if _orjson is not None else 0


class JSONText(Mapping[str, Any]):
    """A JSON object held as its UTF-8 text; decoded on the first read and kept decoded from then on.

    Compares equal to a mapping with the same decoded items; pickles (and deep-copies) as its text only.
    ``text`` is the encoded object, ``decoded()`` a fresh decoded copy that is not kept.
    """

    __slots__ = ("_text", "_value")

    def __init__(self, text: bytes) -> None:
        if not isinstance(text, bytes):
            raise TypeError(f"JSONText needs the JSON text as bytes, got {type(text).__name__}")
        self._text = text
        self._value: dict[str, Any] | None = None

    @property
    def text(self) -> bytes:
        """The JSON text (UTF-8)."""
        return self._text

    @property
    def is_decoded(self) -> bool:
        """Whether a read has decoded the text (its values are then held as well)."""
        return self._value is not None

    def decoded(self) -> dict[str, Any]:
        """A new decoded copy (not kept: the object stays as small as its text)."""
        value = _orjson.loads(self._text) if _orjson is not None else json.loads(self._text)
        if not isinstance(value, dict):
            raise TypeError(f"JSONText holds a JSON object, not {type(value).__name__}")
        return value

    def _data(self) -> dict[str, Any]:
        if self._value is None:
            self._value = self.decoded()
        return self._value

    def __getitem__(self, key: str) -> Any:
        return self._data()[key]

    def __iter__(self) -> Iterator[str]:
        return iter(self._data())

    def __len__(self) -> int:
        return len(self._data())

    def __contains__(self, key: object) -> bool:
        return key in self._data()

    def __eq__(self, other: object) -> bool:
        if isinstance(other, JSONText):
            return self._text == other._text or self._data() == other._data()
        if isinstance(other, dict):
            return self._data() == other
        if isinstance(other, Mapping):
            return self._data() == dict(other.items())
        return NotImplemented

    __hash__ = None  # type: ignore[assignment]  # a mapping: unhashable, like dict

    def __reduce__(self) -> tuple[Any, tuple[bytes]]:
        return (type(self), (self._text,))

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self._text.decode()})"


def as_json_text(obj: Mapping[str, Any]) -> Mapping[str, Any]:
    """``obj`` as a :class:`JSONText` of its orjson text (:data:`ORJSON_OPTIONS`); ``obj`` itself when
    orjson is not installed or refuses it (an integer beyond 64 bits, an unknown type)."""
    if _orjson is None:
        return obj
    try:
        return JSONText(_orjson.dumps(obj, option=ORJSON_OPTIONS))
    except TypeError:  # orjson.JSONEncodeError is a TypeError
        return obj


def json_default(obj: Any) -> Any:
    """``default=`` of the standard encoder: a :class:`JSONText` as its decoded object, else ``str(obj)``
    (what ``default=str`` did)."""
    if isinstance(obj, JSONText):
        return obj.decoded()
    return str(obj)
