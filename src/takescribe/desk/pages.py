"""The desk's page templates (Jinja, autoescaped). Words and layout are the desk's own."""

from __future__ import annotations

__all__ = ["TEMPLATES"]

BASE = """<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><meta name="viewport" content="width=device-width, initial-scale=1">
<title>{% block title %}{% endblock %} · takescribe desk</title>
<style>
body{font-family:system-ui,sans-serif;margin:0;color:#1b1b1b;background:#f6f5f1;line-height:1.45}
header{background:#24343f;color:#fff;padding:.6rem 1.2rem;display:flex;gap:1.4rem;align-items:baseline;flex-wrap:wrap}
header b{font-size:1.1rem;margin-right:1rem} header a{color:#e8eef2;text-decoration:none}
header a:hover{text-decoration:underline}
main{max-width:68rem;margin:1rem auto;padding:0 1rem 3rem}
h1{font-size:1.45rem;margin:.6rem 0} h2{font-size:1.1rem;margin-top:1.6rem;border-bottom:1px solid #ccc}
.panel{background:#fff;border:1px solid #d8d6cf;border-radius:6px;padding:.8rem 1rem;margin:.8rem 0}
table{border-collapse:collapse;width:100%} th,td{border-bottom:1px solid #e2e0da;padding:.3rem .5rem;text-align:left}
td.num{text-align:right;font-variant-numeric:tabular-nums}
.note{border-left:4px solid #24343f;background:#eef1f3;padding:.5rem .8rem}
.done-msg{border-left:4px solid #1d6b3a;background:#e8f3ec;padding:.5rem .8rem}
.problem{border-left:4px solid #a33;background:#fbeaea;padding:.5rem .8rem}
.bar{display:inline-block;width:9rem;height:.7rem;background:#e4e4e4;border-radius:3px;vertical-align:middle}
.bar i{display:block;height:100%;background:#2f6f8f;border-radius:3px}
.drop{border:2px dashed #7a8b96;border-radius:8px;padding:2rem;text-align:center;background:#fff}
.drop.over{background:#e8f0f5}
button,.button{background:#24343f;color:#fff;border:0;border-radius:4px;padding:.35rem .8rem;cursor:pointer;
 font-size:.95rem;text-decoration:none;display:inline-block}
button.danger{background:#8a2a2a} label{display:inline-block;margin:.2rem .8rem .2rem 0}
input,select{font-size:.95rem;padding:.2rem}
.finding{display:block;width:100%;text-align:left;background:#fff;color:#1b1b1b;border:1px solid #d8d6cf;margin:.2rem 0}
.finding:hover,.finding.playing{background:#e8f0f5}
.grid circle{cursor:default} .small{font-size:.85rem;color:#555}
</style></head>
<body><header><b>takescribe desk</b><a href="/students">Students</a><a href="/pieces">Pieces</a>
<a href="/bring-in">Bring in recordings</a><a href="/library">Backup</a></header>
<main>{% block body %}{% endblock %}</main>
<script>const CHECK = "{{ check }}";
async function send(url, body){ const r = await fetch(url, {method:"POST", body:body, headers:{"X-Desk-Check":CHECK}});
  let data = {}; try { data = await r.json(); } catch(e) { data = {error: "the desk answered " + r.status}; }
  if (!r.ok && !data.error) data.error = "the desk answered " + r.status; return data; }
function watchJobs(){ const cells = [...document.querySelectorAll("[data-job]")]; if (!cells.length) return;
  const open = cells.filter(c => !["done","failed","refused","stopped"].includes(c.dataset.state));
  if (!open.length) return;
  fetch("/api/jobs?ids=" + open.map(c => c.dataset.job).join(",")).then(r => r.json()).then(data => {
    for (const c of open) { const j = data.jobs[c.dataset.job]; if (!j) continue; c.dataset.state = j.status;
      c.querySelector(".state").textContent = j.words; c.querySelector(".bar i").style.width = (100*j.fraction) + "%";
      if (j.status === "done" && j.take) { const a = c.querySelector(".open"); if (a) { a.href = "/takes/" + j.take; a.hidden = false; } } }
    setTimeout(watchJobs, 1000); }).catch(() => setTimeout(watchJobs, 3000)); }
document.addEventListener("DOMContentLoaded", watchJobs);
</script>{% block script %}{% endblock %}</body></html>
"""

