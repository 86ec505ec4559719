"""Reports: tables, figures, statistics and a memo, read from the tracking store only."""
