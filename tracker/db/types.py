"""Column types of our own: a JSON document stored compressed (:class:`CompressedJSON`).

Saved evaluations keep their full trace (about 16 kB of JSON per visit and criteria set); as text it made
a 5,000-patient database 4.5 GB, 60 times its CSV files. Stored compressed the trace takes under 1 kB:

* the document is written as canonical compact JSON (``json.dumps`` with no spaces, keys in the order
  given, UTF-8 rather than ``\\u`` escapes) and compressed with zlib (standard library, level 6);
* the compressor starts from a preset dictionary (``trace_dictionary_1.txt`` next to this module): the
  keys, words and citations of criteria traces, taken once from the invented demo clinic with the measured
  values removed. A trace is compressed against text it resembles, which halves the bytes of a short
  document (about 2.0 kB without the dictionary, 0.85 kB with it, measured on generated cohorts);
* the first byte names the format (``0x01``: zlib with dictionary 1), so another compressor or dictionary
  can be added later while every stored row stays readable. The dictionary file is frozen: a zlib stream
  records the checksum of its dictionary, and the file's SHA-256 is checked when it is first loaded.

Reading accepts the JSON text of earlier revisions as well (a value starting with ``{``, ``[`` or a
quote), so a row written before migration 0006 or by a writer that passes text is still read as it was.
"""

from __future__ import annotations

import hashlib
import json
import zlib
from functools import cache
from pathlib import Path
from typing import Any

from sqlalchemy import LargeBinary
from sqlalchemy.types import TypeDecorator

# Format byte → (dictionary file, its SHA-256). Never change an entry: stored rows depend on it.
DICTIONARY_FORMATS = {
    0x01: ("trace_dictionary_1.txt", "16de8b29ae10cd8e9b167a506786604346c83b8eed0ab3bde9083fa1da39df3d"),
}
CURRENT_FORMAT = 0x01
# zlib's default level: within 10 % of level 9's size here at about half its time (0.3 ms per trace).
LEVEL = 6
_PLAIN_JSON_STARTS = tuple(b'{["')


class StoredValueError(ValueError):
    """A stored value that is neither compressed JSON of a known format nor JSON text."""


@cache
def preset_dictionary(fmt: int) -> bytes:
    """The frozen preset dictionary of format ``fmt`` (checked against its SHA-256)."""
    name, sha256 = DICTIONARY_FORMATS[fmt]
    data = (Path(__file__).resolve().parent / name).read_bytes()
    if hashlib.sha256(data).hexdigest() != sha256:
        raise StoredValueError(f"{name} has been changed; stored rows need the original bytes (reinstall)")
    return data


def canonical_json(value: Any) -> bytes:
    """Compact UTF-8 JSON of ``value``: no spaces, keys in their given order (as the JSON column kept
    them)."""
    return json.dumps(value, separators=(",", ":"), ensure_ascii=False).encode("utf-8")


@cache
def _primed_compressor(fmt: int) -> Any:
    """A compressor loaded with the preset dictionary of ``fmt``, never used itself: copying it costs a
    fifteenth of setting up a new one (measured 3 µs against 48 µs per trace), and gives the same bytes."""
    return zlib.compressobj(LEVEL, zdict=preset_dictionary(fmt))


def encode_json(value: Any) -> bytes:
    """``value`` as stored by :class:`CompressedJSON`: the format byte, then the zlib stream."""
    return compress_canonical(canonical_json(value))


def compress_canonical(text: bytes) -> bytes:
    """The stored bytes of a document given as its :func:`canonical_json` (what :func:`encode_json` does
    after encoding), so that a caller can compress apart from encoding: zlib lets go of the GIL while it
    compresses, and another thread can compress while this one encodes."""
    compressor = _primed_compressor(CURRENT_FORMAT).copy()
    return bytes((CURRENT_FORMAT,)) + compressor.compress(text) + compressor.flush()


def decode_json(raw: bytes | bytearray | memoryview | str) -> Any:
    """The value of a stored document: compressed (any known format) or plain JSON text."""
    if isinstance(raw, str):
        return json.loads(raw)
    data = bytes(raw)
    if not data:
        raise StoredValueError("an empty stored document")
    fmt = data[0]
    if fmt in DICTIONARY_FORMATS:
        decompressor = zlib.decompressobj(zdict=preset_dictionary(fmt))
        text = decompressor.decompress(data[1:]) + decompressor.flush()
        if not decompressor.eof:
            raise StoredValueError("a stored document is cut short")
        return json.loads(text)
    if fmt in _PLAIN_JSON_STARTS or chr(fmt).isspace():
        return json.loads(data)
    raise StoredValueError(f"unknown stored format byte 0x{fmt:02x}")


class CompressedJSON(TypeDecorator):
    """A JSON document (dict, list, …) in a binary column (BLOB / bytea), compressed by :func:`encode_json`.

    Transparent to the ORM: assign and read Python values as with ``JSON``. SQL cannot look inside the
    document (no JSON operators); columns that queries filter on are kept beside it.
    """

    impl = LargeBinary
    cache_ok = True

    def process_bind_param(self, value: Any, dialect) -> bytes | None:
        return None if value is None else encode_json(value)

    def process_result_value(self, value: Any, dialect) -> Any:
        return None if value is None else decode_json(value)
