"""The size limits of issue #14, run by the suite: no module in src/takescribe over 600 lines, no
function over 80 (tests/benchmarks/code_sizes.py counts, docstrings and comments included).

``ALLOWED`` names the few functions not yet cut into steps, each with its current length as a
ceiling (it may only shrink) and the reason it is still long. Nothing else may pass a limit.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

_spec = importlib.util.spec_from_file_location("code_sizes", ROOT / "tests" / "benchmarks" / "code_sizes.py")
code_sizes = importlib.util.module_from_spec(_spec)
sys.modules.setdefault("code_sizes", code_sizes)  # its dataclass looks its module up
_spec.loader.exec_module(code_sizes)

# (path, function) -> ceiling in lines, with why it is still over 80
ALLOWED = {
    # being rewritten by the comparison work of this session; to cut into named steps after it lands
    ("takescribe/comparison/compare.py", "compare_notes"): 132,
    # the score-time / take-time loop with pauses and jumps back; not cut in time (issue #14)
    ("takescribe/alignment/align.py", "align_reference"): 103,
    # the DTW recursion with its step weights in one place; not cut in time (issue #14)
    ("takescribe/alignment/dtw.py", "dtw"): 85,
    # one subcommand added per feature by several people this session; to split per subcommand after
    ("takescribe/cli.py", "build_parser"): 81,
    # the multiplicative-update loop (transcription is edited by another helper this session)
    ("takescribe/transcription/nmf.py", "decompose"): 81,
}


def test_no_module_or_function_over_the_limits():
    found = code_sizes.oversize(ROOT / "src")
    over = [str(item) for item in found
            if item.lines > ALLOWED.get((item.path, item.name), item.limit)]
    assert over == []


def test_allow_list_holds_only_what_is_still_long():
    # an entry whose function was cut (or renamed) must leave the list
    found = {(item.path, item.name) for item in code_sizes.oversize(ROOT / "src")}
    assert set(ALLOWED) <= found


def test_counter_sees_a_long_function(tmp_path):
    # the counter itself: a module of 700 lines holding one function of 90 is two findings
    package = tmp_path / "src" / "pkg"
    package.mkdir(parents=True)
    body = "def long():\n" + "    x = 1\n" * 89 + "\n" * 610
    (package / "big.py").write_text(body)
    found = code_sizes.oversize(tmp_path / "src")
    assert sorted((item.name, item.lines) for item in found) == [("", 700), ("long", 90)]
