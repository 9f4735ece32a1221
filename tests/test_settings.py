"""Settings are typed and described, and the README's Configuration table is generated from them."""

from __future__ import annotations

from pathlib import Path

import pytest
from pydantic import ValidationError

from service import settings as S
from service.settings import Settings

README = Path(__file__).resolve().parents[1] / "README.md"


def test_the_readme_table_is_the_one_generated_from_the_settings():
    text = README.read_text(encoding="utf-8")
    assert S.with_table(text) == text, "README's settings table is stale: run `python -m service.settings README.md`"
    table = text.split(S.TABLE_START, 1)[1].split(S.TABLE_END, 1)[0]
    rows = [line for line in table.strip().splitlines()[2:]]
    assert len(rows) == len(Settings.model_fields)
    assert "| `TIKHON_MAX_BODY_BYTES` | 67108864 (64 MiB) | Largest request body accepted. |" in rows
    assert "| `TIKHON_LOG_LEVEL` | `info` |" in next(r for r in rows if "LOG_LEVEL" in r)
    assert next(r for r in rows if "DATABASE_URL" in r).startswith("| `TIKHON_DATABASE_URL` | unset |")


def test_every_setting_is_described():
    missing = [name for name, field in Settings.model_fields.items() if not (field.description or "").strip()]
    assert missing == []


def test_a_changed_description_makes_the_table_stale(monkeypatch):
    text = README.read_text(encoding="utf-8")
    monkeypatch.setattr(Settings.model_fields["port"], "description", "Another port text.")
    assert S.with_table(text) != text and "| `TIKHON_PORT` | 8000 | Another port text. |" in S.with_table(text)
    with pytest.raises(ValueError, match="no settings table"):
        S.with_table("# a README without the markers\n")


def test_log_level_is_one_of_the_levels(tmp_path):
    assert Settings(store=tmp_path, log_level="WARNING").log_level == "warning"
    with pytest.raises(ValidationError) as info:
        Settings(store=tmp_path, log_level="verbose")
    message = str(info.value)
    assert "log_level" in message and all(level in message for level in ("'debug'", "'info'", "'warning'", "'error'"))


@pytest.mark.parametrize("name,value,shown", [
    ("max_body_bytes", 64 * 2**20, "67108864 (64 MiB)"),
    ("max_spec_bytes", 65536, "65536 (64 KiB)"),
    ("max_training_rows", 5_000_000, "5 000 000"),
    ("max_job_cost", 2e11, "2e11"),
    ("worker_poll_s", 0.5, "0.5"),
    ("max_training_seconds", 3600.0, "3600"),
    ("store", Path("./models_store"), "`./models_store`"),
    ("dask_scheduler", None, "unset"),
    ("embedded_worker", True, "true"),
    ("cors_origins", [], "`[]`"),
])
def test_defaults_are_shown_as_an_operator_types_them(name, value, shown):
    assert S._shown_default(name, value) == shown
