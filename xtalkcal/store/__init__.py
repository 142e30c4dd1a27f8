"""The matrix store: ledger entries, their commit files with digests (netCDF-4, which xarray
opens directly; see `xtalkcal.store.netcdf`), and snapshot views of the matrix at any time.

May import: :mod:`xtalkcal.calibrate` and below. Nothing here imports a later stage of the flow.
"""

from xtalkcal.store.codec import (
    Columns,
)
from xtalkcal.store.entries import (
    KINDS,
    METHODS,
    VERDICTS,
    Kind,
    LedgerEntry,
    LedgerValidationError,
    Method,
    Verdict,
    utc_timestamp,
)
from xtalkcal.store.from_calibration import (
    ledger_entries,
    ledger_sweeps,
)
from xtalkcal.store.integrity import (
    CommitCheck,
    CommitStatus,
    LedgerReport,
)
from xtalkcal.store.ledger import (
    Ledger,
    verify_ledger,
)
from xtalkcal.store.schema import (
    MIGRATIONS,
    SCHEMA_VERSION,
    SWEEP_READERS,
)
from xtalkcal.store.snapshots import (
    MatrixSnapshot,
)
from xtalkcal.store.writing import (
    CommitReceipt,
    quarantine_commit,
)

__all__ = [
    "ledger_entries",
    "ledger_sweeps",
    "KINDS",
    "Kind",
    "LedgerEntry",
    "LedgerValidationError",
    "METHODS",
    "Method",
    "SCHEMA_VERSION",
    "VERDICTS",
    "Verdict",
    "utc_timestamp",
    "Columns",
    "MIGRATIONS",
    "SWEEP_READERS",
    "MatrixSnapshot",
    "CommitCheck",
    "CommitReceipt",
    "CommitStatus",
    "Ledger",
    "LedgerReport",
    "quarantine_commit",
    "verify_ledger",
]
