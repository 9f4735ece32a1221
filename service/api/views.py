"""Public JSON shapes of catalog rows that more than one route shows (the JSON routes and the pages).

A view is a plain function from a catalog row to the dict callers see; route modules import views from
here, never from each other.
"""

from __future__ import annotations

from typing import Any

from service import problems


def job_view(job: dict[str, Any]) -> dict[str, Any]:
    """The public shape of a job row from the catalog."""
    jid = job["id"]
    request = job.get("request") or {}
    out = {
        "id": jid,
        "model": job.get("name"),
        "state": job.get("state"),
        "progress": job.get("progress") or {"done": 0, "total": None},
        "attempts": job.get("attempts"),
        "created_at": job.get("created_at"),
        "started_at": job.get("started_at"),
        "heartbeat_at": job.get("heartbeat_at"),
        "finished_at": job.get("finished_at"),
        "version": job.get("version"),
        "promote": request.get("promote"),
        "min_improvement": request.get("min_improvement"),
        "data": request.get("data"),
        "grid": request.get("grid"),
        "decision": job.get("decision"),
        "problem": problems.stored_problem(job.get("problem")),
        "links": {"self": f"/v1/trainings/{jid}", "model": f"/v1/models/{job.get('name')}"},
    }
    if job.get("version") is not None:
        out["links"]["version"] = f"/v1/models/{job.get('name')}/versions/{job['version']}"
    return out
