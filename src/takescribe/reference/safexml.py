"""Untrusted MusicXML read safely: ``.mxl`` archives unpacked with limits, XML checked before music21.

See the Conventions of :mod:`takescribe.reference.part` (untrusted files, damaged values).
"""

from __future__ import annotations

import errno
import posixpath
import re
import zipfile
from pathlib import Path

from ..errors import ScoreError
from ..limits import LIMITS, check_note_count
from .model import MAX_XML_BYTES, _brief


# --------------------------------------------------------------------------
# MusicXML
# --------------------------------------------------------------------------
def _read_limited(fh, limit: int, what: str) -> bytes:
    """Read ``fh`` to the end, refusing more than ``limit`` bytes (the caller maps read errors)."""
    chunks = []
    total = 0
    while True:
        chunk = fh.read(1 << 20)
        if not chunk:
            break
        total += len(chunk)
        if total > limit:
            raise ScoreError(
                f"{what}: larger than {limit // (1024 * 1024)} MB once unpacked; refusing to read it "
                "(a damaged or malicious file?). Export the part alone and try again."
            )
        chunks.append(chunk)
    return b"".join(chunks)


def _safe_member(name: str, source: Path) -> str:
    if name.startswith(("/", "\\")) or re.match(r"^[A-Za-z]:", name) or ".." in name.replace("\\", "/").split("/"):
        raise ScoreError(f"{source}: the archive names an unsafe member {name!r} (absolute or with '..'); refusing it")
    return name


def _read_mxl(path: Path) -> bytes:
    """The score member of a compressed MusicXML archive, every failure a :class:`ScoreError`."""
    try:
        return _read_mxl_member(path)
    except ScoreError:
        raise
    except MemoryError:
        raise
    except NotImplementedError as exc:
        # (a RuntimeError subclass, so caught first) an unknown compression method, or a newer
        # zip version than Python's zipfile reads
        raise ScoreError(
            f"{path}: the .mxl archive uses a zip feature that cannot be unpacked here ({_brief(exc)}); "
            "re-export it as uncompressed MusicXML (.musicxml)"
        ) from exc
    except RuntimeError as exc:
        # zipfile's only RuntimeError on reading is an encrypted member without a password
        if "encrypted" in str(exc) or "password" in str(exc):
            raise ScoreError(
                f"{path}: the .mxl archive is password-protected; export the score again without "
                "encryption, or as uncompressed MusicXML (.musicxml)"
            ) from exc
        raise ScoreError(
            f"{path}: cannot unpack the .mxl archive ({_brief(exc)}); re-export it as MusicXML (.musicxml)"
        ) from exc
    except OSError as exc:
        if exc.errno in (errno.ENOENT, errno.EACCES, errno.EPERM, errno.EISDIR):
            raise ScoreError(f"{path}: cannot be read ({exc.strerror}); check the path") from exc
        raise ScoreError(
            f"{path}: not a readable compressed MusicXML (.mxl) archive, it is damaged ({_brief(exc)}); "
            "re-export it as MusicXML"
        ) from exc
    except Exception as exc:  # zipfile.BadZipFile, zlib.error, EOFError, ValueError, struct.error, ...
        raise ScoreError(
            f"{path}: not a readable compressed MusicXML (.mxl) archive, it is damaged ({_brief(exc)}); "
            "re-export it as MusicXML"
        ) from exc


def _read_mxl_member(path: Path) -> bytes:
    import defusedxml.ElementTree as DET

    with zipfile.ZipFile(path) as zf:
        names = zf.namelist()
        for n in names:
            _safe_member(n, path)
        rootfile = None
        if "META-INF/container.xml" in names:
            with zf.open("META-INF/container.xml") as member:
                container = _read_limited(member, 1 << 20, f"{path}: META-INF/container.xml")
            try:
                croot = DET.fromstring(container, forbid_dtd=True)
            except Exception as exc:  # defusedxml and expat errors alike
                raise ScoreError(
                    f"{path}: META-INF/container.xml is not valid or safe XML ({_brief(exc)}); re-export the file"
                ) from exc
            for el in croot.iter():
                if isinstance(el.tag, str) and el.tag.rsplit("}", 1)[-1] == "rootfile" and el.get("full-path"):
                    rootfile = el.get("full-path")
                    break
        if rootfile is None:
            candidates = [n for n in names if not n.startswith("META-INF/") and n.lower().endswith((".xml", ".musicxml"))]
            if not candidates:
                raise ScoreError(f"{path}: the .mxl archive holds no MusicXML file; re-export the score")
            rootfile = candidates[0]
        rootfile = _safe_member(posixpath.normpath(rootfile), path)
        if rootfile not in names:
            raise ScoreError(f"{path}: the .mxl archive names {rootfile!r} as its score but does not contain it")
        if zf.getinfo(rootfile).file_size > MAX_XML_BYTES:
            raise ScoreError(
                f"{path}: {rootfile} would be larger than {MAX_XML_BYTES // (1024 * 1024)} MB once unpacked; "
                "refusing to read it (a damaged or malicious file?). Export the part alone and try again."
            )
        # the declared size can lie: _read_limited counts what is really inflated
        with zf.open(rootfile) as member:
            return _read_limited(member, MAX_XML_BYTES, f"{path}: {rootfile}")


