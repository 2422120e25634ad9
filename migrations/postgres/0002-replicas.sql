-- understudy on PostgreSQL, layout 2: several replicas on one database.
--
-- A retrain asked of any replica (POST /v1/retrain) is queued here, in the same transaction
-- as its `runs` row (state queued), and the leading replica takes it (deleting the row) to
-- run it. A run whose row is gone but whose `runs` row is unfinished was taken by a leader
-- that stopped before it finished: the next leader logs it `failed`.
--
-- Leadership itself needs no table: it is a session-level advisory lock, released by the
-- server when the leader's session ends.
CREATE TABLE run_requests (
    run_id       text COLLATE "C" PRIMARY KEY,
    requested_at bigint NOT NULL,
    detail       text
);
