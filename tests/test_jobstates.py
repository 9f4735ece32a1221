"""A job's states are named once (``service.jobstates``) and every layer uses that one definition."""

from __future__ import annotations

import re
from pathlib import Path

from service import client, jobstates, store
from service.store import jobs

ROOT = Path(__file__).resolve().parents[1] / "service"


def test_every_layer_uses_the_one_definition():
    assert client.FINAL_STATES is jobstates.FINAL_STATES is store.FINAL_STATES is jobs.FINAL_STATES
    assert store.STATES is jobstates.STATES
    assert set(jobstates.FINAL_STATES) < set(jobstates.STATES) and jobstates.STATES[0] == "queued"


def test_no_module_spells_the_final_states_out_again():
    # any literal collection that lists the three final states, in any order and quoting
    three = re.compile(r"""[\(\[\{]\s*(["'](succeeded|failed|cancelled)["']\s*,\s*){2}["'](succeeded|failed|cancelled)["']""")
    found = [str(p.relative_to(ROOT)) for p in sorted(ROOT.rglob("*.py")) if three.search(p.read_text(encoding="utf-8"))]
    assert found == ["jobstates.py"]
