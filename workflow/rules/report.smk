# The study report (one self-contained HTML page) is wired in by the report issue.
REPORT_PROVENANCE = []
