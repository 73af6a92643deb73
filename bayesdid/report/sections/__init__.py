"""One module per group of report sections; each renderer takes a :class:`~bayesdid.report.reader.RunFolder` and returns HTML."""
