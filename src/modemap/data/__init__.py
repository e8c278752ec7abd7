"""Stage 1, data: files and data frames in, a validated :class:`~modemap.data.dataset.Dataset`
out, and the regression rows (derivatives or next states) every later stage fits."""
