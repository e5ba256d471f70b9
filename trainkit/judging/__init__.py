"""Judging: metrics, evaluation, report, model card and export."""
