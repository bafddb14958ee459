"""Batch runs: a folder of corpus takes, local process pool, resume, and the same batch on a Dask cluster."""

from __future__ import annotations

import shutil
import sys
from pathlib import Path

import pytest

from takescribe.jobs.batch import find_takes, run_batch
from takescribe.cli import main
from takescribe.errors import InputError
from takescribe.jobs.pipeline import REPORT_FILES

CORPUS = Path(__file__).resolve().parents[1] / "fixtures" / "corpus"
TAKES = ("heldout/adverse_detune445_arpeggios", "heldout/adverse_fast_altosax_jig", "tuning/adverse_mixed_trumpet_reel")


@pytest.fixture(scope="module")
def folders(tmp_path_factory):
    root = tmp_path_factory.mktemp("batch")
    takes, scores = root / "takes", root / "scores"
    takes.mkdir()
    scores.mkdir()
    for name in TAKES:
        shutil.copy(CORPUS / f"{name}.flac", takes)
    # one take has its part; one "take" is not audio at all
    shutil.copy(CORPUS / f"{TAKES[0]}.musicxml", scores)
    (takes / "broken.wav").write_bytes(b"RIFF\x00\x00\x00\x00WAVEnot really audio")
    (takes / "readme.txt").write_text("not a take")
    return root, takes, scores


@pytest.fixture(scope="module")
def local_run(folders):
    root, takes, scores = folders
    return run_batch(takes, root / "local", score_dir=scores, jobs=2, progress=False)


def _outputs(folder: Path) -> dict:
    return {p.relative_to(folder).as_posix(): p for p in sorted(folder.rglob("*")) if p.is_file()}


def test_local_run_transcribes_compares_and_reports_failures(folders, local_run):
    root, _, _ = folders
    by_name = {Path(r.take).name: r for r in local_run.results}
    assert sorted(by_name) == ["adverse_detune445_arpeggios.flac", "adverse_fast_altosax_jig.flac",
                               "adverse_mixed_trumpet_reel.flac", "broken.wav"]
    assert by_name["broken.wav"].status == "failed" and "broken.wav" in by_name["broken.wav"].error
    assert local_run.exit_code == 1  # one failing take: the batch goes on but says so
    with_part = by_name["adverse_detune445_arpeggios.flac"]
    assert with_part.status == "done" and with_part.findings is not None and with_part.notes > 0
    for name in ("adverse_fast_altosax_jig.flac", "adverse_mixed_trumpet_reel.flac"):
        assert by_name[name].status == "done" and by_name[name].findings is None and by_name[name].notes > 0
    files = _outputs(root / "local")
    for name in REPORT_FILES + ("draft.mid", "notes.txt"):
        assert f"adverse_detune445_arpeggios/{name}" in files
    assert "adverse_fast_altosax_jig/report.html" not in files
    table = local_run.table()
    assert "broken.wav" in table and "1 failed" in table


def test_every_take_gets_a_valid_musicxml_draft(folders, local_run, musicxml_schema):
    from lxml import etree
    from music21 import converter

    root, _, _ = folders
    for result in local_run.results:
        if result.status != "done":
            continue
        path = root / "local" / Path(result.take).stem / "draft.musicxml"
        # MusicXML 4.0 XSD (W3C Music Notation Community Group) accepts the draft
        doc = etree.parse(str(path), etree.XMLParser(load_dtd=False, no_network=True, resolve_entities=False))
        assert musicxml_schema.validate(doc), f"{path}: {musicxml_schema.error_log.last_error}"
        # music21 reads back the pitches of the take's note list (one draft, two files); a note tied
        # over a bar line is one note, and two onsets of one pitch on one grid slot are written once
        written = [p.midi for n in converter.parse(str(path)).recurse().notes
                   if n.tie is None or n.tie.type == "start" for p in n.pitches]
        listed = [int(line.split()[2]) for line in (path.parent / "notes.txt").read_text().splitlines()[1:]]
        assert sorted(set(written)) == sorted(set(listed)) and len(written) <= len(listed) == result.notes, path


def test_a_take_without_part_or_instrument_is_said_to_be_piano(folders, local_run):
    by_name = {Path(r.take).name: r for r in local_run.results}
    assert by_name["adverse_detune445_arpeggios.flac"].remark is None  # its part names the instrument
    for name in ("adverse_fast_altosax_jig.flac", "adverse_mixed_trumpet_reel.flac"):
        assert "--instrument" in by_name[name].remark and "piano" in by_name[name].remark
        assert f"note: {name}: no --instrument" in local_run.table()


