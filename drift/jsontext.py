"""A JSON object kept as its compact text: :class:`JSONText`, a read-only mapping that decodes on first read.

A check's coordinator holds every model's payload until its verdicts are saved, and the ``charts`` block
(~3,000 floats a model) is most of a payload: ~85 KB as Python float lists, ~33 KB as JSON text, ~8 KB as
that text compressed (zstd level 1 through pyarrow, a dependency: ~75 us to compress a block, ~45 us to
expand it). The worker that builds a payload encodes that block once (:func:`as_json_text`); the
coordinator then holds the compressed text, a process pool or Dask ships it (a :class:`JSONText` pickles as
those bytes), and the store writes those bytes as they are into the verdict row's ``charts`` column (below),
neither expanded nor encoded again. Whoever reads ``payload["charts"][...]`` gets the decoded values, as
before. A JSONText elsewhere in a payload is spliced into the row's JSON text verbatim
(``drift.store._strict_json``), which is what encoding the decoded block would give.

The text is orjson's with :data:`ORJSON_OPTIONS`, the options of the verdict rows, so spliced or encoded
whole the stored JSON is the same. Without orjson (or for a block orjson refuses) the block stays a plain
dict; without pyarrow's zstd codec the text is held uncompressed.

The store keeps the block in the verdict row's own ``charts`` column as :attr:`JSONText.stored`: the held
bytes behind a header that names how they are held (:data:`STORED_MAGIC`, then ``z`` with the text's length
and the zstd frame, or ``n`` and the text itself); :meth:`JSONText.from_stored` gives them back as a
JSONText that decodes nothing until read, and refuses bytes without that header. :func:`stored_text` is the
one way in for a block that is not a JSONText yet.

The standard :mod:`json` encoder does not know this type (``json.dumps(..., default=str)`` would write its
``str()``); encode with :func:`json_default` as ``default=``, or copy :meth:`JSONText.decoded` first.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Iterator, Mapping
from typing import Any

try:
    import orjson as _orjson
except ImportError:  # pragma: no cover - orjson is a dependency
    _orjson = None  # type: ignore[assignment]

#: orjson options of the text: those of the verdict rows (numpy values as numbers, non-str keys as strings;
#: NaN and infinities are written null)
ORJSON_OPTIONS = (_orjson.OPT_SERIALIZE_NUMPY | _orjson.OPT_NON_STR_KEYS) if _orjson is not None else 0


def _zstd() -> Any:
    try:
        import pyarrow as pa

        return pa.Codec("zstd", compression_level=ZSTD_LEVEL) if pa.Codec.is_available("zstd") else None
    except Exception:  # noqa: BLE001 - no codec: the text is held as it is
        return None


#: zstd level of the held text (1: the fastest; higher levels barely shrink chart JSON further)
ZSTD_LEVEL = 1
#: the codec of the held text, None when pyarrow has no zstd (the text is then held uncompressed)
_CODEC = _zstd()

#: first bytes of :attr:`JSONText.stored` (format 1); the next byte names the codec, :data:`STORED_ZSTD` or
#: :data:`STORED_PLAIN`
STORED_MAGIC = b"DJT1"
#: codec byte: the text's length as 8 bytes little-endian, then one zstd frame of the text
STORED_ZSTD = b"z"
#: codec byte: the text itself
STORED_PLAIN = b"n"


class JSONText(Mapping[str, Any]):
    """A JSON object held as its UTF-8 text (zstd-compressed when the codec is there); decoded on the first
    read and kept decoded from then on.

    Compares equal to a mapping with the same decoded items; pickles (and deep-copies) as its held bytes
    only. ``text`` is the JSON text, ``decoded()`` a fresh decoded copy that is not kept, ``held_bytes`` the
    size of what is held before any read.
    """

    __slots__ = ("_blob", "_size", "_value")

    def __init__(self, text: bytes) -> None:
        if not isinstance(text, bytes):
            raise TypeError(f"JSONText needs the JSON text as bytes, got {type(text).__name__}")
        if _CODEC is not None:
            self._blob: bytes = _CODEC.compress(text, asbytes=True)
            self._size: int | None = len(text)
        else:
            self._blob, self._size = text, None
        self._value: dict[str, Any] | None = None

    @classmethod
    def _held(cls, blob: bytes, size: int | None) -> JSONText:
        """Rebuilt from its held bytes (unpickling): ``size`` is the text's length when ``blob`` is zstd."""
        self = cls.__new__(cls)
        self._blob, self._size, self._value = blob, size, None
        return self

    @property
    def text(self) -> bytes:
        """The JSON text (UTF-8), expanded afresh from what is held."""
        if self._size is None:
            return self._blob
        codec = _CODEC
        if codec is None:  # held compressed by a process that had the codec: one is needed to read it
            import pyarrow as pa

            codec = pa.Codec("zstd")
        return codec.decompress(self._blob, decompressed_size=self._size, asbytes=True)  # type: ignore[no-any-return]

    @property
    def stored(self) -> bytes:
        """The held bytes as the store keeps them, with a header saying how they are held (module docstring):
        nothing is expanded or encoded again."""
        if self._size is None:
            return STORED_MAGIC + STORED_PLAIN + self._blob
        return STORED_MAGIC + STORED_ZSTD + self._size.to_bytes(8, "little") + self._blob

    @classmethod
    def from_stored(cls, data: bytes | bytearray | memoryview) -> JSONText:
        """The JSONText whose :attr:`stored` bytes are ``data``, decoded only when read.

        Raises
        ------
        ValueError
            when ``data`` does not start with :data:`STORED_MAGIC` and a known codec byte.
        """
        data = bytes(data)
        head = len(STORED_MAGIC)
        codec = data[head:head + 1]
        if data[:head] != STORED_MAGIC or codec not in (STORED_ZSTD, STORED_PLAIN):
            raise ValueError(f"not a stored JSON text: starts {data[:head + 1]!r}, expected {STORED_MAGIC!r} and "
                             f"{STORED_ZSTD!r} or {STORED_PLAIN!r} (written by a newer drift?)")
        if codec == STORED_PLAIN:
            return cls._held(data[head + 1:], None)
        if len(data) < head + 9:
            raise ValueError(f"stored JSON text cut short: {len(data)} bytes, its header alone takes {head + 9}")
        return cls._held(data[head + 9:], int.from_bytes(data[head + 1:head + 9], "little"))

    @property
    def held_bytes(self) -> int:
        """Bytes held for the text (compressed or not), before any read decodes it."""
        return len(self._blob)

    @property
    def is_decoded(self) -> bool:
        """Whether a read has decoded the text (its values are then held as well)."""
        return self._value is not None

    def decoded(self) -> dict[str, Any]:
        """A new decoded copy (not kept: the object stays as small as its text)."""
        text = self.text
        value = _orjson.loads(text) if _orjson is not None else json.loads(text)
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
            return (self._blob == other._blob and self._size == other._size) or self._data() == other._data()
        if isinstance(other, dict):
            return self._data() == other
        if isinstance(other, Mapping):
            return self._data() == dict(other.items())
        return NotImplemented

    __hash__ = None  # type: ignore[assignment]  # a mapping: unhashable, like dict

    def __reduce__(self) -> tuple[Any, tuple[bytes, int | None]]:
        return (type(self)._held, (self._blob, self._size))

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self.text.decode()})"


