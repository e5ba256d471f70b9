"""Labels: the workspace store, review, label import and export, splits."""
