"""report.json, the tables, report.html and brief.html (templates/), the text summary."""
