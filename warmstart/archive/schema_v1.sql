-- warmstart archive schema, version 1.
-- Applied in one transaction by warmstart.archive.store when an archive is created.
CREATE TABLE schema_version (
    version        INTEGER   NOT NULL,
    applied_at     TIMESTAMP NOT NULL,
    duckdb_version VARCHAR   NOT NULL
);
CREATE TABLE archive_info (
    archive_id VARCHAR   NOT NULL,
    created_at TIMESTAMP NOT NULL
);
CREATE SEQUENCE task_ids START 1;
CREATE SEQUENCE space_ids START 1;
CREATE SEQUENCE study_ids START 1;
CREATE TABLE tasks (
    task_id     BIGINT PRIMARY KEY,
    name        VARCHAR   NOT NULL,
    fingerprint VARCHAR   NOT NULL,
    kind        VARCHAR   NOT NULL CHECK (kind IN ('classification', 'regression')),
    target      VARCHAR   NOT NULL,
    n_rows      BIGINT,
    n_features  BIGINT,
    created_at  TIMESTAMP NOT NULL,
    source      VARCHAR
);
CREATE TABLE profiles (
    task_id BIGINT  NOT NULL,
    feature VARCHAR NOT NULL,
    value   DOUBLE  NOT NULL,
    version VARCHAR NOT NULL
);
CREATE TABLE spaces (
    space_id     BIGINT PRIMARY KEY,
    learner      VARCHAR NOT NULL,
    definition   VARCHAR NOT NULL,
    content_hash VARCHAR NOT NULL
);
CREATE TABLE studies (
    study_id       BIGINT PRIMARY KEY,
    task_id        BIGINT    NOT NULL,
    learner        VARCHAR   NOT NULL,
    space_id       BIGINT    NOT NULL,
    metric         VARCHAR   NOT NULL,
    direction      VARCHAR   NOT NULL CHECK (direction IN ('maximize', 'minimize')),
    origin         VARCHAR   NOT NULL CHECK (origin IN ('cold', 'warm', 'imported')),
    prior          VARCHAR,
    created_at     TIMESTAMP NOT NULL,
    finished_at    TIMESTAMP,
    owner          VARCHAR,
    tags           VARCHAR   NOT NULL DEFAULT '{}',
    source_archive VARCHAR,
    merged_at      TIMESTAMP
);
CREATE TABLE trials (
    study_id    BIGINT  NOT NULL,
    number      INTEGER NOT NULL,
    config      VARCHAR NOT NULL,
    score       DOUBLE,
    status      VARCHAR NOT NULL CHECK (status IN ('ok', 'failed')),
    cost_s      DOUBLE,
    started_at  TIMESTAMP,
    finished_at TIMESTAMP,
    error       VARCHAR,
    content_key VARCHAR USING COMPRESSION uncompressed NOT NULL  -- random hex: compression only costs time
);
