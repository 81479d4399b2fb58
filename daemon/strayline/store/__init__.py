"""The scan store: one zarr 3 store per scan, written line by line under a write-ahead
ledger, and read back without the writer's lock.

:class:`ScanStore` (the writer) commits a line's rows, then marks it done in the ledger, so
a crash at any instant loses nothing and never half-writes a line; :func:`open_store_reader`
gives ``status`` and the products a consistent read-only view.
"""

from strayline.store._layout import STATUS_FILL, STORE_FORMAT, STORE_FORMAT_VERSION
from strayline.store._ledger import LedgerEntry, LedgerState
from strayline.store.reader import (
    NotAScanStore,
    StoreReader,
    is_orphaned_store,
    open_store_reader,
    store_metadata_present,
    store_path,
)
from strayline.store.scan_store import (
    MAP_NAMES,
    Decision,
    RawSpectra,
    ScanStore,
    StoreMismatch,
    StoreStatistics,
    WriteReceipt,
)

__all__ = [
    "MAP_NAMES",
    "STATUS_FILL",
    "STORE_FORMAT",
    "STORE_FORMAT_VERSION",
    "Decision",
    "LedgerEntry",
    "LedgerState",
    "NotAScanStore",
    "RawSpectra",
    "ScanStore",
    "StoreMismatch",
    "StoreReader",
    "StoreStatistics",
    "WriteReceipt",
    "is_orphaned_store",
    "open_store_reader",
    "store_metadata_present",
    "store_path",
]
