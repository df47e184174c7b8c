"""The report of a study run (HTML and PDF)."""
