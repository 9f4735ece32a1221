"""The README's complete training requests run as written: the JSON body, and the multipart form with the
spec sent as text (``-F 'spec=<spec.json'``) or as a second file (``-F spec=@spec.json``)."""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from pathlib import Path

import httpx
import pytest

README = Path(__file__).resolve().parents[2] / "README.md"


def _blocks() -> list[str]:
    text = README.read_text(encoding="utf-8")
    start = text.index("\n## Training spec reference\n")
    section = text[start:text.index("\n## ", start + 1)]
    return re.findall(r"```sh\n(.*?)```", section, re.S)


def test_the_json_training_request_runs_as_written(tmp_path, kit):
    (block,) = [b for b in _blocks() if "'Content-Type: application/json'" in b]
    body = json.loads(block[block.index("-d '") + 4:block.rindex("'")])
    with kit.service(tmp_path / "svc", worker=True) as (base, _, _):
        url = re.search(r"curl -s (\S+)", block).group(1).replace("http://127.0.0.1:8000", base)
        r = httpx.post(url, json=body, timeout=120)
        assert r.status_code == 202, r.text
        job = kit.wait_job(base, r.json()["id"])
        assert job["state"] == "succeeded" and job["decision"]["went_live"] is True, job
        meta = httpx.get(f"{base}/v1/models/pump-small/versions/1", timeout=120).json()
        assert any(w.startswith("little data: 4 rows per validation fold") for w in meta["warnings"]), meta["warnings"]


def test_the_multipart_request_with_the_spec_as_text_or_file(tmp_path, kit):
    (block,) = [b for b in _blocks() if "spec=<spec.json" in b]
    (json_block,) = [b for b in _blocks() if "'Content-Type: application/json'" in b]
    body = json.loads(json_block[json_block.index("-d '") + 4:json_block.rindex("'")])
    rows = body["data"]["rows"]
    (tmp_path / "pump-small.csv").write_text("flow_lps,head_m,energy_kwh\n" + "\n".join(
        f"{r['flow_lps']},{r['head_m']},{r['energy_kwh']}" for r in rows) + "\n")
    (tmp_path / "spec.json").write_text(json.dumps(body["spec"]))
    with kit.service(tmp_path / "svc", worker=True) as (base, _, _):
        if shutil.which("curl"):
            command = " ".join(block.replace("\\\n", " ").split()).replace("http://127.0.0.1:8000", base)
            run = subprocess.run(["bash", "-c", command + " --fail"], cwd=tmp_path, capture_output=True, text=True,
                                 timeout=120)
            assert run.returncode == 0, (run.stdout, run.stderr)
            job = kit.wait_job(base, json.loads(run.stdout)["id"])
            assert job["state"] == "succeeded" and job["version"] == 1, job
        # The spec as a second file part (-F spec=@spec.json) is read the same way.
        r = httpx.post(f"{base}/v1/models/pump-small/trainings", files={
            "file": ("pump-small.csv", (tmp_path / "pump-small.csv").read_bytes(), "text/csv"),
            "spec": ("spec.json", (tmp_path / "spec.json").read_bytes(), "application/json")},
            data={"promote": "always"}, timeout=120)
        assert r.status_code == 202, r.text
        job = kit.wait_job(base, r.json()["id"])
        assert job["state"] == "succeeded", job
        spec = httpx.get(f"{base}/v1/models/pump-small/versions/{job['version']}").json()["spec"]
        assert spec["cv"]["folds"] == 3 and spec["penalty"]["strengths"]["count"] == 12
        if not shutil.which("curl"):
            pytest.skip("curl is not installed; the multipart command line itself was not run")
