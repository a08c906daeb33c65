-- warmstart archive schema, version 2: a trial keeps the per-fold scores of a
-- cross-validated objective (NULL when there are none, e.g. trials ingested from a table).
ALTER TABLE trials ADD COLUMN fold_scores DOUBLE[];