def test_instrument_option_names_the_draft_and_writes_it_transposed(folders, tmp_path, capsys):
    from lxml import etree

    _, takes, _ = folders
    only = tmp_path / "takes"
    only.mkdir()
    shutil.copy(takes / "adverse_fast_altosax_jig.flac", only)
    code = main(["batch", str(only), "-o", str(tmp_path / "out"), "--instrument", "alto sax", "--jobs", "1",
                 "--quiet"])
    out = capsys.readouterr().out
    assert code == 0 and "no --instrument" not in out
    doc = etree.parse(str(tmp_path / "out" / "adverse_fast_altosax_jig" / "draft.musicxml"))
    assert "Sax" in doc.findtext(".//score-part/part-name")
    # an E-flat alto saxophone sounds a major sixth below its written notes (common practice, no source)
    assert doc.findtext(".//transpose/chromatic") == "-9"


def test_resume_skips_finished_takes(folders, local_run, capsys):
    root, takes, scores = folders
    before = {k: p.stat().st_mtime_ns for k, p in _outputs(root / "local").items()}
    code = main(["batch", str(takes), "-o", str(root / "local"), "--score-dir", str(scores), "--jobs", "2", "--quiet"])
    out = capsys.readouterr().out
    assert code == 1  # the broken take still fails
    assert "3 skipped" in out and "1 failed" in out
    after = {k: p.stat().st_mtime_ns for k, p in _outputs(root / "local").items()}
    assert after == before  # nothing rewritten


def test_partial_outputs_are_not_overwritten(folders, local_run, tmp_path):
    root, takes, _ = folders
    only = tmp_path / "takes"
    only.mkdir()
    shutil.copy(takes / "adverse_fast_altosax_jig.flac", only)
    out = tmp_path / "out"
    (out / "adverse_fast_altosax_jig").mkdir(parents=True)
    (out / "adverse_fast_altosax_jig" / "draft.mid").write_bytes(b"left over")
    summary = run_batch(only, out, jobs=1, progress=False)
    assert summary.results[0].status == "failed"
    assert "only some of this take's outputs" in summary.results[0].error
    assert (out / "adverse_fast_altosax_jig" / "draft.mid").read_bytes() == b"left over"


def test_dask_cluster_from_another_folder_with_relative_paths_gives_the_local_results(folders, local_run, tmp_path,
                                                                                      monkeypatch):
    # issue #17: `batch --scheduler` with relative paths failed every take and made empty folders in
    # the worker's working directory. The workers start in one folder, the batch is given paths
    # relative to another; spawned worker processes keep the folder they were started in.
    distributed = pytest.importorskip("dask.distributed")
    root, _, _ = folders
    worker_home = tmp_path / "worker-home"
    worker_home.mkdir()
    monkeypatch.chdir(worker_home)
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                       dashboard_address=None)
    try:
        monkeypatch.chdir(root)
        summary = run_batch(Path("takes"), Path("dask"), score_dir=Path("scores"),
                            scheduler=cluster.scheduler_address, progress=False)
    finally:
        cluster.close(timeout=30)
    assert [(r.status, r.notes, r.findings) for r in summary.results] == \
        [(r.status, r.notes, r.findings) for r in local_run.results]
    assert list(worker_home.iterdir()) == []   # nothing made where the workers run
    local, remote = _outputs(root / "local"), _outputs(root / "dask")
    assert sorted(local) == sorted(remote)
    for name in local:
        if name.endswith(("notes.txt", "findings.json")):
            assert local[name].read_text() == remote[name].read_text(), name


def test_missing_dask_is_a_clear_error(folders, monkeypatch, tmp_path):
    _, takes, _ = folders
    monkeypatch.setitem(sys.modules, "dask.distributed", None)  # import fails as if not installed
    with pytest.raises(InputError, match=r"dask\[distributed\]"):
        run_batch(takes, tmp_path / "out", scheduler="tcp://127.0.0.1:1", progress=False)


def test_bad_folders_name_the_problem(folders, tmp_path):
    _, takes, _ = folders
    with pytest.raises(InputError, match="input folder not found"):
        run_batch(tmp_path / "nowhere", tmp_path / "out", progress=False)
    with pytest.raises(InputError, match="output folder is the input folder"):
        run_batch(takes, takes, progress=False)
    with pytest.raises(InputError, match="score folder not found"):
        run_batch(takes, tmp_path / "out", score_dir=tmp_path / "none", progress=False)


def test_takes_with_one_name_and_two_suffixes_are_refused(tmp_path):
    (tmp_path / "a.wav").write_bytes(b"")
    (tmp_path / "a.flac").write_bytes(b"")
    with pytest.raises(InputError, match="several suffixes"):
        find_takes(tmp_path, tmp_path / "out")
