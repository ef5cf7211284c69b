-- Lease expiries counted apart from failed attempts (schema 4).
-- `attempts` counts results that reported an engine error; `expiries` counts leases
-- that ran out without a result (a worker killed, a network or server outage longer
-- than the lease). Only a cell that keeps outliving its leases (one that kills its
-- workers, say) ends `failed` through expiries, after --max-expiries of them.
ALTER TABLE cells ADD COLUMN expiries INTEGER NOT NULL DEFAULT 0;
