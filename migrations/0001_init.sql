-- Tessera campaign store, schema 1.
-- Times are integer milliseconds since the Unix epoch (UTC).
-- Volumes are exact integers: a cell at depth d of a campaign with max_depth D has
-- volume 2^(D - d); the whole envelope has volume 2^D (D <= 60 fits in INTEGER).

CREATE TABLE models (
    sha256      TEXT PRIMARY KEY,          -- lowercase hex of the blob's SHA-256
    size        INTEGER NOT NULL,
    inputs      INTEGER,                   -- network input width, when known
    outputs     INTEGER,                   -- network output width, when known
    data        BLOB NOT NULL,
    created_at  INTEGER NOT NULL
);

CREATE TABLE campaigns (
    id              TEXT PRIMARY KEY,      -- UUID v4
    name            TEXT NOT NULL,
    spec_json       TEXT NOT NULL,         -- canonical spec document
    spec_hash       TEXT NOT NULL,         -- SHA-256 of spec_json, lowercase hex
    state           TEXT NOT NULL CHECK (state IN ('running', 'paused', 'cancelled', 'done')),
    priority        INTEGER NOT NULL DEFAULT 0,
    max_depth       INTEGER NOT NULL CHECK (max_depth BETWEEN 0 AND 60),
    results_count   INTEGER NOT NULL DEFAULT 0,
    created_at      INTEGER NOT NULL,
    updated_at      INTEGER NOT NULL,
    first_result_at INTEGER,
    last_result_at  INTEGER,
    finished_at     INTEGER
);

-- Per campaign and cell status: number of cells and their summed volume.
-- Kept in the same transaction as every cell change, so reads are O(1) and exact.
-- Internal ('split') cells are counted with volume 0: only leaves carry volume.
CREATE TABLE campaign_counters (
    campaign_id TEXT NOT NULL REFERENCES campaigns(id) ON DELETE CASCADE,
    status      TEXT NOT NULL,
    cells       INTEGER NOT NULL DEFAULT 0,
    volume      INTEGER NOT NULL DEFAULT 0,
    PRIMARY KEY (campaign_id, status)
) WITHOUT ROWID;

CREATE TABLE cells (
    id              TEXT PRIMARY KEY,      -- UUID v4
    campaign_id     TEXT NOT NULL REFERENCES campaigns(id) ON DELETE CASCADE,
    parent_id       TEXT REFERENCES cells(id),
    depth           INTEGER NOT NULL,
    -- [lo, hi] of every split dimension, in the spec's refinement.split order,
    -- as little-endian f64 pairs (16 bytes per dimension): bit-exact.
    box             BLOB NOT NULL,
    status          TEXT NOT NULL CHECK (status IN
                        ('pending', 'leased', 'safe', 'unsafe', 'unresolved', 'failed', 'split')),
    split_dim       INTEGER,               -- for 'split': position in refinement.split that was cut
    lease_id        TEXT,                  -- set only while 'leased'
    lease_expires_at INTEGER,
    leased_by       TEXT,
    leased_at       INTEGER,
    attempts        INTEGER NOT NULL DEFAULT 0,
    last_error      TEXT,
    result_id       TEXT,
    created_at      INTEGER NOT NULL,
    updated_at      INTEGER NOT NULL
);
CREATE INDEX cells_queue ON cells (campaign_id, status, depth);
CREATE UNIQUE INDEX cells_lease ON cells (lease_id) WHERE lease_id IS NOT NULL;
CREATE INDEX cells_lease_expiry ON cells (lease_expires_at) WHERE status = 'leased';
-- No index on parent_id: it is one more B-tree write per new cell, and nothing looks
-- cells up by parent (the tiling check reads them all). Cell ids never change and the
-- API deletes nothing; a future campaign deletion must add this index first, or each
-- deleted cell's foreign-key check scans the table.

CREATE TABLE results (
    id              TEXT PRIMARY KEY,      -- UUID v4
    campaign_id     TEXT NOT NULL REFERENCES campaigns(id) ON DELETE CASCADE,
    cell_id         TEXT NOT NULL REFERENCES cells(id),
    lease_id        TEXT NOT NULL UNIQUE,  -- one result per lease, ever
    worker          TEXT NOT NULL,
    kind            TEXT NOT NULL CHECK (kind IN ('safe', 'unsafe', 'inconclusive', 'error')),
    verdict_json    TEXT NOT NULL,         -- as submitted by the worker
    engine_version  TEXT,
    elapsed_ms      REAL,                  -- as reported by the worker
    leased_at       INTEGER,
    received_at     INTEGER NOT NULL
);
-- Counterexamples are read by campaign; other kinds need no index.
CREATE INDEX results_unsafe ON results (campaign_id) WHERE kind = 'unsafe';

CREATE TABLE tokens (
    id          TEXT PRIMARY KEY,          -- UUID v4
    token_hash  TEXT NOT NULL UNIQUE,      -- SHA-256 of the secret, lowercase hex
    role        TEXT NOT NULL CHECK (role IN ('admin', 'submitter', 'worker', 'viewer')),
    label       TEXT NOT NULL DEFAULT '',
    created_at  INTEGER NOT NULL
);

-- Leases that ended without a result (expired, or withdrawn at cancel), so that a late
-- answer can be told apart from an unknown lease id.
CREATE TABLE ended_leases (
    lease_id    TEXT PRIMARY KEY,
    cell_id     TEXT NOT NULL,
    reason      TEXT NOT NULL,             -- 'expired' or 'withdrawn'
    ended_at    INTEGER NOT NULL
) WITHOUT ROWID;
