"""First statistics for physiologists: feature change points, windows around events, coincidence."""
