"""The history database: tables, the store-a-period transaction, typed read-back (:mod:`.history`),
the period ledger and leases (:mod:`.ledger`)."""
