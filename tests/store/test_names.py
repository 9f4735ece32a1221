"""Model names are checked before they touch a path or a query (rule from the store issue)."""

from __future__ import annotations

import pytest

from service.errors import InvalidName
from service.store import NAME_RULE, validate_name


@pytest.mark.parametrize("name", ["a", "0", "pump-7", "pump_7.v2", "a" * 63, "x-" + "9" * 61])
def test_valid_names(name):
    assert validate_name(name) == name


@pytest.mark.parametrize(
    "name",
    ["", ".", "..", "...", "../etc", "a/b", "/abs", "a\\b", "-x", "_x", ".hidden", "A", "Pump", "a b", "a\n",
     "é", "a" * 64, "a\x00", "catalog.db", "catalog.db-wal"],
)
def test_invalid_names_name_the_value_and_the_rule(name):
    with pytest.raises(InvalidName) as info:
        validate_name(name)
    err = info.value
    assert repr(name) in err.detail  # the value received is named
    assert err.errors and err.errors[0]["field"] == "name"
    if not name.startswith("catalog.db"):
        assert NAME_RULE in err.detail


@pytest.mark.parametrize("value", [None, 3, b"abc", ["a"]])
def test_non_string_names(value):
    with pytest.raises(InvalidName, match="must be a string"):
        validate_name(value)


def test_store_rejects_bad_names_before_touching_the_disk(store, kit, tmp_path):
    body, arrays = kit.linear_artifact()
    before = sorted(p.relative_to(store.root) for p in store.root.rglob("*"))
    for bad in ["../escape", "..", "A", "x/y"]:
        with pytest.raises(InvalidName):
            store.publish(bad, body, arrays)
        with pytest.raises(InvalidName):
            store.load(bad, 1)
        with pytest.raises(InvalidName):
            store.set_live(bad, 1, actor="t", reason="r")
        with pytest.raises(InvalidName):
            store.jobs.submit(bad, {"spec": {}})
    after = sorted(p.relative_to(store.root) for p in store.root.rglob("*"))
    assert before == after
    assert not (tmp_path / "escape").exists()
    assert store.list_models() == []
