"""Shared test helpers: paths to the committed fixtures and the shared standards folder."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import pytest

# librosa compiles its kernels with numba's on-disk cache next to its own files. Test workers
# (pytest-xdist) started together write that cache at the same time, and a torn cache file
# later crashed a worker with a segmentation fault (seen on a fresh venv). Each test process
# therefore gets a cache folder of its own (set unconditionally: workers inherit the
# controller's environment); this must happen before numba is imported.
os.environ["NUMBA_CACHE_DIR"] = tempfile.mkdtemp(prefix="takescribe-numba-")

ROOT = Path(__file__).resolve().parents[1]

# The tests import the package from this checkout's src/, not from whatever copy is installed,
# so a second working tree (git worktree) tests its own code; subprocesses inherit the path.
import sys  # noqa: E402

_SRC = str(ROOT / "src")
if sys.path[:1] != [_SRC]:
    sys.path.insert(0, _SRC)
os.environ["PYTHONPATH"] = os.pathsep.join([_SRC] + [p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p and p != _SRC])
FIXTURES = ROOT / "fixtures"
SHARED = ROOT.parent / "shared"
MUSICXML_XSD_DIR = SHARED / "standards" / "musicxml-4.0"


@pytest.fixture(scope="session")
def musicxml_schema():
    """lxml validator for the official MusicXML 4.0 XSD (W3C Music Notation CG), offline.

    musicxml.xsd imports xml.xsd and xlink.xsd by URL; as SOURCE.md in the schema folder says,
    the imports are pointed at the local copies. Skips when the shared folder is absent.
    """
    if not (MUSICXML_XSD_DIR / "musicxml.xsd").exists():
        pytest.skip(f"MusicXML 4.0 schema not found at {MUSICXML_XSD_DIR} (the shared standards folder is absent)")
    from lxml import etree

    text = (MUSICXML_XSD_DIR / "musicxml.xsd").read_text(encoding="utf-8")
    text = text.replace("http://www.musicxml.org/xsd/xml.xsd", (MUSICXML_XSD_DIR / "xml.xsd").as_uri())
    text = text.replace("http://www.musicxml.org/xsd/xlink.xsd", (MUSICXML_XSD_DIR / "xlink.xsd").as_uri())
    return etree.XMLSchema(etree.fromstring(text.encode("utf-8"), base_url=(MUSICXML_XSD_DIR / "musicxml.xsd").as_uri()))
