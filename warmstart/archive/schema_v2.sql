-- warmstart archive schema, version 2: what the team service (`warmstart serve`) keeps
-- between requests, so that it survives a restart or a kill -9.
-- Applied by warmstart.archive.store in the same transaction as any earlier step when an
-- archive is opened for writing; the tables of version 1 are not touched, so a version-1
-- reader never needs these.

-- A lease is a proposed config handed to one worker: a pending trial with an id (the
-- "trial id" clients name when they record) and an expiry. Once recorded it keeps the
-- trial's number in its study; an expired lease's config may be proposed again.
CREATE SEQUENCE trial_ids START 1;
CREATE TABLE leases (
    trial_id   BIGINT    NOT NULL,
    study_id   BIGINT    NOT NULL,
    config     VARCHAR   NOT NULL,  -- canonical JSON of the config (sorted keys, no spaces)
    owner      VARCHAR,
    created_at TIMESTAMP NOT NULL,
    expires_at TIMESTAMP NOT NULL,
    state      VARCHAR   NOT NULL CHECK (state IN ('pending', 'recorded', 'expired')),
    number     INTEGER,             -- the trial's number in its study, once recorded
    status     VARCHAR   CHECK (status IS NULL OR status IN ('ok', 'failed')),
    score      DOUBLE,
    recorded_at TIMESTAMP
);
-- A write request that carried a client request id, with the answer it got: a retry with
-- the same id gets the same answer and writes nothing. Written in the transaction of the
-- write itself.
CREATE TABLE requests (
    principal   VARCHAR   NOT NULL,  -- token name ('' without tokens)
    request_id  VARCHAR   NOT NULL,
    route       VARCHAR   NOT NULL,
    body_sha256 VARCHAR   NOT NULL,
    status      INTEGER   NOT NULL,
    response    VARCHAR   NOT NULL,
    created_at  TIMESTAMP NOT NULL,
    PRIMARY KEY (principal, request_id)
);
-- Finished gain replays run by the service (the web page shows the latest).
CREATE SEQUENCE gain_report_ids START 1;
CREATE TABLE gain_reports (
    report_id  BIGINT    NOT NULL,
    created_at TIMESTAMP NOT NULL,
    owner      VARCHAR,
    options    VARCHAR   NOT NULL,
    result     VARCHAR   NOT NULL
);
