"""Findings against planted mistakes: the one matching used by tests and benchmarks alike.

A *finding* is what the comparison reports (a ``Finding`` object or its JSON dict); a *planted*
deviation is what a fixture's builder put in the take (``TAKE.deviations.json``, see
fixtures/README.md, or a demo ``planted.json`` entry). A finding reports a planted deviation when

- the kinds are the same;
- every pitch the deviation names is the finding's pitch of that role (``wrong_pitch``: expected
  and played; ``missed``, ``early``, ``late``, ``held_short``, ``held_long``: expected; ``extra``:
  played). Pitches are sounding MIDI numbers;
- the times lie within ``time_tolerance`` seconds; for passages (``rushed``, ``dragged``) the
  finding's span ``[time, end_time]`` overlaps the planted span widened by the tolerance.

Each finding reports at most one deviation and the reverse: a maximum bipartite matching, as
mir_eval's transcription metrics pair notes (Raffel et al., ISMIR 2014), here solved with
scipy's ``linear_sum_assignment`` so that, among matchings of largest size, the summed time
distance is smallest. The tolerance, 0.25 s, is a choice of this project (about an eighth note
at 120 bpm), not a published convention.

A passage can also be taken as reported by note findings: with ``note_kinds_for_passages``
(the demo passes ``("early", "late")``), a finding of one of those kinds reports a planted
passage that lists its notes (demo plan) when it lies on one of them: same played pitch, onset
within the tolerance.

Findings linked to another (the notes of a restart or hesitation) are details of that one event
and are not counted unless ``count_linked``; findings whose status is "to check by ear"
(``status == "check_by_ear"``) are not claims and are not counted unless ``count_uncertain``.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import numpy as np
from scipy.optimize import linear_sum_assignment

TIME_TOLERANCE = 0.25
PITCH_ROLES = {
    "wrong_pitch": ("expected_pitch", "played_pitch"),
    "missed": ("expected_pitch",),
    "extra": ("played_pitch",),
    "early": ("expected_pitch",),
    "late": ("expected_pitch",),
    "held_short": ("expected_pitch",),
    "held_long": ("expected_pitch",),
}
PASSAGE_KINDS = ("rushed", "dragged")
UNCERTAIN_STATUS = "check_by_ear"


def _get(item: Any, key: str, default=None):
    if isinstance(item, Mapping):
        return item.get(key, default)
    return getattr(item, key, default)


def _span(item: Any, *, planted: bool) -> tuple[float, float]:
    """(start, end) seconds of a passage, from either format."""
    if planted:
        if _get(item, "start_s") is not None:
            return float(item["start_s"]), float(item["end_s"])
        notes = _get(item, "notes")  # demo plan: the rushed notes and the resume time
        if notes:
            end = _get(item, "resume_time", notes[-1]["time"])
            return float(notes[0]["time"]), float(end)
    start = float(_get(item, "time"))
    end = _get(item, "end_time")
    return start, float(end) if end is not None else start


def counted_findings(findings: Sequence[Any], *, count_linked: bool = False,
                     count_uncertain: bool = False) -> list[Any]:
    """The findings that are claims about the take (module docstring)."""
    out = []
    for f in findings:
        if not count_linked and _get(f, "linked_to") is not None:
            continue
        if not count_uncertain and _get(f, "status") == UNCERTAIN_STATUS:
            continue
        out.append(f)
    return out


def _on_passage_note(finding: Any, planted: Any, time_tolerance: float) -> float | None:
    """Time distance to the nearest planted note of the passage with the finding's played pitch."""
    dts = [abs(float(_get(finding, "time")) - float(n["time"])) for n in _get(planted, "notes") or ()
           if n.get("pitch") == _get(finding, "played_pitch")]
    return min(dts) if dts and min(dts) <= time_tolerance else None


