"""Report: read a run folder, draw its plots, write one HTML page."""
