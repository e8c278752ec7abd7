"""Stage 7, report: the Markdown report and the writing of a fit's results as one unit."""
