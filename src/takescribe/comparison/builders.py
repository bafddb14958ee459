"""One builder per kind of finding, reading the settled pairing and tempo of a comparison.

Each builder appends plain dicts to a :class:`Collector`; :func:`takescribe.comparison.findings.number_findings`
turns them into numbered :class:`~takescribe.comparison.findings.Finding` values.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

from ..notes import Note
from .findings import bar_text, pitch_name
from .part import Part
from .settings import PARTIAL_STEPS, ComparisonTuning
from .tempo import TempoModel, take_to_score

__all__: list[str] = []


@dataclass
class Settled:
    """Everything the builders read: the part, the take's notes, the pairing and the tempo."""

    part: Part
    played_on: np.ndarray
    played_off: np.ndarray
    played_pitch: np.ndarray
    model: TempoModel
    predicted: np.ndarray  # expected onset of each part note in the take
    pred_off: np.ndarray
    slopes: np.ndarray  # take seconds per score second at each part note
    same: list  # (ref, played) pairs of the right pitch
    wrong: list  # (ref, played) pairs of another pitch
    alt_expected: dict  # ref -> expected onset on the other side of a pause (split chords)
    pool: np.ndarray  # played notes not left off in a restart
    restarts: list
    abandoned_owner: dict  # played index -> index of its restart
    timing_tolerance: float
    duration_tolerance: float
    judge_durations: bool
    mask_partials: bool
    faint_notes: Sequence[Note]
    tuning: ComparisonTuning
    note_status: list = field(default_factory=list)
    played_status: list = field(default_factory=list)
    group_index: dict = field(default_factory=dict)
    # semitones from sounding to written pitch (a B-flat clarinet: +2): texts name what the player reads
    written_offset: int = 0

    def name(self, pitch) -> str:
        """The pitch as the player reads it (written pitch) for the findings' texts."""
        return pitch_name(int(pitch) + self.written_offset)

    def __post_init__(self) -> None:
        n_ref, n_played = len(self.part.onsets), len(self.played_on)
        self.group_index = {round(float(s), 4): k for k, s in enumerate(self.model.group_scores)}
        self.note_status = ["missed"] * n_ref
        self.played_status = ["extra"] * n_played
        for i, j in self.same:
            self.note_status[i] = "played"
            self.played_status[j] = "matched"
        for i, j in self.wrong:
            self.note_status[i] = "wrong_pitch"
            self.played_status[j] = "matched"

    def sounds_through(self, j: int, t: float) -> bool:
        """Played note ``j`` was already sounding at take time ``t`` and went on after it."""
        tol = self.timing_tolerance
        return self.played_on[j] < t - tol and self.played_off[j] > t + tol


class Collector:
    """The findings as plain dicts, in the order they are found."""

    def __init__(self) -> None:
        self.raw: list[dict] = []

    def add(self, kind: str, time: float, **kw) -> dict:
        item = {"kind": kind, "time": float(time), **kw}
        self.raw.append(item)
        return item


def restart_findings(ctx: Settled, out: Collector) -> list[dict]:
    """One ``restart`` finding per restart, placed where the left-off attempt was in the part."""
    part = ctx.part
    items = []
    for r in ctx.restarts:
        fm = part.where(r.from_ref)
        tm = part.where(r.to_ref)
        replayed = float(part.onsets[r.from_ref] - part.onsets[r.to_ref])
        items.append(out.add(
            "restart", r.from_time, **fm, deviation=replayed, reference_index=r.to_ref,
            from_time=r.from_time, to_time=r.to_time, from_measure=fm["measure"], from_beat=fm["beat"],
            to_measure=tm["measure"], to_beat=tm["beat"],
            text=(f"{bar_text(fm)}: stopped and started again from {bar_text(tm, lower=True)}. "
                  f"The {len(r.abandoned)} notes of the attempt that was left off are listed with it."),
        ))
    return items


def hesitation_findings(ctx: Settled, out: Collector) -> dict:
    """One ``hesitation`` finding per pause; returns onset group -> its finding."""
    part, model, played_on, pool = ctx.part, ctx.model, ctx.played_on, ctx.pool
    hesitation_of_group: dict = {}
    ref_of_played = {j: i for i, j in ctx.same + ctx.wrong}
    pool_onsets = np.unique(played_on[pool]) if pool.size else np.zeros(0)
    reach = ctx.tuning.resume_search
    for k, pause, start in model.hesitations:
        refs_here = [i for i in range(len(part.onsets)) if abs(part.onsets[i] - model.group_scores[k]) <= 1e-4]
        i0 = min(refs_here, key=lambda i: part.pitches[i]) if refs_here else None
        # the music resumes after the longest silence between onsets around the delayed group
        # (a chord split by the pause puts the delayed group's median on either side of it)
        near = pool_onsets[(pool_onsets >= start - pause - reach) & (pool_onsets <= start + pause + reach)]
        if near.size >= 2:
            resume = float(near[1:][np.argmax(np.diff(near))])
            start = resume - pause
            resumed = [j for j in pool if abs(played_on[j] - resume) < 1e-9 and j in ref_of_played]
            if resumed:
                i0 = min((ref_of_played[j] for j in resumed), key=lambda i: (part.onsets[i], part.pitches[i]))
        pos = part.where(i0) if i0 is not None else {"measure": None, "beat": None, "measure_label": None}
        hesitation_of_group[k] = out.add(
            "hesitation", start, **pos, expected_pitch=None if i0 is None else int(part.pitches[i0]),
            deviation=pause, reference_index=i0,
            text=(f"{bar_text(pos)}: a pause of {pause:.1f} s before "
                  f"{'this note' if i0 is None else ctx.name(part.pitches[i0])} that the part does not have."),
        )
    return hesitation_of_group


