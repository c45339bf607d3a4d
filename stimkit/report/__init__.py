"""Report: the overview figure and the self-contained HTML page."""
