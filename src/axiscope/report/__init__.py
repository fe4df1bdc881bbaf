"""Pictures of a fit: the self-contained, interactive HTML report (:mod:`axiscope.report.html`)."""
