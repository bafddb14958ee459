"""The warning tree of :mod:`takescribe.errors` (issue #14): one root for every warning the package gives.

Two checks over the whole package, so that a new stage cannot slip out of the tree:

- every warning class any takescribe module defines or exposes is a
  :class:`~takescribe.errors.TakescribeWarning` (modules found with :mod:`pkgutil`);
- every ``warnings.warn`` call in ``src/takescribe`` names a category from that tree (read
  with :mod:`ast`, so a call split over lines or with a keyword ``category`` is still seen).
"""

from __future__ import annotations

import ast
import importlib
import pkgutil
import warnings
from pathlib import Path

import pytest

import takescribe
from takescribe import errors
from takescribe.errors import TakescribeWarning

SRC = Path(takescribe.__file__).resolve().parent


def _modules():
    names = [info.name for info in pkgutil.walk_packages(takescribe.__path__, prefix="takescribe.")]
    assert len(names) > 50, names  # the walk found the stages, not just the top package
    return [importlib.import_module(name) for name in names]


def _warning_classes():
    """(where, class) for every Warning class a takescribe module defines or names."""
    found = []
    for module in [takescribe, *_modules()]:
        for attr, value in vars(module).items():
            if (isinstance(value, type) and issubclass(value, Warning)
                    and value.__module__.startswith("takescribe")):
                found.append((f"{module.__name__}.{attr}", value))
    return found


def test_every_warning_class_is_in_the_tree():
    found = _warning_classes()
    assert len({cls for _, cls in found}) >= 8  # the root and the seven stage classes at least
    outside = [where for where, cls in found if not issubclass(cls, TakescribeWarning)]
    assert outside == []


def test_old_warning_names_are_the_tree_classes():
    # the names of 0.1 still import, and are the tree's classes (not look-alikes)
    from takescribe.alignment.align import AlignmentWarning
    from takescribe.audio.load import TakescribeWarning as AudioModuleWarning
    from takescribe.notation.notate import NotationWarning
    from takescribe.reference.part import ScoreWarning
    assert AlignmentWarning is errors.AlignmentWarning
    assert ScoreWarning is errors.ScoreWarning
    assert NotationWarning is errors.NotationWarning
    assert AudioModuleWarning is errors.TakescribeWarning


def test_one_filter_silences_every_stage():
    # errors.py's promise: ignoring the root ignores each stage's warnings
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        warnings.filterwarnings("ignore", category=TakescribeWarning)
        for name in errors.__all__:
            cls = getattr(errors, name)
            if isinstance(cls, type) and issubclass(cls, Warning):
                warnings.warn("probe", cls)
    assert caught == []


def _warn_calls(tree: ast.AST):
    for node in ast.walk(tree):
        if not isinstance(node, ast.Call):
            continue
        func = node.func
        if (isinstance(func, ast.Attribute) and func.attr == "warn"
                and isinstance(func.value, ast.Name) and func.value.id == "warnings"):
            yield node
        elif isinstance(func, ast.Name) and func.id == "warn":  # `from warnings import warn`
            yield node


def _category(call: ast.Call):
    for keyword in call.keywords:
        if keyword.arg == "category":
            return keyword.value
    return call.args[1] if len(call.args) > 1 else None


def test_every_warn_call_names_a_tree_category():
    problems, n_calls = [], 0
    for path in sorted(SRC.rglob("*.py")):
        rel = path.relative_to(SRC.parent).with_suffix("")
        module = importlib.import_module(".".join(rel.parts).removesuffix(".__init__"))
        for call in _warn_calls(ast.parse(path.read_text(encoding="utf-8"))):
            n_calls += 1
            where = f"{path.relative_to(SRC.parent)}:{call.lineno}"
            category = _category(call)
            if not isinstance(category, ast.Name):
                problems.append(f"{where}: no category (a bare UserWarning)")
                continue
            cls = getattr(module, category.id, None)
            if not (isinstance(cls, type) and issubclass(cls, TakescribeWarning)):
                problems.append(f"{where}: category {category.id} is not a TakescribeWarning")
    assert n_calls >= 15  # the scan reached the stages' calls
    assert problems == []


@pytest.mark.parametrize("source, expected", [
    ("import warnings\nwarnings.warn('x')\n", [None]),
    ("import warnings\nwarnings.warn('x', AudioWarning)\n", ["AudioWarning"]),
    ("from warnings import warn\nwarn('x',\n     category=ScoreWarning, stacklevel=2)\n", ["ScoreWarning"]),
])
def test_the_scan_sees_every_form_of_call(source, expected):
    # the scanner itself, on the three ways a call can be written
    calls = list(_warn_calls(ast.parse(source)))
    assert [getattr(_category(c), "id", None) for c in calls] == expected
