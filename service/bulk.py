"""Answers of millions of numbers, written to the socket as they are encoded.

100 000 samples at d 256 are 25.6 million numbers: as Python lists about 1 GB, the
JSON body another 0.5 GB, all held before the first byte leaves, and encoded in one
call that holds the GIL for seconds. So ``codec.as_wire`` leaves an array of more
than BULK_VALUES numbers in numpy (a ``Bulk``); ``reply``
encodes the rest of the answer around a marker in its place, and ``BulkAnswer``
sends that with the array encoded in blocks of BLOCK_VALUES numbers on a heavy
thread, one block at a time (chunked transfer encoding). A process then holds the
arrays and a block, never the body: loadtests/bench_loop.py measures its peak RSS.
"""

from __future__ import annotations

import asyncio
from collections.abc import Iterator
from dataclasses import dataclass

import msgspec
import numpy as np
from litestar.types import Receive, Scope, Send

from .workload import heavy_pool

#: Arrays of more numbers than this are streamed. One encoding call holds the GIL for
#: all its numbers (60 ns each in JSON): a block at a time, the event loop's thread
#: waits at most a few milliseconds for it.
BULK_VALUES = 131_072
#: Numbers encoded per block (about 1 MB of JSON, 4 ms).
BLOCK_VALUES = 65_536

_JSON = msgspec.json.Encoder()
_MSGPACK = msgspec.msgpack.Encoder()


@dataclass(frozen=True)
class Bulk:
    """An array of an answer, encoded when it is sent: as nested lists, or packed."""

    array: np.ndarray
    packed: bool


def split(value: msgspec.Struct, msgpack: bool) -> list[bytes | Bulk]:
    """The encoded answer: one body, or pieces of it between its bulk arrays."""
    encoder = _MSGPACK if msgpack else _JSON
    bulks = {name: getattr(value, name) for name in value.__struct_fields__
             if isinstance(getattr(value, name), Bulk)}
    if not bulks:
        return [encoder.encode(value)]
    markers = {name: f"\x00bulk:{name}\x00" for name in bulks}
    body = encoder.encode(msgspec.structs.replace(value, **markers))
    pieces: list[bytes | Bulk] = []
    for name, bulk in bulks.items():
        before, _, body = body.partition(encoder.encode(markers[name]))
        pieces += [before, bulk]
    return [*pieces, body]


def blocks(bulk: Bulk, msgpack: bool) -> Iterator[bytes]:
    """The array's encoding, a block of rows at a time."""
    array = bulk.array
    if bulk.packed:
        yield from _packed(array)
        return
    per_row = max(1, int(np.prod(array.shape[1:])))
    step = max(1, BLOCK_VALUES // per_row)
    if msgpack:
        yield _msgpack_array_header(len(array))
    else:
        yield b"["
    for start in range(0, len(array), step):
        encoded = (_MSGPACK if msgpack else _JSON).encode(array[start : start + step].tolist())
        if msgpack:
            yield encoded[_msgpack_header_size(encoded[0]):]
        else:
            yield (b"," if start else b"") + encoded[1:-1]
    if not msgpack:
        yield b"]"


def _packed(array: np.ndarray) -> Iterator[bytes]:
    """{dtype, shape, data} as ``codec.pack`` writes it, the data straight from numpy."""
    dtype = "<i4" if array.dtype.kind in "iu" else "<f8"
    data = np.ascontiguousarray(array, dtype=dtype)
    head = _MSGPACK.encode({"dtype": dtype, "shape": list(array.shape), "data": b""})
    yield head[:-2] + b"\xc6" + data.nbytes.to_bytes(4, "big")  # an empty bin: c4 00
    raw = data.reshape(-1).view(np.uint8).data
    step = BLOCK_VALUES * data.itemsize
    for start in range(0, len(raw), step):
        yield bytes(raw[start : start + step])


def _msgpack_array_header(length: int) -> bytes:
    if length <= 15:
        return bytes([0x90 | length])
    if length <= 0xFFFF:
        return b"\xdc" + length.to_bytes(2, "big")
    return b"\xdd" + length.to_bytes(4, "big")


def _msgpack_header_size(first: int) -> int:
    return {0xDC: 3, 0xDD: 5}.get(first, 1)


class BulkAnswer:
    """A response streamed from pieces of encoded bytes and bulk arrays."""

    def __init__(self, pieces: list[bytes | Bulk], msgpack: bool, media_type: str,
                 status: int, headers: list[tuple[bytes, bytes]]) -> None:
        self.pieces, self.msgpack, self.status = pieces, msgpack, status
        self.headers = [(b"content-type", media_type.encode("latin-1")), *headers]

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        await send({"type": "http.response.start", "status": self.status,
                    "headers": self.headers})
        loop = asyncio.get_running_loop()
        for piece in self.pieces:
            if isinstance(piece, bytes):
                await send({"type": "http.response.body", "body": piece, "more_body": True})
                continue
            encoded = blocks(piece, self.msgpack)
            while (block := await loop.run_in_executor(heavy_pool(), next, encoded, None)
                   ) is not None:
                await send({"type": "http.response.body", "body": block, "more_body": True})
        await send({"type": "http.response.body", "body": b"", "more_body": False})

