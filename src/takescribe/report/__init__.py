"""The practice report files (HTML page, findings JSON, annotated MusicXML).

Modules, in the order the page is made: ``styles`` (names, colours, shapes), ``annotate``
(findings on the part's notes, MusicXML), ``engrave`` (the part as SVG, by the engraving library), ``media``
(the take compressed), ``voice`` ("hear the part"), ``roll`` (piano roll, pace), ``table``
(every finding), ``script`` (listening in the page), ``page`` (the HTML), ``practice``
(:func:`write_report`, the files).
"""

# `takescribe.report` was a module before 0.2; its public names stay importable here.
from .practice import (  # noqa: F401
    KindStyle,
    KIND_STYLES,
    ReportDetails,
    write_report,
    render_html,
    annotate_musicxml,
)

__all__ = ['KindStyle', 'KIND_STYLES', 'ReportDetails', 'write_report', 'render_html', 'annotate_musicxml']
