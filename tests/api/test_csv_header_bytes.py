"""A CSV whose header line is not UTF-8 is a 422 naming the encoding, not a 500 (found by schema fuzzing of
the multipart training upload once its file part was documented as binary)."""

from __future__ import annotations

import pytest

from service import tables
from service.errors import InvalidData


@pytest.mark.parametrize("payload", [b"\xff\r\xfe", b"fl\xe9w,head\n1,2\n"])  # 0xff, and Latin-1 "é"
def test_a_header_that_is_not_utf8_is_invalid_data(payload):
    with pytest.raises(InvalidData, match="not UTF-8 text"):
        tables.from_csv(payload, where="the uploaded file")


def test_a_utf8_header_still_reads():
    cols = tables.from_csv("flöw,head\n1,2\n".encode(), where="the uploaded file")
    assert list(cols) == ["flöw", "head"] and cols["head"].tolist() == [2.0]
