"""SQLite store: schema and migrations, the session writer, read-only queries and exports."""

from server.store.errors import StoreError
from server.store.schema import MIGRATIONS, migrate, schema_version
from server.store.writer import Store

__all__ = ["MIGRATIONS", "Store", "StoreError", "migrate", "schema_version"]
