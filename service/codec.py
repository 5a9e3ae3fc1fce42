"""Bodies in and out: JSON or MessagePack by Content-Type and Accept, and points as
numpy arrays (lists of rows, or packed bytes decoded without a Python object per number)."""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Literal, TypeVar, cast

import msgspec
import numpy as np

from . import hints
from .bulk import BULK_VALUES, Bulk
from .errors import (
    FieldError,
    InvalidInput,
    MalformedBody,
    NotAcceptable,
    TooLarge,
    UnsupportedMediaType,
)
from .schemas import PackedArray, Points, Records

JSON = "application/json"
MSGPACK_TYPES = ("application/msgpack", "application/vnd.msgpack", "application/x-msgpack")
T = TypeVar("T")


@dataclass(frozen=True)
class Format:
    """A wire format and the exact media type to answer with."""

    msgpack: bool
    media_type: str


JSON_FORMAT = Format(False, JSON)


def request_format(content_type: str | None) -> Format:
    """The format of a request body; no Content-Type at all is taken as JSON."""
    if not content_type:
        return JSON_FORMAT
    media = content_type.split(";", 1)[0].strip().lower()
    if media == JSON or (media.startswith("application/") and media.endswith("+json")):
        return JSON_FORMAT
    if media in MSGPACK_TYPES:
        return Format(True, media)
    raise UnsupportedMediaType(
        f"Content-Type {media!r} is not supported; send {JSON} or {MSGPACK_TYPES[0]}"
    )


def response_format(accept: str | None, body: Format) -> Format:
    """The format to answer in: the first acceptable one the client lists, else the body's."""
    if not accept:
        return body
    for media in _preferred(accept):
        if media == JSON or media.endswith("+json"):
            return JSON_FORMAT
        if media in MSGPACK_TYPES:
            return Format(True, media)
        if media in ("*/*", "application/*"):
            return body
    raise NotAcceptable(f"Accept {accept!r} names no supported type; use {JSON} or "
                        f"{MSGPACK_TYPES[0]}")


def _preferred(accept: str) -> list[str]:
    """Media types of an Accept header, highest quality first, then in order given."""
    entries = []
    for position, part in enumerate(accept.split(",")):
        media, *parameters = (piece.strip().lower() for piece in part.split(";"))
        quality = 1.0
        for parameter in parameters:
            if parameter.startswith("q="):
                try:
                    quality = float(parameter[2:])
                except ValueError:
                    quality = 0.0
        if quality > 0:
            entries.append((-quality, position, media))
    return [media for _, _, media in sorted(entries)]


_DECODERS: dict[tuple[Any, bool], Any] = {}


def _decoder(kind: Any, msgpack: bool) -> Any:
    """One typed decoder per (body type, format), built on first use."""
    found = _DECODERS.get((kind, msgpack))
    if found is None:
        found = msgspec.msgpack.Decoder(kind) if msgpack else msgspec.json.Decoder(kind)
        _DECODERS[(kind, msgpack)] = found
    return found


_JSON_ENCODER = msgspec.json.Encoder()
_MSGPACK_ENCODER = msgspec.msgpack.Encoder()
_PATH = re.compile(r" - at `\$(.*)`$")


def decode(body: bytes, kind: type[T], fmt: Format) -> T:
    if not body:
        raise MalformedBody("the request body is empty")
    try:
        return cast(T, _decoder(kind, fmt.msgpack).decode(body))
    except msgspec.ValidationError as error:
        raise _invalid(str(error), kind) from None
    except msgspec.DecodeError as error:
        if fmt.msgpack:
            raise MalformedBody(f"the body is not valid MessagePack: {error}") from None
        hint = hints.malformed_json_hint(body, str(error))
        raise MalformedBody(f"the body is not valid JSON: {error}{hint}") from None


def _invalid(message: str, kind: Any) -> InvalidInput:
    """msgspec's message with the field it names, and a hint where the body type has one."""
    match = _PATH.search(message)
    path = match.group(1) if match else ""
    reason = message[: match.start()] if match else message
    unknown = hints.unknown_field(kind, path, reason)
    if unknown is not None:
        field, text = unknown
        return InvalidInput.field(field, text)
    if reason.startswith("Invalid enum value"):
        reason += hints.enum_hint(kind, path)
    field = path.lstrip(".") or "body"
    return InvalidInput(f"{reason} - at `${path}`" if match else reason,
                        [FieldError(field, reason)])


def encode(value: Any, fmt: Format) -> bytes:
    return _MSGPACK_ENCODER.encode(value) if fmt.msgpack else _JSON_ENCODER.encode(value)


def points_matrix(points: Points | np.ndarray, dimension: int, max_points: int,
                  field: str = "points") -> np.ndarray:
    """A checked (n, d) float64 array; NaN marks missing values, anything else infinite
    or the wrong shape is an InvalidInput naming the place."""
    if isinstance(points, np.ndarray):  # read by msgpack_points
        X = points
    elif isinstance(points, PackedArray):
        X = _unpack(points, field)
    else:
        if len(points) > max_points:
            raise _too_many(len(points), max_points)
        try:
            X = np.array(points, dtype=np.float64)
        except ValueError:
            raise _ragged(points, dimension, field) from None
    if X.ndim != 2 or X.shape[0] == 0:
        raise InvalidInput.field(field, f"must be a non-empty list of rows of {dimension} values")
    if X.shape[0] > max_points:
        raise _too_many(X.shape[0], max_points)
    if X.shape[1] != dimension:
        raise InvalidInput.field(
            field, f"rows have {X.shape[1]} values; the model has dimension {dimension}")
    _check_not_infinite(X, lambda row, column: f"{field}[{row}][{column}]")
    return X