def _timing_residual(ctx: Settled, i: int, j: int, g: int | None) -> float:
    """Played minus expected onset of pair (i, j), against the most lenient reading of the pulse."""
    part, model, played_on = ctx.part, ctx.model, ctx.played_on
    if i in ctx.alt_expected:
        return float(played_on[j] - float(ctx.alt_expected[i]))
    expected = model.predict(float(part.onsets[i]), exclude_group=g, fallback=float(ctx.predicted[i]))
    residual = float(played_on[j] - expected)
    # at a segment edge the pulse is uncertain: a note is early or late only if it is
    # so against both readings of it (the local line and the overall pace)
    edge = model.edge_prediction(float(part.onsets[i]), exclude_group=g)
    if edge is not None and abs(played_on[j] - edge) < abs(residual):
        residual = float(played_on[j] - edge)
    # and rubato within a phrase is the player's pulse too: a note is early or late
    # only if it is so against the closer line as well
    close = model.close_prediction(float(part.onsets[i]), exclude_group=g,
                                   fit_tolerance=ctx.tuning.close_fit_share * ctx.timing_tolerance)
    if close is not None and abs(played_on[j] - close) < abs(residual):
        residual = float(played_on[j] - close)
    return residual


def _silence_after(ctx: Settled, j: int) -> float:
    """Seconds of silence between the release of played note ``j`` and the next onset.

    A note released just as the next one starts was held as long as the line allowed (an
    early or extra next note is reported on its own), so it is not called short.
    """
    on = ctx.played_on[ctx.pool]
    later = on[on > ctx.played_on[j] + ctx.tuning.chord_spread]
    if later.size == 0:
        return np.inf
    return float(later.min() - ctx.played_off[j])


def _length_kind(ctx: Settled, i: int, j: int, g, ratio: float, before_hesitation: set, unheard_by_pitch: dict):
    if ratio < 1.0 - ctx.duration_tolerance and _silence_after(ctx, j) > ctx.timing_tolerance:
        return "held_short"
    if (ratio > 1.0 + ctx.duration_tolerance and g not in before_hesitation
            and not any(ctx.sounds_through(j, t) for t in unheard_by_pitch.get(int(ctx.part.pitches[i]), ()))):
        return "held_long"
    return None


def timing_and_length_findings(ctx: Settled, out: Collector, hesitation_of_group: dict) -> set:
    """``early`` / ``late`` and ``held_short`` / ``held_long`` of the right-pitch pairs; returns
    the part notes flagged."""
    part, played_on, played_off = ctx.part, ctx.played_on, ctx.played_off
    # the group just before each hesitation: a note held into the pause belongs to the pause
    before_hesitation = {k - 1 for k in hesitation_of_group}
    # unpartnered reference notes, by pitch: a played note that sounds on through where one of
    # them should start is a repeated note not heard apart (not re-articulated, or merged by
    # the transcription); that is one event, reported on the missing note, not also held_long
    unheard_by_pitch: dict[int, list] = {}
    for i in range(len(part.onsets)):
        if ctx.note_status[i] == "missed":
            unheard_by_pitch.setdefault(int(part.pitches[i]), []).append(float(ctx.predicted[i]))
    flagged: set = set()
    for i, j in ctx.same:
        pos = part.where(i)
        g = ctx.group_index.get(round(float(part.onsets[i]), 4))
        residual = _timing_residual(ctx, i, j, g)
        name = ctx.name(part.pitches[i])
        common = dict(**pos, expected_pitch=int(part.pitches[i]), played_pitch=int(ctx.played_pitch[j]),
                      reference_index=i, played_index=j)
        if abs(residual) > ctx.timing_tolerance:
            kind = "late" if residual > 0 else "early"
            linked = hesitation_of_group.get(g) if kind == "late" else None
            text = (f"{bar_text(pos)}: {name} came {abs(residual):.2f} s "
                    f"{'after' if kind == 'late' else 'ahead of'} the player's own pulse"
                    + (" (just after a pause)." if linked is not None else "."))
            out.add(kind, played_on[j], deviation=residual, linked=linked, text=text, **common)
            flagged.add(i)
        expected_length = float(ctx.slopes[i] * (part.offsets[i] - part.onsets[i]))
        played_length = float(played_off[j] - played_on[j])
        difference = played_length - expected_length
        if ctx.judge_durations and expected_length > 0 and abs(difference) > ctx.timing_tolerance:
            kind = _length_kind(ctx, i, j, g, played_length / expected_length, before_hesitation, unheard_by_pitch)
            if kind is not None:
                out.add(kind, played_on[j], deviation=difference,
                        text=(f"{bar_text(pos)}: {name} held {played_length:.2f} s; at this pace it lasts "
                              f"about {expected_length:.2f} s."), **common)
                flagged.add(i)
    return flagged