JOB_CELL = """{% macro job_cell(job, take_id=None) -%}
<span data-job="{{ job.id }}" data-state="{{ job.status }}"><span class="bar"><i style="width:{{ (job.fraction or 0) * 100 }}%"></i></span>
<span class="state">{{ job.words }}</span> <a class="open" href="/takes/{{ take_id or '' }}" {% if job.status != 'done' %}hidden{% endif %}>open</a></span>
{%- endmacro %}"""

STUDENTS = """{% extends "base.html" %}{% from "job.html" import job_cell %}
{% block title %}Students{% endblock %}{% block body %}
<h1>Students</h1>
{% if notice %}<p class="done-msg">{{ notice }}</p>{% endif %}
<div class="panel"><table><thead><tr><th>name</th><th>takes</th><th>latest take</th></tr></thead><tbody>
{% for s in students %}<tr><td><a href="/students/{{ s.id }}">{{ s.name }}</a></td><td class="num">{{ s.n_takes }}</td>
<td>{{ s.latest or '' }}</td></tr>{% else %}<tr><td colspan="3">No students yet.</td></tr>{% endfor %}
</tbody></table></div>
<form class="panel" method="post" action="/students"><input type="hidden" name="check" value="{{ check }}">
<label>New student's name <input name="name" id="student-name" required maxlength="200"></label>
<button id="add-student">Add student</button></form>
{% if jobs %}<h2>Being analysed</h2><div class="panel"><table>{% for j in jobs %}
<tr><td>{{ j.label }}</td><td>{{ job_cell(j, j.take_id) }}</td></tr>{% endfor %}</table></div>{% endif %}
<p class="small">Everything here stays on this computer. Findings are drafts for your judgement, not grades;
recordings of young players deserve care: keep backups private.</p>
{% endblock %}"""

STUDENT = """{% extends "base.html" %}{% from "job.html" import job_cell %}
{% block title %}{{ student.name }}{% endblock %}{% block body %}
<h1>{{ student.name }}</h1>
{% for piece in pieces %}<h2>{{ piece.title }} <span class="small">({{ piece.instrument }})</span>
{% if piece.done > 0 %} · <a href="/students/{{ student.id }}/pieces/{{ piece.id }}/over-time" class="over-link">over the weeks</a>{% endif %}</h2>
<div class="panel"><table><thead><tr><th>date</th><th>recording</th><th>analysis</th><th></th></tr></thead><tbody>
{% for t in piece.takes %}<tr><td>{{ t.date }}</td><td>{{ t.label }}</td>
<td>{% if t.job %}{{ job_cell(t.job, t.id) }}{% else %}{{ t.status }}{% endif %}
{% if t.status == 'failed' %}<div class="problem">{{ t.message }}</div>{% endif %}</td>
<td>{% if t.status == 'failed' %}<form method="post" action="/takes/{{ t.id }}/again"><input type="hidden" name="check" value="{{ check }}"><button>analyse again</button></form>{% endif %}</td></tr>
{% endfor %}</tbody></table></div>
{% else %}<p class="panel">No takes yet. <a href="/bring-in">Bring in recordings</a>.</p>{% endfor %}
<h2>Remove</h2>
<form class="panel" method="post" action="/students/{{ student.id }}/delete"
 onsubmit="return confirm('Remove {{ student.name }} with every take, report and draft?')">
<input type="hidden" name="check" value="{{ check }}">
<p>Removes {{ student.name }}, every recording of theirs, the reports and drafts made from them, and their rows in the
database. Backups you exported earlier are not touched.</p><button class="danger" id="remove-student">Remove {{ student.name }}</button></form>
{% endblock %}"""

