"""Stage 4, report: everything the HTML page and the CSVs show, read from the
store alone."""
