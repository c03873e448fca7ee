"""The report page of a submission: facts read from the records, rendered as HTML with inline SVG.

No Flask here (the API serves the page), no plotting library, no script: ``markup`` escapes every
text by default, ``charts`` draws the SVG by hand, ``facts`` reads the records, ``page`` lays it out.
"""

from service.report.facts import ReportFacts, gather
from service.report.page import render_report

__all__ = ["ReportFacts", "gather", "render_report"]
