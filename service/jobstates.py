"""The states of a training job, named once for every layer (catalog, worker, pages, client, command line)."""

STATES = ("queued", "running", "succeeded", "failed", "cancelled")
FINAL_STATES = frozenset({"succeeded", "failed", "cancelled"})  # a job in one of these never changes again
