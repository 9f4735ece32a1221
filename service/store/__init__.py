"""Model store (layer 2): immutable, checksummed, pickle-free model versions on disk and a catalog of
models, versions, live-version history, training jobs and API keys in SQLite or PostgreSQL.

``Store(settings)`` is the entry point; see ``service.store.store`` for the publish protocol and
``service.store.artifact`` for the on-disk format.
"""

from service.store.artifact import FORMAT, FORMAT_VERSION
from service.store.jobs import FINAL_STATES, STATES, Jobs
from service.store.keys import SCOPES, Keys
from service.store.names import NAME_RULE, validate_name
from service.store.store import LoadedVersion, Store

__all__ = [
    "FINAL_STATES",
    "FORMAT",
    "FORMAT_VERSION",
    "Jobs",
    "Keys",
    "LoadedVersion",
    "NAME_RULE",
    "SCOPES",
    "STATES",
    "Store",
    "validate_name",
]
