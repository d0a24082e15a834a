"""JSONText: a payload's chart block kept as its JSON text reads, compares, pickles and encodes like the dict
it was made from. Common practice, no source: the contract of drift.jsontext and drift.store._strict_json."""

from __future__ import annotations

import copy
import json
import pickle
from collections.abc import Mapping
from datetime import date
from typing import Any

import numpy as np
import orjson
import pytest

import drift.jsontext as jt
import drift.store as st
from drift.jsontext import ORJSON_OPTIONS, JSONText, as_json_text, json_default


def charts() -> dict[str, Any]:
    """A chart block in the payload's shape: ISO periods, float lists with None gaps, nested blocks."""
    return {"periods": ["2024-01-01", "2024-01-08", "2024-01-15"], "monitor_start_index": 1,
            "cusum": {"path": [None, 0.123456, -1.5e-07], "bounds": {"0.05": [1.0, 1.25, 1.5]}},
            "coefficients": {"x1": {"path": [0.5, 0.25, 1e21], "reference": 0.4, "split": None}},
            "monitor": {"title": "CUSUM — über", "alarm_date": "2024-01-15", "level": 0.05},
            "lag_profile_skipped": {}}


def test_reads_like_the_dict_and_decodes_only_when_read() -> None:
    plain = charts()
    got = as_json_text(plain)
    assert isinstance(got, JSONText) and isinstance(got, Mapping)
    assert got.text == orjson.dumps(plain, option=ORJSON_OPTIONS)
    assert not got.is_decoded  # encoded in the worker, held as text until someone reads it
    fresh = got.decoded()
    assert fresh == plain and not got.is_decoded  # a copy for the caller, not kept
    assert got["cusum"]["path"] == [None, 0.123456, -1.5e-07] and got.is_decoded
    assert list(got) == list(plain) and len(got) == len(plain) and "monitor" in got and "nope" not in got
    assert got.get("nope") is None and dict(got.items()) == plain
    with pytest.raises(KeyError):
        got["nope"]
    with pytest.raises(TypeError):
        got["new"] = 1  # type: ignore[index]  # read-only


def test_equality_with_the_dict_either_way() -> None:
    plain = charts()
    got = as_json_text(plain)
    assert got == plain and plain == got
    assert got == as_json_text(charts())
    assert got == JSONText(json.dumps(plain).encode())  # other spacing, same values
    other = charts()
    other["cusum"]["path"][1] = 0.5
    assert got != other and other != got and got != as_json_text(other)
    assert {"charts": got} == {"charts": plain}  # payload dicts compare through it
    assert got != [1]
    with pytest.raises(TypeError):
        hash(got)


def test_pickles_and_copies_as_its_held_bytes() -> None:
    got = as_json_text(charts())
    got["periods"]  # decoded: the pickle still carries only the held bytes
    blob = pickle.dumps(got)
    back = pickle.loads(blob)
    assert isinstance(back, JSONText) and back.text == got.text and not back.is_decoded and back == charts()
    assert len(blob) < got.held_bytes + 100
    assert copy.deepcopy(got) == charts() and copy.copy(got) == charts()


def test_held_compressed_and_read_back_exactly(monkeypatch: pytest.MonkeyPatch) -> None:
    rng = np.random.default_rng(12)
    block = {"periods": [f"2024-{m:02d}-01" for m in range(1, 13)] * 40,
             "path": np.round(rng.normal(size=2000), 6).tolist()}  # like a chart: ~30 KB of 6-decimal floats
    text = orjson.dumps(block, option=ORJSON_OPTIONS)
    got = JSONText(text)
    assert got.text == text and got == block
    assert got.held_bytes < len(text) / 2  # zstd (pyarrow): the coordinator holds well under half the text
    # a process without the codec holds the text as it is, and still reads what one with it held
    monkeypatch.setattr(jt, "_CODEC", None)
    raw = JSONText(text)
    assert raw.held_bytes == len(text) and raw.text == text and raw == got
    assert pickle.loads(pickle.dumps(got)).text == text


