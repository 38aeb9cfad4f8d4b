"""Old home of the state store, kept as a re-export of ``monitor.state`` for the modules that import it here."""

from __future__ import annotations

from monitor.state.database import BUSY_TIMEOUT_MS, DB_NAME, Database, inserted_id, utc_iso
from monitor.state.schema import ADDED_COLUMNS_V2 as ADDED_COLUMNS
from monitor.state.schema import CURRENT_VERSION as SCHEMA_VERSION

Store = Database

__all__ = ["ADDED_COLUMNS", "BUSY_TIMEOUT_MS", "DB_NAME", "SCHEMA_VERSION", "Database", "Store", "inserted_id",
           "utc_iso"]
