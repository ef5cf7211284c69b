-- Follow-up campaigns (schema 3).
-- A follow-up campaign starts from the leaves of a finished campaign with the same
-- envelope and split states instead of from the root.
ALTER TABLE campaigns ADD COLUMN follow_up_of TEXT REFERENCES campaigns(id);
-- For a follow-up cell that re-joins two halves that were both safe in the previous
-- campaign: the position in refinement.split that the previous campaign cut. If the
-- joined cell is not proven safe, it is cut there again, into exactly those halves.
ALTER TABLE cells ADD COLUMN coarse_dim INTEGER;