PIECES = """{% extends "base.html" %}{% block title %}Pieces{% endblock %}{% block body %}
<h1>Pieces</h1>
<div class="panel"><table><thead><tr><th>title</th><th>instrument</th><th>takes</th><th>part</th></tr></thead><tbody>
{% for p in pieces %}<tr><td>{{ p.title }}</td><td>{{ p.instrument }}</td><td class="num">{{ p.n_takes }}</td>
<td>{{ p.part_file.split('.')[-1] }}{% if p.part_name %} ({{ p.part_name }}){% endif %}</td></tr>
{% else %}<tr><td colspan="4">No pieces yet.</td></tr>{% endfor %}</tbody></table></div>
<form class="panel" method="post" action="/pieces" enctype="multipart/form-data"><input type="hidden" name="check" value="{{ check }}">
<h2>New piece</h2>
<label>Title <input name="title" id="piece-title" required maxlength="200"></label>
<label>Instrument <input name="instrument" id="piece-instrument" value="piano" required></label>
<label>Part (MusicXML, .mxl or MIDI) <input type="file" name="part" id="piece-part" required></label>
<label>Which part, if the file has several <input name="part_name" placeholder="name or number"></label>
<button id="add-piece">Add piece</button></form>
{% endblock %}"""

BRING_IN = """{% extends "base.html" %}{% block title %}Bring in recordings{% endblock %}{% block body %}
<h1>Bring in recordings</h1>
<div class="drop" id="drop"><p>Drop recordings here (WAV, FLAC, OGG/Opus, MP3, AIFF), one or many,</p>
<p>or <input type="file" id="files" multiple></p></div>
<div class="panel" id="list-panel" hidden><table id="list"><thead><tr><th>file</th><th>student</th><th>piece</th><th>date</th><th>state</th></tr></thead><tbody></tbody></table>
<p><button id="send-all">Add and analyse</button> <span class="small">Guesses come from the file names; check them before adding.</span></p></div>
{% if watch %}<p class="note">Also watching {{ watch }}: recordings copied there are added when their name tells student and piece.</p>{% endif %}
{% for n in notices %}<p class="problem">{{ n }}</p>{% endfor %}
{% endblock %}{% block script %}<script>
const STUDENTS = {{ students|tojson }}; const PIECES = {{ pieces|tojson }}; let pending = [];
function options(items, chosen, what){ return `<option value="">(choose ${what})</option>` + items.map(i =>
  `<option value="${i.id}" ${i.id === chosen ? "selected" : ""}>${i.name.replace(/[<&>"]/g, c => "&#" + c.charCodeAt(0) + ";")}</option>`).join(""); }
async function addFiles(files){ document.getElementById("list-panel").hidden = false;
  for (const f of files) { const g = await (await fetch("/api/guess?name=" + encodeURIComponent(f.name))).json();
    const day = g.date || new Date(f.lastModified).toISOString().slice(0, 10);
    const row = document.createElement("tr"); row.innerHTML = `<td class="fname"></td><td><select class="student">${options(STUDENTS, g.student_id, "student")}</select></td>
      <td><select class="piece">${options(PIECES, g.piece_id, "piece")}</select></td><td><input type="date" class="date" value="${day}"></td>
      <td class="state-cell">waiting</td>`; row.querySelector(".fname").textContent = f.name;
    document.querySelector("#list tbody").appendChild(row); pending.push({file: f, row: row}); } }
document.getElementById("files").addEventListener("change", e => addFiles([...e.target.files]));
const drop = document.getElementById("drop");
drop.addEventListener("dragover", e => { e.preventDefault(); drop.classList.add("over"); });
drop.addEventListener("dragleave", () => drop.classList.remove("over"));
drop.addEventListener("drop", e => { e.preventDefault(); drop.classList.remove("over"); addFiles([...e.dataTransfer.files]); });
document.getElementById("send-all").addEventListener("click", async () => { const todo = pending; pending = [];
  for (const item of todo) { const r = item.row, cell = r.querySelector(".state-cell"); cell.textContent = "sending";
    const body = new FormData(); body.append("file", item.file); body.append("label", item.file.name);
    body.append("student_id", r.querySelector(".student").value); body.append("piece_id", r.querySelector(".piece").value);
    body.append("date", r.querySelector(".date").value); const data = await send("/api/takes", body);
    if (data.error) { cell.innerHTML = '<span class="problem"></span>'; cell.firstChild.textContent = data.error; continue; }
    cell.innerHTML = `<span data-job="${data.job_id}" data-state="queued"><span class="bar"><i style="width:0%"></i></span> <span class="state">waiting</span> <a class="open" hidden href="#">open</a></span>`; }
  watchJobs(); });
</script>{% endblock %}"""

