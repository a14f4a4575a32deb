"""PDF documents of a lot: the certificate of analysis and the batch report (reportlab).

Both renderers are pure: a JSON-able dossier in, PDF bytes out, the same bytes for the same
dossier. Signing happens afterwards (:mod:`pipeline.signing`).

reportlab's graphics check the type of every attribute assigned to a shape when
``rl_config.shapeChecking`` is on (its default); that is a development aid and about a
twentieth of a report's cost. The charts assign only values they computed themselves, so the
check is turned off here, before :mod:`reportlab.graphics.shapes` is first imported (the
module reads the setting once, at import). The setting is process-wide.
"""

from reportlab import rl_config

rl_config.shapeChecking = 0

from pipeline.documents.certificate import render_certificate  # noqa: E402
from pipeline.documents.report import render_batch_report  # noqa: E402

__all__ = ["render_batch_report", "render_certificate"]