def as_json_text(obj: Mapping[str, Any]) -> Mapping[str, Any]:
    """``obj`` as a :class:`JSONText` of its orjson text (:data:`ORJSON_OPTIONS`); ``obj`` itself when
    orjson is not installed or refuses it (an integer beyond 64 bits, an unknown type)."""
    if _orjson is None:
        return obj
    try:
        return JSONText(_orjson.dumps(obj, option=ORJSON_OPTIONS))
    except TypeError:  # orjson.JSONEncodeError is a TypeError
        return obj


def stored_text(obj: Mapping[str, Any], fallback: Callable[[Mapping[str, Any]], str]) -> bytes:
    """:attr:`JSONText.stored` of ``obj``: its own held bytes when it is a JSONText, else those of
    :func:`as_json_text`; when orjson refuses ``obj`` (or is missing), of the text ``fallback(obj)`` gives
    (the caller's strict encoder)."""
    held = obj if isinstance(obj, JSONText) else as_json_text(obj)
    if not isinstance(held, JSONText):
        held = JSONText(fallback(obj).encode())
    return held.stored


def json_default(obj: Any) -> Any:
    """``default=`` of the standard encoder: a :class:`JSONText` as its decoded object, else ``str(obj)``
    (what ``default=str`` did)."""
    if isinstance(obj, JSONText):
        return obj.decoded()
    return str(obj)