TAKE = """{% extends "base.html" %}{% block title %}{{ take.student }}, {{ take.date }}{% endblock %}{% block body %}
<h1>{{ take.student }} · {{ take.piece }} · {{ take.date }}</h1>
<p class="small">{{ take.label }} · {{ take.instrument }} · <a href="/students/{{ take.student_id }}">all of {{ take.student }}'s takes</a>
· <a href="/students/{{ take.student_id }}/pieces/{{ take.piece_id }}/over-time">over the weeks</a></p>
<div class="panel"><audio id="player" controls preload="metadata" src="/takes/{{ take.id }}/audio" style="width:100%"></audio>
<p class="small">Choose a finding to hear its passage (from a second before it).</p>
{% for f in findings %}<button class="finding" data-time="{{ f.time }}" data-id="{{ f.id }}">{{ f.text }}</button>
{% else %}<p>No findings: the take follows the part as far as the comparison can tell.</p>{% endfor %}</div>
<div class="panel"><a class="button" id="open-report" href="/takes/{{ take.id }}/report">the full report</a>
<a class="button" href="/takes/{{ take.id }}/file/draft.mid">draft MIDI</a>
<a class="button" href="/takes/{{ take.id }}/file/draft.musicxml">draft MusicXML</a>
<a class="button" href="/takes/{{ take.id }}/file/annotated.musicxml">part with findings (MusicXML)</a>
<a class="button" href="/takes/{{ take.id }}/file/findings.json">findings (JSON)</a></div>
<p class="small">Findings are drafts from a computer comparison; listen before you judge.</p>
{% endblock %}{% block script %}<script>
const player = document.getElementById("player");
for (const b of document.querySelectorAll(".finding")) b.addEventListener("click", () => {
  document.querySelectorAll(".finding").forEach(x => x.classList.remove("playing")); b.classList.add("playing");
  player.currentTime = Math.max(0, parseFloat(b.dataset.time) - 1.0); player.play().catch(() => {}); });
</script>{% endblock %}"""

OVER_TIME = """{% extends "base.html" %}{% block title %}{{ student.name }} · {{ piece.title }} over the weeks{% endblock %}{% block body %}
<h1>{{ student.name }} · {{ piece.title }}: over the weeks</h1>
<p class="small">From the stored findings of {{ n }} analysed take{{ '' if n == 1 else 's' }}, oldest first.
<a href="/students/{{ student.id }}/pieces/{{ piece.id }}/over-time.json">as JSON</a></p>
<div class="panel">{{ content|safe }}</div>{% endblock %}"""

LIBRARY = """{% extends "base.html" %}{% block title %}Backup{% endblock %}{% block body %}
<h1>Backup and moving</h1>
{% if notice %}<p class="done-msg">{{ notice }}</p>{% endif %}
<div class="panel"><p>One file with every student, piece, recording, report and draft of this library, to keep safe or to
open on another computer. It holds recordings of your students: store it where only you can reach it.</p>
<a class="button" href="/library/export" id="export">Download the whole library</a></div>
<form class="panel" method="post" action="/library/import" enctype="multipart/form-data"><input type="hidden" name="check" value="{{ check }}">
<p>Bring in a library file made by a desk (its students, pieces and takes are added to these).</p>
<input type="file" name="archive" required> <button>Bring in</button></form>
<p class="small">Library folder: {{ root }} · database: {{ database }}</p>{% endblock %}"""

MESSAGE = """{% extends "base.html" %}{% block title %}{{ heading }}{% endblock %}{% block body %}
<h1>{{ heading }}</h1><p class="{{ kind }}" id="message">{{ text }}</p>
{% if back %}<p><a href="{{ back }}">back</a></p>{% endif %}{% endblock %}"""

TEMPLATES = {"base.html": BASE, "job.html": JOB_CELL, "students.html": STUDENTS, "student.html": STUDENT,
             "pieces.html": PIECES, "bring_in.html": BRING_IN, "take.html": TAKE, "over_time.html": OVER_TIME,
             "library.html": LIBRARY, "message.html": MESSAGE}