def _check_not_infinite(X: np.ndarray, place: Callable[[int, int], str]) -> None:
    """InvalidInput at the first infinite value, named by ``place(row, column)``."""
    if np.isinf(X).any():
        row, column = (int(i) for i in np.argwhere(np.isinf(X))[0])
        raise InvalidInput.field(
            place(row, column),
            "is infinite; only null (or NaN in MessagePack) marks a missing value")


def records_matrix(records: Records, names: list[str] | None, model: str,
                   max_points: int) -> np.ndarray:
    """(n, d) rows from objects keyed by the model's feature ``names``; NaN where a key
    is absent or null."""
    if names is None:
        raise InvalidInput.field(
            "records", f"model {model!r} has no feature names on this version; send points "
            "(rows in feature order), or give the version feature_names")
    if len(records) > max_points:
        raise _too_many(len(records), max_points)
    if not records:
        raise InvalidInput.field("records", "must be a non-empty list of objects")
    column = {name: j for j, name in enumerate(names)}
    X = np.full((len(records), len(names)), np.nan)
    for i, record in enumerate(records):
        for key, value in record.items():
            j = column.get(key)
            if j is None:
                raise InvalidInput.field(f"records[{i}]", _unknown_feature(key, names))
            if value is not None:
                X[i, j] = value
    _check_not_infinite(X, lambda row, column: f"records[{row}].{names[column]}")
    return X


def _unknown_feature(key: str, names: list[str]) -> str:
    close = hints.closest(key, names)
    suggestion = f"did you mean {close!r}? " if close else ""
    return f"has unknown feature {key!r}; {suggestion}the model's features are: {', '.join(names)}"


_POINTS_MAP = b"\x81\xa6points"  # a map of one key, "points"
_FLOAT64 = 0xCB


def msgpack_points(body: bytes) -> np.ndarray | None:
    """The rows of a MessagePack body ``{"points": [[...], ...]}`` read straight from its
    bytes, when every row has the same length and every value is a float64 (what
    MessagePack libraries write for floats); None for any other body, which msgspec
    then decodes. Decoding a thousand rows into Python floats and converting them cost
    more than scoring them."""
    if not body.startswith(_POINTS_MAP):
        return None
    rows, start = _array_header(body, len(_POINTS_MAP))
    columns, after = _array_header(body, start)
    if not rows or not columns:
        return None
    header = np.frombuffer(body, np.uint8, after - start, start)
    row_bytes = header.size + 9 * columns
    if len(body) != start + rows * row_bytes:
        return None
    table = np.frombuffer(body, np.uint8, rows * row_bytes, start).reshape(rows, row_bytes)
    cells = table[:, header.size:].reshape(rows, columns, 9)
    if not ((table[:, : header.size] == header).all() and (cells[:, :, 0] == _FLOAT64).all()):
        return None
    return np.ascontiguousarray(cells[:, :, 1:]).view(">f8").reshape(rows, columns).astype(
        np.float64)


def _array_header(body: bytes, at: int) -> tuple[int, int]:
    """(length, position after the header) of a MessagePack array at ``at``; (0, at) when
    there is none."""
    if at >= len(body):
        return 0, at
    first = body[at]
    if 0x90 <= first <= 0x9F:
        return first & 0x0F, at + 1
    if first == 0xDC:
        return int.from_bytes(body[at + 1: at + 3], "big"), at + 3
    if first == 0xDD:
        return int.from_bytes(body[at + 1: at + 5], "big"), at + 5
    return 0, at


def _unpack(packed: PackedArray, field: str) -> np.ndarray:
    if packed.dtype not in ("<f8", "<f4"):
        raise InvalidInput.field(f"{field}.dtype", "must be '<f8' or '<f4'")
    if len(packed.shape) != 2 or min(packed.shape) < 0:
        raise InvalidInput.field(f"{field}.shape", "must be [rows, features]")
    itemsize = 8 if packed.dtype == "<f8" else 4
    expected = packed.shape[0] * packed.shape[1] * itemsize
    if len(packed.data) != expected:
        raise InvalidInput.field(
            f"{field}.data",
            f"has {len(packed.data)} bytes; shape {packed.shape} of {packed.dtype} needs "
            f"{expected}")
    X = np.frombuffer(packed.data, dtype=packed.dtype).reshape(packed.shape)
    return X.astype(np.float64)


def _ragged(rows: list[list[float | None]], dimension: int, field: str) -> InvalidInput:
    for i, row in enumerate(rows):
        if not isinstance(row, list) or len(row) != dimension:
            size = len(row) if isinstance(row, list) else 0
            return InvalidInput.field(
                f"{field}[{i}]", f"has {size} values; the model has dimension {dimension}")
    return InvalidInput.field(field, "rows must all have the same length")


def _too_many(rows: int, limit: int) -> TooLarge:
    return TooLarge(f"{rows} points exceed the limit of {limit} per request "
                    f"(MIXSCORE_MAX_POINTS)")


def pack(array: np.ndarray) -> PackedArray:
    """Floats as ``<f8``, integers as ``<i4``."""
    dtype: Literal["<i4", "<f8"] = "<i4" if array.dtype.kind in "iu" else "<f8"
    data = np.ascontiguousarray(array, dtype=dtype)
    return PackedArray(dtype=dtype, shape=list(array.shape), data=data.tobytes())


def as_wire(array: np.ndarray, packed: bool) -> Any:
    """Packed bytes, or nested lists (non-finite floats become null in JSON); an array
    of millions of numbers stays in numpy, to be streamed (``bulk``)."""
    if array.size > BULK_VALUES:
        return Bulk(array, packed)
    return pack(array) if packed else array.tolist()
