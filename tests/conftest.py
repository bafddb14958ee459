"""Shared test helpers: paths to the committed fixtures and the shared standards folder."""

from __future__ import annotations

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
FIXTURES = ROOT / "fixtures"
SHARED = ROOT.parent / "shared"
MUSICXML_XSD_DIR = SHARED / "standards" / "musicxml-4.0"


@pytest.fixture
def musicxml_xsd_dir() -> Path:
    """Folder of the official MusicXML 4.0 XSD files; skip when absent."""
    if not (MUSICXML_XSD_DIR / "musicxml.xsd").exists():
        pytest.skip(f"MusicXML 4.0 schema not found at {MUSICXML_XSD_DIR} (the shared standards folder is absent)")
    return MUSICXML_XSD_DIR
