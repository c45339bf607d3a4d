"""The project's own renderer: expressive performances of a score with exact ground truth."""
