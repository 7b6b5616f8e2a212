"""comove's store: SQLAlchemy Core schema, the engine factory and one module per table family.

Nothing outside this package imports SQLAlchemy, and this package never imports `monitor`.
"""

from __future__ import annotations

from storage.db import SCHEMA_VERSION, Store, StoreError, open_store

__all__ = ["SCHEMA_VERSION", "Store", "StoreError", "open_store"]
