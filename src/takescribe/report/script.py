"""The page's script: listening from a finding, a note or a bar; repeating a bar; hearing the part.

Everything the script needs is one JSON object written into the page by :func:`page_data`;
the script itself is the constant :data:`SCRIPT` (no library, nothing fetched).

Conventions
-----------
- Playing "from a little before" starts :attr:`ListenSettings.lead` seconds ahead of the
  place, so the ear hears what leads into it.
- "Hear the part" sounds the written notes of the chosen bar and the next at the player's
  pace there (:mod:`takescribe.report.voice`), rendered with an ``OfflineAudioContext`` and
  played through an ``AnalyserNode``; the rendered buffer stays in ``takescribe.lastPart``.
- The script's state lives in one global object, ``window.takescribe``.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any

import numpy as np

from .annotate import is_uncertain, label_of

__all__ = ["ListenSettings", "page_data", "SCRIPT"]


@dataclass(frozen=True)
class ListenSettings:
    """Timing of the listening controls.

    Attributes
    ----------
    lead : float
        Seconds played before a place; one second is a beat or two at usual tempi, enough to
        hear the approach without drifting into the bar before (common practice, no source).
    part_bars : int
        Bars "hear the part" plays from the chosen bar.
    """

    lead: float = 1.0
    part_bars: int = 2


def page_data(comparison: Any, reference: Any, *, note_ids: dict, voice: dict | None,
              settings: ListenSettings | None = None) -> str:
    """The JSON object the script reads (findings, notes, bars, the part's sound)."""
    settings = settings or ListenSettings()
    onsets = np.asarray(comparison.expected_onsets, dtype=float)
    notes: dict = {}
    for k, note_id in note_ids.items():
        entry = notes.setdefault(note_id, {"times": [], "findings": []})
        if k < len(onsets) and np.isfinite(onsets[k]):
            entry["times"].append(round(float(onsets[k]), 3))
    findings = {}
    for f in comparison.findings:
        findings[str(f.id)] = {"time": round(float(f.time), 3), "bar": f.measure, "uncertain": is_uncertain(f)}
        note_id = note_ids.get(f.reference_index) if f.reference_index is not None else None
        if note_id is not None:
            notes[note_id]["findings"].append(f.id)
    starts = sorted((float(t), int(m)) for m, t in comparison.measure_times.items())
    end = float(comparison.summary.get("take_duration", 0.0) or (starts[-1][0] + 2.0 if starts else 0.0))
    bars = {}
    for k, (t, m) in enumerate(starts):
        stop = starts[k + 1][0] if k + 1 < len(starts) else max(end, t + 0.5)
        bars[str(m)] = {"start": round(t, 3), "end": round(stop, 3), "label": label_of(reference, m)}
    data = {"lead": settings.lead, "partBars": settings.part_bars, "findings": findings, "notes": notes,
            "bars": bars, "voice": voice}
    # "</" cannot end the script element early once escaped
    return json.dumps(data, separators=(",", ":")).replace("</", "<\\/")


SCRIPT = r"""
(function () {
  'use strict';
  var D = JSON.parse(document.getElementById('takescribe-data').textContent);
  var T = window.takescribe = {data: D, bar: null, lastPart: null, peak: 0, errors: []};
  var audio = document.getElementById('take');
  var status = document.getElementById('listen-status');
  function say(text) { if (status) { status.textContent = text; } }
  function barOf(t) {
    var best = null;
    Object.keys(D.bars).forEach(function (m) { if (D.bars[m].start <= t + 1e-3) { best = m; } });
    return best;
  }
  function choose(bar) {
    T.bar = bar;
    document.querySelectorAll('.chosen').forEach(function (el) { el.classList.remove('chosen'); });
    if (bar !== null && D.bars[bar]) {
      document.querySelectorAll('[data-n="' + D.bars[bar].label + '"]').forEach(function (el) { el.classList.add('chosen'); });
    }
  }
  function playFrom(t, what) {
    var start = Math.max(0, t - D.lead);
    choose(barOf(t));
    say('Playing from ' + start.toFixed(1) + ' s, just before ' + what + '.');
    if (!audio) { return; }
    audio.currentTime = start;
    var p = audio.play();
    if (p && p.catch) { p.catch(function () {}); }
  }
  T.playFinding = function (id) {
    var f = D.findings[id];
    if (f) { playFrom(f.time, 'finding ' + id); }
  };
  T.playBar = function (bar) {
    var b = D.bars[bar];
    if (b) { playFrom(b.start, 'bar ' + b.label); }
  };
  function barByLabel(label) {
    var found = null;
    Object.keys(D.bars).forEach(function (m) { if (found === null && D.bars[m].label === label) { found = m; } });
    return found;
  }
  T.playNote = function (id) {
    var n = D.notes[id.replace(/-s$/, '')];
    if (!n) { return; }
    if (n.findings.length) { T.playFinding(String(n.findings[0])); return; }
    if (n.times.length) { playFrom(n.times[0], 'this note'); }
  };
  document.addEventListener('click', function (ev) {
    var el = ev.target.closest ? ev.target : ev.target.parentNode;
    var hit = el.closest('[data-finding]');
    if (hit) { T.playFinding(hit.getAttribute('data-finding')); return; }
    hit = el.closest('[data-bar]');
    if (hit) { T.playBar(hit.getAttribute('data-bar')); return; }
    hit = el.closest('g.note[id^="ts-n"]');
    if (hit) { T.playNote(hit.id); return; }
    hit = el.closest('g.mNum');
    if (hit) {
      var m = hit.closest('g.measure');
      var bar = m ? barByLabel(m.getAttribute('data-n')) : null;
      if (bar !== null) { T.playBar(bar); }
    }
  });
  var repeat = document.getElementById('repeat-bar');
  function watch() {
    if (repeat && repeat.checked && T.bar !== null && audio && !audio.paused) {
      var b = D.bars[T.bar];
      if (audio.currentTime >= b.end) { audio.currentTime = Math.max(0, b.start - D.lead); }
    }
    window.requestAnimationFrame(watch);
  }
  window.requestAnimationFrame(watch);
  function renderPart(t0, t1) {
    var v = D.voice, notes = v ? v.notes.filter(function (n) { return n[0] >= t0 - 0.02 && n[0] < t1; }) : [];
    if (!notes.length) { return Promise.resolve(null); }
    var start = notes[0][0], end = 0;
    notes.forEach(function (n) { end = Math.max(end, n[1]); });
    var rate = 44100, ctx = new OfflineAudioContext(1, Math.ceil((end - start + 0.8) * rate), rate);
    var master = ctx.createGain();
    master.gain.value = 0.25;
    master.connect(ctx.destination);
    notes.forEach(function (n) {
      var on = n[0] - start, off = Math.max(n[1] - start, on + 0.08), env = ctx.createGain(), partials = v.partials[String(n[2])];
      var total = 0;
      partials.forEach(function (p) { total += p[1]; });
      env.gain.setValueAtTime(0, on);
      env.gain.linearRampToValueAtTime(1, on + 0.012);
      env.gain.setTargetAtTime(v.decaying ? 0 : 0.7, on + 0.012, v.decaying ? 0.45 : 0.08);
      env.gain.setTargetAtTime(0, off, 0.06);
      env.connect(master);
      partials.forEach(function (p) {
        var osc = ctx.createOscillator(), g = ctx.createGain();
        osc.frequency.value = p[0];
        g.gain.value = p[1] / total;
        osc.connect(g);
        g.connect(env);
        osc.start(on);
        osc.stop(off + 0.5);
      });
    });
    return ctx.startRendering();
  }
  T.hearPart = function () {
    var bar = T.bar;
    if (bar === null) { bar = barOf(audio ? audio.currentTime : 0) || Object.keys(D.bars)[0]; choose(bar); }
    var keys = Object.keys(D.bars), at = keys.indexOf(String(bar));
    var last = D.bars[keys[Math.min(at + D.partBars - 1, keys.length - 1)]];
    if (audio) { audio.pause(); }
    say('The part from bar ' + D.bars[bar].label + ', at the player\'s pace there.');
    return renderPart(D.bars[bar].start, last.end).then(function (buffer) {
      if (!buffer) { say('No written notes in this bar.'); return null; }
      T.lastPart = buffer;
      var live = T.live = T.live || new (window.AudioContext || window.webkitAudioContext)();
      var source = live.createBufferSource(), analyser = T.analyser = live.createAnalyser();
      source.buffer = buffer;
      source.connect(analyser);
      analyser.connect(live.destination);
      if (live.resume) { live.resume(); }
      source.start();
      return buffer;
    });
  };
  var hear = document.getElementById('hear-part');
  if (hear) { hear.addEventListener('click', function () { T.hearPart(); }); }
  var sure = document.getElementById('show-uncertain');
  if (sure) {
    sure.addEventListener('change', function () { document.body.classList.toggle('hide-uncertain', !sure.checked); });
  }
})();
"""
