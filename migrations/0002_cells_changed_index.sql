-- The dashboard asks for the cells of a campaign changed since a time (its map is
-- updated incrementally); without this index that is a scan of the campaign's cells.
CREATE INDEX cells_changed ON cells (campaign_id, updated_at);