def test_orjson_and_standard_encoding_give_the_json_of_the_plain_dict(monkeypatch: pytest.MonkeyPatch) -> None:
    plain = charts()
    payload = {"name": "m", "verdict": "keep", "x": [1.5, None], "charts": plain}
    wrapped = {**payload, "charts": as_json_text(plain)}
    # the verdict row: orjson splices the text, byte for byte what the plain payload gives
    assert st._strict_json(wrapped) == st._strict_json(payload)
    assert st._strict_json(wrapped) == orjson.dumps(payload, option=ORJSON_OPTIONS).decode()
    # the standard encoder (no orjson, or a payload orjson refuses) decodes the block
    monkeypatch.setattr(st, "_orjson", None)
    assert st._strict_json(wrapped) == st._strict_json(payload) == json.dumps(payload, allow_nan=False)
    with_nan = {**wrapped, "x": [float("nan")]}  # the NaN walk passes the block through
    assert json.loads(st._strict_json(with_nan)) == {**payload, "x": [None]}
    # json_default: the standard encoder's hook writes the object, never its str()
    assert json.dumps(wrapped, default=json_default) == json.dumps(payload)
    assert json.dumps({"d": date(2025, 1, 6)}, default=json_default) == '{"d": "2025-01-06"}'


def test_orjson_refusal_falls_back_to_the_standard_encoder() -> None:
    big = 2 ** 70  # beyond orjson's 64-bit integers
    payload = {"name": "m", "big": big, "charts": as_json_text(charts())}
    assert json.loads(st._strict_json(payload)) == {"name": "m", "big": big, "charts": charts()}
    assert as_json_text({"big": big}) == {"big": big} and not isinstance(as_json_text({"big": big}), JSONText)


def test_numpy_values_and_non_str_keys_as_in_the_verdict_row() -> None:
    block = {"a": np.float64(0.1), "b": np.array([1.0, 2.5]), 3: "three", "n": float("nan")}
    got = as_json_text(block)
    assert got == {"a": 0.1, "b": [1.0, 2.5], "3": "three", "n": None}
    assert st._strict_json({"charts": got}) == st._strict_json({"charts": block})


def test_without_orjson_the_block_stays_a_dict(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(jt, "_orjson", None)
    plain = charts()
    assert as_json_text(plain) is plain
    text = JSONText(orjson.dumps(plain))
    assert text == plain  # decoded by the standard module


def test_needs_bytes() -> None:
    with pytest.raises(TypeError, match="bytes"):
        JSONText('{"a": 1}')  # type: ignore[arg-type]
    with pytest.raises(TypeError, match="JSON object"):
        JSONText(b"[1, 2]").decoded()


def test_stored_bytes_name_their_codec_and_read_back_lazily(monkeypatch: pytest.MonkeyPatch) -> None:
    """The verdict row's charts column: the held bytes as they are behind a header naming the codec."""
    got = as_json_text(charts())
    assert isinstance(got, JSONText)
    stored = got.stored
    assert stored.startswith(jt.STORED_MAGIC + jt.STORED_ZSTD) and stored.endswith(got._blob)
    assert len(stored) == got.held_bytes + len(jt.STORED_MAGIC) + 9
    back = JSONText.from_stored(memoryview(stored))  # a driver may hand a memoryview (psycopg's bytea)
    assert not back.is_decoded and back.text == got.text and back == charts() and back.stored == stored
    # held uncompressed (no codec in the writing process): said so, and read by a process with the codec
    monkeypatch.setattr(jt, "_CODEC", None)
    raw = as_json_text(charts())
    assert raw.stored == jt.STORED_MAGIC + jt.STORED_PLAIN + raw.text
    monkeypatch.undo()
    assert JSONText.from_stored(raw.stored) == charts() and JSONText.from_stored(stored) == charts()
    # bytes without the header are refused, never misread
    for bad in (got.text, got._blob, b"", jt.STORED_MAGIC + b"x" + got._blob, jt.STORED_MAGIC + jt.STORED_ZSTD):
        with pytest.raises(ValueError, match="stored JSON text"):
            JSONText.from_stored(bad)


def test_stored_text_of_a_plain_dict_is_that_of_its_json_text(monkeypatch: pytest.MonkeyPatch) -> None:
    plain = charts()
    assert jt.stored_text(plain, st._strict_json) == as_json_text(plain).stored
    held = as_json_text(plain)
    monkeypatch.setattr(JSONText, "text", property(lambda self: pytest.fail("expanded")))
    assert jt.stored_text(held, st._strict_json) == held.stored  # a JSONText's bytes: nothing expanded
    monkeypatch.undo()
    # a block orjson refuses goes through the caller's encoder and reads back the same
    big = {"big": 2 ** 70, "x": [float("nan"), 1.5]}
    assert JSONText.from_stored(jt.stored_text(big, st._strict_json)) == {"big": 2 ** 70, "x": [None, 1.5]}
