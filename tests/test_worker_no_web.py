"""A training process never imports the web framework (DEVELOPERS.md, "Layout and layers").

The worker's training process is started fresh (spawn) for every job; it reads the staged table, tunes,
and on failure or cancellation builds the job's problem object. All of that lives below the HTTP layer
(``service.tables``, ``service.problems``, ``service.logs``), so the process loads neither FastAPI nor
Starlette nor uvicorn: a cancelled or failing job costs no web-framework import, and the layer table
holds at run time, not only in the source (tests/test_layers.py checks the source).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

# Runs the training body in this interpreter, three ways: a good job, a job whose staged file is gone
# (a failure problem), and a cancelled job (the cancelled problem); then lists what it imported.
PROBE = textwrap.dedent('''
    import json, sys, threading, time
    from pathlib import Path
    import numpy as np
    from service import logs, tables, worker

    class Conn:
        def __init__(self):
            self.sent = []
        def send(self, message):
            self.sent.append(message)
        def close(self):
            pass

    logs.configure("warning")
    folder = Path(sys.argv[1])
    rng = np.random.default_rng(0)
    x = rng.normal(size=40)
    path = tables.stage({"x": x, "y": 2.0 * x + rng.normal(scale=0.1, size=40)}, folder / "data.parquet")
    spec = {"target": "y", "features": ["x"], "cv": {"scheme": "kfold", "folds": 4, "seed": 0}}
    runs = {}
    for label, data, stop in (("ok", path, False), ("missing", folder / "none.parquet", False),
                              ("cancelled", path, True)):
        conn, cancel = Conn(), threading.Event()
        if stop:
            cancel.set()
        worker._train(str(data), spec, conn, [0, 0, 0, 0], cancel, time.time() + 120)
        kind, payload = conn.sent[0][0], conn.sent[0][1]
        runs[label] = [kind, None if kind == "ok" else payload["type"], None if kind == "ok" else payload["status"]]
    web = sorted(m for m in sys.modules
                 if m.split(".")[0] in ("fastapi", "starlette", "uvicorn") or m.startswith("service.api"))
    print(json.dumps({"runs": runs, "web": web}))
''')


def test_training_process_imports_no_web_framework(tmp_path: Path):
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(Path(__file__).resolve().parents[1]),
                                                         os.environ.get("PYTHONPATH", "")])}
    out = subprocess.run([sys.executable, "-c", PROBE, str(tmp_path)], capture_output=True, text=True,
                         timeout=300, env=env)
    assert out.returncode == 0, out.stderr[-2000:]
    seen = json.loads(out.stdout.strip().splitlines()[-1])
    assert seen["runs"] == {
        "ok": ["ok", None, None],
        "missing": ["error", "/problems/invalid-data", 422],
        "cancelled": ["cancelled", "/problems/cancelled", 409],
    }
    assert seen["web"] == []
