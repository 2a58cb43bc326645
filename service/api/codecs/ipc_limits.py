"""Bounds on the memory an Arrow IPC request body decodes into.

The body-size limit bounds bytes on the wire, not memory: IPC buffer compression (LZ4/ZSTD)
and dictionary-encoded string columns can each expand a small body a thousandfold.  So the
decoded size is bounded by the same limit, checked before anything is decompressed:

- :func:`decoded_body_size` reads the flatbuffer metadata of every record and dictionary
  batch (Arrow columnar format, "Serialization and Interprocess Communication"): a compressed
  buffer starts with its uncompressed length as a little-endian int64 (-1: stored as is);
- :func:`dictionary_expansion` is the size string/binary dictionary columns take decoded,
  computed from value lengths and indices without decoding them.
"""

from __future__ import annotations

import struct

import pyarrow as pa
import pyarrow.compute as pc

_RECORD_BATCH, _DICTIONARY_BATCH = 3, 2  # MessageHeader union tags


def _u16(buf: bytes, pos: int) -> int:
    return struct.unpack_from("<H", buf, pos)[0]


def _u32(buf: bytes, pos: int) -> int:
    return struct.unpack_from("<I", buf, pos)[0]


def _field(buf: bytes, table: int, index: int) -> int | None:
    """Position of field ``index`` of the flatbuffer table at ``table`` (None if absent)."""
    vtable = table - struct.unpack_from("<i", buf, table)[0]
    size = _u16(buf, vtable)
    slot = 4 + 2 * index
    if slot + 2 > size:
        return None
    offset = _u16(buf, vtable + slot)
    return table + offset if offset else None


def _ref(buf: bytes, pos: int) -> int:
    return pos + _u32(buf, pos)


def _batch_size(meta: bytes, body: bytes) -> int:
    """Decoded bytes of one record or dictionary batch message."""
    message = _u32(meta, 0)
    kind_at, header_at = _field(meta, message, 1), _field(meta, message, 2)
    if kind_at is None or header_at is None:
        return len(body)
    header = _ref(meta, header_at)
    if meta[kind_at] == _DICTIONARY_BATCH:
        data_at = _field(meta, header, 1)
        if data_at is None:
            return len(body)
        header = _ref(meta, data_at)
    elif meta[kind_at] != _RECORD_BATCH:
        return len(body)
    buffers_at = _field(meta, header, 2)
    if _field(meta, header, 3) is None or buffers_at is None:  # not compressed
        return len(body)
    vector = _ref(meta, buffers_at)
    total = 0
    for i in range(_u32(meta, vector)):
        offset, length = struct.unpack_from("<qq", meta, vector + 4 + 16 * i)
        if length < 8:
            continue
        (uncompressed,) = struct.unpack_from("<q", body, offset)
        total += length - 8 if uncompressed < 0 else uncompressed
    return total


def decoded_body_size(raw: bytes) -> int:
    """Bytes the batches of an IPC stream decompress to (raises ``pa.ArrowInvalid`` or
    ``ValueError``/``struct.error`` on a malformed stream)."""
    reader = pa.ipc.MessageReader.open_stream(pa.BufferReader(raw))
    total = 0
    while True:
        try:
            message = reader.read_next_message()
        except StopIteration:
            return total
        if message.type in ("record batch", "dictionary"):
            total += _batch_size(message.metadata.to_pybytes(), message.body.to_pybytes())


def dictionary_expansion(table: pa.Table) -> int:
    """Bytes the string/binary dictionary columns of ``table`` would take decoded."""
    total = 0
    for column in table.columns:
        if not pa.types.is_dictionary(column.type):
            continue
        value_type = column.type.value_type
        if not (pa.types.is_string(value_type) or pa.types.is_binary(value_type)
                or pa.types.is_large_string(value_type) or pa.types.is_large_binary(value_type)):  # fmt: skip
            continue
        for chunk in column.chunks:
            lengths = pc.binary_length(chunk.dictionary)
            taken = pc.sum(pc.take(lengths, chunk.indices)).as_py()
            total += int(taken or 0)
    return total
