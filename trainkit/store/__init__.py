"""The workspace store: one SQLite database of photos, patches, labels, splits and jobs."""
