-- understudy on PostgreSQL, layout 1: the same data the sled store keeps (see ../*.md), one
-- row per record instead of sled's pages. Applied once per database by `PgStore::open`,
-- under an advisory lock, in one transaction with its row in `layout`.
--
-- JSON columns are `text` holding exactly the serde JSON the sled store writes for the same
-- value, so both backends store the same bytes. Ids compare with the "C" collation: score ids
-- are ULIDs, whose byte order is their time order, whatever the database's locale.

-- Named values: the activation history, the shadow state, the freeze, the write probe.
CREATE TABLE meta (
    key   text PRIMARY KEY,
    value text NOT NULL
);

-- Named counters (`Store::next_seq`), and `log`, the promotion log's sequence.
CREATE TABLE counters (
    name  text PRIMARY KEY,
    value bigint NOT NULL
);

-- What a score request left behind; `record` is the `ScoreRecord` JSON. `at` is the time in
-- the score id (a ULID), so the primary key orders records by time too.
CREATE TABLE scores (
    score_id text COLLATE "C" PRIMARY KEY,
    at       bigint NOT NULL,
    record   text NOT NULL
);

-- Labeled examples: backfilled rows under their id, and outcomes under their score id.
-- `label` repeats the example's label, for the duplicate/conflict check.
CREATE TABLE examples (
    id         text COLLATE "C" PRIMARY KEY,
    event_time bigint NOT NULL,
    label      double precision NOT NULL,
    example    text NOT NULL
);
CREATE INDEX examples_by_time ON examples (event_time, id);

CREATE TABLE models (
    id         text COLLATE "C" PRIMARY KEY,
    created_at bigint NOT NULL,
    model      text NOT NULL
);

-- The promotion log, by sequence.
CREATE TABLE log (
    seq   bigint PRIMARY KEY,
    entry text NOT NULL
);

CREATE TABLE runs (
    run_id   text COLLATE "C" PRIMARY KEY,
    finished boolean NOT NULL,
    run      text NOT NULL
);

-- A shadowing candidate's rows that have their outcome (`ShadowedOutcome` JSON).
CREATE TABLE shadowed (
    candidate_id text COLLATE "C" NOT NULL,
    score_id     text COLLATE "C" NOT NULL,
    outcome      text NOT NULL,
    PRIMARY KEY (candidate_id, score_id)
);
