"""Intake: photos into a workspace (scale, quality, tiling)."""