def reports(finding: Any, planted: Any, *, time_tolerance: float = TIME_TOLERANCE,
            note_kinds_for_passages: Sequence[str] = ()) -> float | None:
    """Time distance in seconds if ``finding`` reports ``planted``, else None."""
    kind = _get(planted, "kind")
    if kind in PASSAGE_KINDS and _get(finding, "kind") in note_kinds_for_passages:
        return _on_passage_note(finding, planted, time_tolerance)
    if _get(finding, "kind") != kind:
        return None
    for role in PITCH_ROLES.get(kind, ()):
        want = _get(planted, role)
        if want is not None and _get(finding, role) != want:
            return None
    if kind in PASSAGE_KINDS:
        a0, a1 = _span(planted, planted=True)
        b0, b1 = _span(finding, planted=False)
        if b1 < a0 - time_tolerance or b0 > a1 + time_tolerance:
            return None
        return abs(b0 - a0)
    dt = abs(float(_get(finding, "time")) - float(_get(planted, "time")))
    return dt if dt <= time_tolerance else None


@dataclass(frozen=True)
class MatchResult:
    """Pairs ``(planted index, finding index)`` into the inputs, with the kinds of both sides."""

    pairs: tuple[tuple[int, int], ...]
    planted_kinds: tuple[str, ...]
    found_kinds: tuple[str, ...]

    @property
    def hits(self) -> int:
        return len(self.pairs)

    @property
    def n_found(self) -> int:
        return len(self.found_kinds)

    @property
    def n_planted(self) -> int:
        return len(self.planted_kinds)

    @property
    def unmatched_findings(self) -> tuple[int, ...]:
        used = {j for _, j in self.pairs}
        return tuple(j for j in range(self.n_found) if j not in used)

    @property
    def missed_planted(self) -> tuple[int, ...]:
        used = {i for i, _ in self.pairs}
        return tuple(i for i in range(self.n_planted) if i not in used)

    def counts(self) -> dict[str, Counter]:
        """Per kind: Counter(hits, found, planted)."""
        out: dict[str, Counter] = {}
        for kind in set(self.planted_kinds) | set(self.found_kinds):
            out[kind] = Counter(hits=sum(self.planted_kinds[i] == kind for i, _ in self.pairs),
                                found=self.found_kinds.count(kind), planted=self.planted_kinds.count(kind))
        return out


def match_findings(findings: Sequence[Any], planted: Sequence[Any], *,
                   time_tolerance: float = TIME_TOLERANCE, count_linked: bool = False,
                   count_uncertain: bool = False, note_kinds_for_passages: Sequence[str] = ()) -> MatchResult:
    """Match the counted findings to planted deviations (module docstring).

    Finding indices in the result refer to ``counted_findings(findings, ...)``, in order.
    """
    found = counted_findings(findings, count_linked=count_linked, count_uncertain=count_uncertain)
    big = 1e6
    cost = np.full((len(planted), len(found)), big)
    for i, p in enumerate(planted):
        for j, f in enumerate(found):
            dt = reports(f, p, time_tolerance=time_tolerance, note_kinds_for_passages=note_kinds_for_passages)
            if dt is not None:
                cost[i, j] = dt
    pairs: list[tuple[int, int]] = []
    if cost.size:
        rows, cols = linear_sum_assignment(cost)
        pairs = sorted((int(i), int(j)) for i, j in zip(rows, cols) if cost[i, j] < big)
    return MatchResult(tuple(pairs), tuple(_get(p, "kind") for p in planted),
                       tuple(_get(f, "kind") for f in found))


def f_measure(hits: int, found: int, planted: int) -> tuple[float, float, float]:
    """(precision, recall, F) with the mir_eval convention that an empty side scores 0... except
    that no finding on no planted mistake is perfect (1, 1, 1)."""
    if found == 0 and planted == 0:
        return 1.0, 1.0, 1.0
    precision = hits / found if found else 0.0
    recall = hits / planted if planted else 0.0
    f = 0.0 if precision + recall == 0 else 2 * precision * recall / (precision + recall)
    return precision, recall, f