def _check_xml(data: bytes, path: Path) -> str:
    import defusedxml.ElementTree as DET
    from defusedxml import DefusedXmlException

    try:
        root = DET.fromstring(data, forbid_dtd=False, forbid_entities=True, forbid_external=True)
    except DefusedXmlException as exc:
        raise ScoreError(
            f"{path}: refused: the XML declares entities or external references ({type(exc).__name__}), "
            "which MusicXML does not need and which can be used to attack a computer; re-export the score"
        ) from exc
    except Exception as exc:  # expat ParseError and friends
        raise ScoreError(f"{path}: not well-formed XML ({_brief(exc)}); is it a MusicXML file?") from exc
    tag = root.tag.rsplit("}", 1)[-1] if isinstance(root.tag, str) else ""
    if tag not in ("score-partwise", "score-timewise"):
        raise ScoreError(
            f"{path}: XML but not MusicXML (root element <{tag}>, expected <score-partwise> or "
            "<score-timewise>); export the score as MusicXML"
        )
    _check_meters(root, path)
    _check_size(root, tag, path)
    if tag == "score-timewise":
        # music21 reads partwise only; MusicXML defines the two as transpositions of each other
        return _timewise_to_partwise(root)
    for enc in ("utf-8", "utf-16"):
        try:
            text = data.decode(enc)
            break
        except UnicodeDecodeError:
            continue
    else:  # pragma: no cover - defusedxml already decoded it, so one of the above works
        raise ScoreError(f"{path}: cannot decode the XML text; save it as UTF-8")
    return text.lstrip("\ufeff")


def _local(el) -> str:
    return el.tag.rsplit("}", 1)[-1] if isinstance(el.tag, str) else ""


def _check_size(root, tag: str, path: Path) -> None:
    """Refuse, before music21 sees it, a score whose reading would take minutes (:mod:`takescribe.limits`).

    One pass over the checked tree: measures per part and in all, and notes.
    """
    per_part: dict[str, int] = {}
    if tag == "score-partwise":
        for part in root:
            if _local(part) == "part":
                per_part[part.get("id", "")] = sum(_local(m) == "measure" for m in part)
    else:
        for measure in root:
            if _local(measure) == "measure":
                for part in measure:
                    if _local(part) == "part":
                        per_part[part.get("id", "")] = per_part.get(part.get("id", ""), 0) + 1
    largest = max(per_part.values(), default=0)
    total = sum(per_part.values())
    if largest > LIMITS.max_part_measures or total > LIMITS.max_score_measures:
        raise ScoreError(
            f"{path}: {largest} measures in one part, {total} in all; at most {LIMITS.max_part_measures} a part and"
            f" {LIMITS.max_score_measures} in all are read (the MusicXML reader slows with the square of the length);"
            " export the passage you practise")
    notes = sum(1 for el in root.iter() if _local(el) == "note")
    check_note_count(notes, path, error=ScoreError)


def _check_meters(root, path: Path) -> None:
    """Refuse time signatures with more than 64 beats before music21 sees them.

    music21's time to lay out a bar grows faster than linearly with the number of beats
    (a 1000-beat bar takes about half a minute), so a damaged ``<beats>`` could hang the reader.
    """
    for el in root.iter():
        if not isinstance(el.tag, str) or el.tag.rsplit("}", 1)[-1] != "beats":
            continue
        # MusicXML 4.0: <beats> is a string that may be composite, e.g. "3+2"
        # (long digit strings are capped before int(), which refuses more than 4300 digits)
        total = sum(int(d) if len(d) <= 6 else 10**6 for d in re.findall(r"\d+", el.text or "")[:65])
        if total > 64:
            raise ScoreError(
                f"{path}: a time signature of more than 64 beats (<beats>{(el.text or '').strip()[:20]}</beats>); "
                "at most 64 beats in a bar are read; the file is probably damaged; re-export it"
            )


def _timewise_to_partwise(root) -> str:
    """Rewrite a score-timewise tree as score-partwise text (as the MusicXML 4.0 timepart.xsl does)."""
    import xml.etree.ElementTree as ET

    out = ET.Element("score-partwise", dict(root.attrib))
    part_ids: list[str] = []
    parts: dict[str, ET.Element] = {}
    for child in root:
        if child.tag != "measure":
            out.append(child)
            continue
        for part in child.findall("part"):
            pid = part.get("id", "")
            if pid not in parts:
                part_ids.append(pid)
                parts[pid] = ET.Element("part", {"id": pid})
            measure = ET.SubElement(parts[pid], "measure", dict(child.attrib))
            measure.extend(list(part))
    for pid in part_ids:
        out.append(parts[pid])
    return ET.tostring(out, encoding="unicode")


def _parse_musicxml(path: Path):
    from music21 import converter

    if path.suffix.lower() == ".mxl":
        data = _read_mxl(path)
    else:
        try:
            with open(path, "rb") as fh:
                data = _read_limited(fh, MAX_XML_BYTES, str(path))
        except OSError as exc:
            raise ScoreError(f"{path}: cannot be read ({exc.strerror}); check the path") from exc
    text = _check_xml(data, path)
    try:
        score = converter.parseData(text, format="musicxml")
    except Exception as exc:  # music21 raises many kinds on odd files
        raise ScoreError(f"{path}: music21 could not read this MusicXML ({_brief(exc)}); re-export it") from exc
    return score