def wrong_pitch_findings(ctx: Settled, out: Collector) -> None:
    part, played_pitch = ctx.part, ctx.played_pitch
    for i, j in ctx.wrong:
        pos = part.where(i)
        step = int(played_pitch[j] - part.pitches[i])
        out.add("wrong_pitch", ctx.played_on[j], **pos, expected_pitch=int(part.pitches[i]),
                played_pitch=int(played_pitch[j]), deviation=float(step), reference_index=i, played_index=j,
                text=(f"{bar_text(pos)}: played {ctx.name(played_pitch[j])} where the part has "
                      f"{ctx.name(part.pitches[i])} ({step:+d} semitone{'s' if abs(step) != 1 else ''})."))


def _masked_by_partials(ctx: Settled, i: int) -> bool:
    """A played note a partial below part note ``i`` (12, 19, 24 semitones) sounds where it starts."""
    if not ctx.mask_partials:
        return False
    t = float(ctx.predicted[i])
    window = ctx.tuning.faint_window
    return any(ctx.played_status[j] == "matched" and int(ctx.part.pitches[i] - ctx.played_pitch[j]) in PARTIAL_STEPS
               and ctx.played_on[j] <= t + window and ctx.played_off[j] > t for j in range(len(ctx.played_on)))


def missed_findings(ctx: Settled, out: Collector) -> None:
    """``missed`` part notes, unless faint evidence or a lower note's partials leave them uncertain."""
    part = ctx.part
    faint_onsets: dict[int, list] = {}
    for n in ctx.faint_notes or ():
        faint_onsets.setdefault(int(n.pitch), []).append(n.onset)
    for i in range(len(part.onsets)):
        if ctx.note_status[i] != "missed":
            continue
        heard = np.asarray(faint_onsets.get(int(part.pitches[i]), []), dtype=float)
        if heard.size and np.min(np.abs(heard - ctx.predicted[i])) <= ctx.tuning.faint_window:
            # some evidence the note sounded: too faint for the draft, too much to blame the player
            ctx.note_status[i] = "uncertain"
            continue
        if _masked_by_partials(ctx, i):
            # an octave, twelfth or double octave above a note sounding with it: its partials
            # are that note's overtones, so the spectrum cannot tell whether it was played
            ctx.note_status[i] = "uncertain"
            continue
        pos = part.where(i)
        merged = any(ctx.sounds_through(j, float(ctx.predicted[i])) for j in range(len(ctx.played_on))
                     if ctx.played_pitch[j] == part.pitches[i] and ctx.played_status[j] == "matched")
        text = (f"{bar_text(pos)}: {ctx.name(part.pitches[i])} in the part was not heard"
                + (" as a new note: the same pitch sounded on through its place (not played again?)."
                   if merged else "."))
        out.add("missed", ctx.predicted[i], **pos, expected_pitch=int(part.pitches[i]), reference_index=i, text=text)


def extra_findings(ctx: Settled, out: Collector, restart_items: list) -> None:
    """``extra`` played notes; those of a left-off attempt are linked to its restart."""
    part, model = ctx.part, ctx.model

    def take_position(t: float) -> dict:
        m, b = part.measure_position(take_to_score(model, t))
        return {"measure": m, "beat": b, "measure_label": part.label(m)}

    for j in range(len(ctx.played_on)):
        if ctx.played_status[j] != "extra":
            continue
        owner = ctx.abandoned_owner.get(j)
        linked = restart_items[owner] if owner is not None else None
        attempted = ctx.restarts[owner].abandoned_refs.get(j) if owner is not None else None
        # a note of a left-off attempt sits where that attempt was in the part
        pos = part.where(attempted) if attempted is not None else take_position(float(ctx.played_on[j]))
        text = (f"{bar_text(pos)}: {ctx.name(ctx.played_pitch[j])} "
                + ("from the attempt that was started again." if linked is not None else "that is not in the part."))
        out.add("extra", ctx.played_on[j], **pos, played_pitch=int(ctx.played_pitch[j]), played_index=j,
                linked=linked, text=text)
