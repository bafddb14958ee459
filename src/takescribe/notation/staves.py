"""Staves and voices: the piano's two hands, and chords and voices within a staff."""

from __future__ import annotations

from fractions import Fraction
from typing import Sequence

import numpy as np

from .model import QuantizedNote
from .settings import HANDS

__all__ = ["split_hands", "assign_voices"]



def split_hands(notes: Sequence[QuantizedNote]) -> tuple[list[QuantizedNote], list[QuantizedNote]]:
    """Split piano notes between right and left hand with continuity.

    Greedy over onsets: for the notes starting together (sorted by pitch) every split
    point is scored by distance to each hand's running centre, the span of each hand
    with the notes it still holds (more than a tenth costs a lot), and a weak pull of
    the right hand above and the left hand below middle C. Centres follow the chosen
    assignment, so a line that wanders across middle C stays in one hand.

    Returns
    -------
    (right, left) : lists of QuantizedNote
    """
    right: list[QuantizedNote] = []
    left: list[QuantizedNote] = []
    if not notes:
        return right, left
    groups: dict[Fraction, list[QuantizedNote]] = {}
    for n in notes:
        groups.setdefault(n.onset_quarters, []).append(n)
    pitches = [n.pitch for n in notes]
    c_right = float(max(np.percentile(pitches, 75), HANDS.left_ceiling))
    c_left = float(min(np.percentile(pitches, 25), HANDS.right_floor))
    active_r: list[QuantizedNote] = []
    active_l: list[QuantizedNote] = []
    for onset in sorted(groups):
        group = sorted(groups[onset], key=lambda n: n.pitch)
        active_r = [n for n in active_r if n.offset_quarters > onset]
        active_l = [n for n in active_l if n.offset_quarters > onset]
        held_r = [n.pitch for n in active_r]
        held_l = [n.pitch for n in active_l]
        best = None
        for k in range(len(group) + 1):
            lh = [n.pitch for n in group[:k]]
            rh = [n.pitch for n in group[k:]]
            cost = sum(abs(p - c_left) for p in lh) + sum(abs(p - c_right) for p in rh)
            for hand, held in ((lh, held_l), (rh, held_r)):
                allp = hand + held if hand else []
                if allp:
                    span = max(allp) - min(allp)
                    cost += HANDS.span_penalty * max(0, span - HANDS.hand_span)
                if len(hand) > HANDS.max_notes:
                    cost += HANDS.crowd_penalty * (len(hand) - HANDS.max_notes)
            cost += sum(HANDS.middle_pull * max(0, p - HANDS.left_ceiling) for p in lh)
            cost += sum(HANDS.middle_pull * max(0, HANDS.right_floor - p) for p in rh)
            # hands crossing held notes of the other hand
            if lh and held_r and max(lh) > min(held_r):
                cost += HANDS.crossing_penalty
            if rh and held_l and min(rh) < max(held_l):
                cost += HANDS.crossing_penalty
            if best is None or cost < best[0]:
                best = (cost, k)
        k = best[1]
        left.extend(group[:k])
        right.extend(group[k:])
        active_l.extend(group[:k])
        active_r.extend(group[k:])
        if k:
            c_left = (1 - HANDS.centre_follow) * c_left + HANDS.centre_follow * float(np.mean([n.pitch for n in group[:k]]))
        if k < len(group):
            c_right = (1 - HANDS.centre_follow) * c_right + HANDS.centre_follow * float(np.mean([n.pitch for n in group[k:]]))
        if c_right - c_left < HANDS.min_centre_gap:
            mid = (c_right + c_left) / 2
            c_right, c_left = mid + HANDS.min_centre_gap / 2, mid - HANDS.min_centre_gap / 2
    return right, left


def assign_voices(notes: Sequence[QuantizedNote], *, max_voices: int = 2) -> list[list[QuantizedNote]]:
    """Chords within a voice, a second voice where lines overlap in one staff.

    Notes that start and end together form a chord. Each chord goes to the first voice
    that is free at its onset (higher chords first). When every voice is busy, the voice
    that frees first is clipped at the new onset (legato overlap) -- or, if the busy chord
    starts at the same time, the new notes join it with its length.
    """
    chords: dict[tuple[Fraction, Fraction], list[QuantizedNote]] = {}
    for n in notes:
        chords.setdefault((n.onset_quarters, n.duration_quarters), []).append(n)
    order = sorted(chords, key=lambda k: (k[0], -max(n.pitch for n in chords[k])))
    voices: list[list[list[QuantizedNote]]] = []
    ends: list[Fraction] = []
    for k in order:
        onset = k[0]
        chord = chords[k]
        free = [v for v in range(len(voices)) if ends[v] <= onset]
        if free:
            v = free[0]
        elif len(voices) < max_voices:
            voices.append([])
            ends.append(Fraction(0))
            v = len(voices) - 1
        else:
            v = min(range(len(voices)), key=lambda i: ends[i])
            last = voices[v][-1]
            if last[0].onset_quarters < onset:
                clipped = [QuantizedNote(x.onset_quarters, onset - x.onset_quarters, x.pitch, x.velocity, x.source)
                           for x in last]
                voices[v][-1] = clipped
            else:
                length = last[0].duration_quarters
                merged = [x for x in last] + [
                    QuantizedNote(x.onset_quarters, length, x.pitch, x.velocity, x.source)
                    for x in chord if x.pitch not in {y.pitch for y in last}
                ]
                voices[v][-1] = merged
                continue
        voices[v].append(list(chord))
        ends[v] = onset + chord[0].duration_quarters
    return [[n for ch in voice for n in ch] for voice in voices]

