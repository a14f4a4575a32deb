"""PDF documents of a lot: the certificate of analysis and the batch report (reportlab).

Both renderers are pure: a JSON-able dossier in, PDF bytes out, the same bytes for the same
dossier. Signing happens afterwards (:mod:`pipeline.signing`).
"""

from pipeline.documents.certificate import render_certificate
from pipeline.documents.report import render_batch_report

__all__ = ["render_batch_report", "render_certificate"]
