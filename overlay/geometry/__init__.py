"""Frames and their changes: plane transforms, fits from targets, scan registration, CRS checks, stations."""
