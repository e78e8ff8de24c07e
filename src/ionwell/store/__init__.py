"""The campaign folder on disk: file names, atomic writes, the ledger, locks."""
