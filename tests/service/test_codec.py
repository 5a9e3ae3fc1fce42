"""msgpack_points, the fast path for MessagePack rows: wherever it answers, it answers
what msgspec's decoding and numpy's conversion give; elsewhere it steps aside."""

from __future__ import annotations

from typing import Any

import msgspec
import numpy as np
from hypothesis import given
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from service.codec import msgpack_points

FLOATS = st.floats(allow_nan=True, allow_infinity=True, width=64)


@given(arrays(np.float64, st.tuples(st.integers(1, 40), st.integers(1, 70)), elements=FLOATS))
def test_float_rows_read_as_msgspec_and_numpy_would(X: np.ndarray) -> None:
    body = msgspec.msgpack.encode({"points": X.tolist()})
    reference = np.array(msgspec.msgpack.decode(body)["points"], dtype=np.float64)
    read = msgpack_points(body)
    assert read is not None and read.dtype == np.float64 and read.shape == X.shape
    assert np.array_equal(read, reference, equal_nan=True)


@given(st.one_of(
    st.lists(st.lists(st.integers(-5, 5), min_size=1, max_size=4), min_size=1, max_size=4),
    st.lists(st.lists(FLOATS, min_size=1, max_size=4), min_size=2, max_size=4).filter(
        lambda rows: len({len(row) for row in rows}) > 1),
    st.lists(st.lists(st.one_of(FLOATS, st.none()), min_size=1, max_size=3), min_size=1,
             max_size=3).filter(lambda rows: any(v is None for row in rows for v in row)),
))
def test_anything_else_is_left_to_msgspec(rows: Any) -> None:
    """Integers, ragged rows and nulls are not float64 tables: None."""
    assert msgpack_points(msgspec.msgpack.encode({"points": rows})) is None


def test_other_bodies_are_left_to_msgspec() -> None:
    for body in ({"points": []}, {"points": [[1.0]], "extra": 1}, {"count": 3},
                 {"points": [[]]}):
        assert msgpack_points(msgspec.msgpack.encode(body)) is None
    assert msgpack_points(b"\x81\xa6points") is None
    truncated = msgspec.msgpack.encode({"points": [[1.0, 2.0], [3.0, 4.0]]})[:-3]
    assert msgpack_points(truncated) is None
    assert msgpack_points(msgspec.msgpack.encode({"points": [[1.0, 2.0]]}) + b"\x00") is None
