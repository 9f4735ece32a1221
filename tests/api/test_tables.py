"""Request payloads -> validated columns, and the data-folder guard for training 'source' paths."""

from __future__ import annotations

import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from service import tables as T
from service.errors import BudgetExceeded, InvalidData


def test_rows_to_columns_keeps_order_and_types():
    cols = T.from_rows([{"flow": 1, "site": "a"}, {"flow": 2.5, "site": "b"}])
    assert list(cols) == ["flow", "site"]
    assert cols["flow"].dtype == np.float64 and cols["flow"].tolist() == [1.0, 2.5]
    assert cols["site"].dtype == object and cols["site"].tolist() == ["a", "b"]


@pytest.mark.parametrize(
    "rows,needle",
    [
        ([{"a": float("nan")}], "not a finite number"),
        ([{"a": 1}, {"a": float("inf")}], "not a finite number"),
        ([{"a": None}], "null"),
        ([{"a": 1}, {"b": 2}], "lacks ['a'] and has extra ['b']"),
        ([{"a": 1}, {"a": "x"}], "mixes numbers"),
        ([], "empty"),
        ({"a": 1}, "must be a list"),
        ([1, 2], "must be a non-empty object"),
    ],
)
def test_bad_rows_name_the_problem(rows, needle):
    with pytest.raises(InvalidData) as info:
        T.from_rows(rows)
    assert needle in str(info.value)


def test_csv_round_trip_and_errors():
    cols = T.from_csv("flow,head,site\n1,2,a\n3.5,4,b\n")
    assert cols["flow"].tolist() == [1.0, 3.5] and cols["site"].tolist() == ["a", "b"]
    with pytest.raises(InvalidData, match="Expected 3 columns, got 2"):
        T.from_csv("flow,head,site\n1,2\n")
    with pytest.raises(InvalidData, match=r"'head' has missing values .* row\(s\) 1"):
        T.from_csv("flow,head\n1,2\n3,\n")
    with pytest.raises(InvalidData, match="non-finite"):
        T.from_csv("flow,head\n1,2\n3,inf\n")
    with pytest.raises(InvalidData, match="repeats the column"):
        T.from_csv("flow,flow\n1,2\n")
    with pytest.raises(InvalidData, match="empty"):
        T.from_csv("   \n")


def test_row_limit_names_setting():
    with pytest.raises(BudgetExceeded) as info:
        T.check_row_limit(11, 10, "max_rows_per_request", "rows")
    assert info.value.extra["limit"] == "max_rows_per_request"
    assert "max_rows_per_request=10" in str(info.value)


def test_stage_and_read_back(tmp_path):
    cols = {"flow": np.array([1.0, 2.0]), "site": np.array(["a", "b"])}
    path = T.stage(cols, tmp_path / "job" / "data.parquet")
    back = T.read_staged(path)
    assert back["flow"].tolist() == [1.0, 2.0] and back["site"].tolist() == ["a", "b"]
    assert not list((tmp_path / "job").glob("*.part"))


def test_source_guard(tmp_path):
    data = tmp_path / "data"
    (data / "pumps").mkdir(parents=True)
    (data / "pumps" / "june.csv").write_text("flow,head\n1,2\n")
    outside = tmp_path / "secret.csv"
    outside.write_text("flow,head\n9,9\n")
    os.symlink(outside, data / "pumps" / "link.csv")
    os.symlink(tmp_path, data / "up")
    pq.write_table(pa.table({"flow": [1.0], "head": [2.0]}), data / "pumps" / "june.parquet")

    assert T.resolve_source(data, "pumps/june.csv") == (data / "pumps" / "june.csv").resolve()
    assert T.read_source(T.resolve_source(data, "pumps/june.parquet"))["head"].tolist() == [2.0]
    for bad, needle in [
        (str(outside), "absolute"), ("/etc/passwd", "absolute"), ("../secret.csv", "'..'"),
        ("pumps/../../secret.csv", "'..'"), ("pumps/link.csv", "outside the data folder"),
        ("up/secret.csv", "outside the data folder"), ("pumps/june.csv\x00.txt", "NUL"),
        ("pumps/nothing.csv", "not a file"), ("pumps", "not a file"), ("", "non-empty"), (7, "non-empty"),
        ("C:\\data\\x.csv", "absolute"), ("~/x.csv", "absolute"),
    ]:
        with pytest.raises(InvalidData) as info:
            T.resolve_source(data, bad)
        assert needle in str(info.value), (bad, str(info.value))


def test_csv_label_columns_stay_text_for_training_and_prediction():
    """RFC 4180: a CSV cell is text; "01", "1" and "007" are three labels, never the numbers 1, 1 and 7. A
    spec's categorical column (training) or a model's categorical input (a prediction body) is read as text."""
    from service.engine import parse_spec

    body = "zip,x,y\n01,1.5,2\n1,2,3\n007,3,4\n"
    spec = parse_spec({"target": "y", "features": ["x"], "categorical": ["zip"]})
    assert T.from_csv(body, spec=spec)["zip"].tolist() == ["01", "1", "007"]
    assert T.from_csv(body, spec={"zip"})["zip"].tolist() == ["01", "1", "007"]
    assert T.from_csv(body)["zip"].tolist() == [1.0, 1.0, 7.0]  # no spec: pyarrow's own inference (numbers)
