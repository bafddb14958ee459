"""The practice report files (HTML, JSON, annotated MusicXML)."""

# `takescribe.report` was a module before 0.2; its public names stay importable here.
from .practice import (  # noqa: F401
    MAX_EMBED_BYTES,
    KindStyle,
    KIND_STYLES,
    write_report,
    render_html,
    annotate_musicxml,
)

__all__ = ['MAX_EMBED_BYTES', 'KindStyle', 'KIND_STYLES', 'write_report', 'render_html', 'annotate_musicxml']
