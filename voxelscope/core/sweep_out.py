"""What a sweep hands back: ``findings.tsv``, one session per finding, and ``index.html``.

Rows are the clusters' peaks of every run's map and of every subject's combined map
(``run`` is ``all`` there), plus one row per run or combination that failed, with its
one-line reason. Flagged rows come first; within each group rows are ordered by subject,
task, session, run (``all`` last) and cluster, so the same findings give the same file.

Each finding's session (:mod:`voxelscope.core.session` format, ``sessions/*.voxelscope.json``)
opens the window on that run (every run of the subject for a combined finding) with the
sweep's model, the map of the sweep's kernel at its threshold and the crosshair on the
peak. The input digests in the sessions are the ones the workers recorded, so writing
them reads no image again.

``index.html`` is one self-contained file: inline style and script, the table sortable by
any column and filterable by text, each finding's small figure as a PNG data URI, links to
the sessions, the model settings, every input's SHA-256, and the research-use caution.

Examples
--------
>>> FINDING_COLUMNS[:4], FINDING_COLUMNS[13:15]
(('subject', 'session', 'task', 'run'), ('flags', 'session_file'))
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import json
import os
from pathlib import Path
from typing import Any

from .jsonsafe import json_safe
from .numfmt import format_value
from .sweep import SweepResult, SweepSettings

__all__ = ["CAUTION", "FINDING_COLUMNS", "finding_rows", "write_outputs"]

#: Columns of ``findings.tsv``, in order.
FINDING_COLUMNS = (
    "subject",
    "session",
    "task",
    "run",
    "cluster",
    "voxels",
    "peak_i",
    "peak_j",
    "peak_k",
    "peak_x_mm",
    "peak_y_mm",
    "peak_z_mm",
    "t",
    "flags",
    "session_file",
    "estimate",
    "edge_mm",
    "task_motion_r",
    "estimate_kept",
    "runs_q_p",
    "reason",
)

CAUTION = (
    "Research software, not a medical device: not for clinical diagnosis. Local regulations "
    "and licensed clinical practice come first."
)


def _num(v: Any, fmt: str) -> str:
    if v is None:
        return ""
    try:
        return format(float(v), fmt)
    except (TypeError, ValueError):
        return ""


def _tsv_cell(v: Any) -> str:
    return " ".join(str(v).replace("\t", " ").split())


def finding_rows(result: SweepResult) -> list[dict[str, Any]]:
    """Every finding (and failure) as a row, flagged first; each row also carries the
    figure (``_figure``, base64 PNG), the flag texts (``_flag_texts``) and what its
    session needs (``_session``)."""
    rows = []
    for r in result.runs:
        agreement: dict[str, Any] = {}
        for s in result.subjects:
            agreement.update(s.get("agreement", {}))
        rows.extend(_rows_of(r, agreement))
    for s in result.subjects:
        rows.extend(_rows_of(s, {}))

    def order(row):
        return (
            0 if row["flags"] else 1,
            row["subject"],
            row["task"],
            row["session"],
            row["run"] == "all",
            row["run"],
            int(row["cluster"]) if str(row["cluster"]).isdigit() else 0,
        )

    rows.sort(key=order)
    return rows


def _rows_of(res: dict, agreement: dict) -> list[dict[str, Any]]:
    base = {
        "subject": res["subject"],
        "session": res["session"],
        "task": res["task"],
        "run": res["run"],
        "_key": res["key"],
        "_kind": res["kind"],
    }
    if res["status"] != "ok":
        return [
            {
                **base,
                **{c: "" for c in FINDING_COLUMNS if c not in base},
                "flags": "failed",
                "reason": res.get("reason", ""),
                "_flag_texts": [("failed", res.get("reason", ""))],
                "_figure": None,
                "_finding": None,
            }
        ]
    rows = []
    for f in res["findings"]:
        flags = [tuple(x) for x in f["flags"]]
        agree = agreement.get(f"{res['key']}#{f['cluster']}")
        if agree and agree.get("alone"):
            ts = ", ".join(format_value("t", t) for t in agree["others_t"])
            flags.append(
                (
                    "this-run-only",
                    f"The subject's other runs do not show it here (t {ts}): this run alone "
                    "carries it.",
                )
            )
        ids = list(dict.fromkeys(fid for fid, _t in flags))
        q_p = f.get("q_p") if res["kind"] == "subject" else (agree or {}).get("q_p")
        i, j, k = f["peak_ijk"]
        x, y, z = f["peak_mm"]
        rows.append(
            {
                **base,
                "cluster": f["cluster"],
                "voxels": f["voxels"],
                "peak_i": i,
                "peak_j": j,
                "peak_k": k,
                "peak_x_mm": _num(x, ".2f"),
                "peak_y_mm": _num(y, ".2f"),
                "peak_z_mm": _num(z, ".2f"),
                "t": _num(f["t"], ".3f"),
                "flags": ";".join(ids),
                "session_file": "",
                "estimate": _num(f.get("estimate"), ".4g"),
                "edge_mm": _num(f.get("edge_mm"), ".1f"),
                "task_motion_r": _num(f.get("task_motion_r"), ".3f"),
                "estimate_kept": _num(f.get("estimate_kept"), ".3f"),
                "runs_q_p": _num(q_p, ".3g"),
                "reason": "",
                "_flag_texts": flags,
                "_figure": f.get("figure_png"),
                "_finding": f,
            }
        )
    return rows


# ----------------------------------------------------------------------------- sessions


def _session_json(row: dict, result: SweepResult, settings: SweepSettings, folder: Path) -> dict:
    from .model import ModelSettings
    from .session import Session, session_to_json

    by_key = {r["key"]: r for r in result.runs}
    res = by_key.get(row["_key"])
    if row["_kind"] == "subject":
        subj = next(s for s in result.subjects if s["key"] == row["_key"])
        members = [by_key[k] for k in subj["run_keys"]]
    else:
        members = [res]
    files: dict[str, Path] = {}
    records: dict[str, dict] = {}
    for n, m in enumerate(members, start=1):
        suffix = "" if n == 1 else f" {n}"
        for role in ("run", "events", "confounds"):
            rec = m["inputs"].get(role)
            if rec:
                files[role + suffix] = Path(rec["path"])
                records[role + suffix] = rec
        if n == 1:
            sidecars = sorted(k for k in m["inputs"] if k.startswith("sidecar"))
            if sidecars:
                nearest = m["inputs"][sidecars[-1] if len(sidecars) > 1 else sidecars[0]]
                files["sidecar"] = Path(nearest["path"])
                records["sidecar"] = nearest
    model_fields = dict(members[0]["model"])
    model_fields["kernels"] = tuple(model_fields["kernels"])
    for name in ("confound_columns", "modulators"):
        if isinstance(model_fields.get(name), list):
            model_fields[name] = tuple(model_fields[name])
    model = ModelSettings(**model_fields)
    session = Session(
        files=files,
        model=model,
        voxel=tuple(int(v) for v in row["_finding"]["peak_ijk"]),
        map={
            "threshold": float(settings.threshold),
            "kernel": settings.kernel,
            "stat": "t",
            "source": "model",
            "visible": True,
        },
    )
    data = session_to_json(session, folder, digests=False)
    for role, rec in records.items():
        if role in data["files"]:
            data["files"][role]["sha256"] = rec["sha256"]
            data["files"][role]["size"] = rec["size"]
    return data


# ----------------------------------------------------------------------------- outputs


def write_outputs(result: SweepResult, settings: SweepSettings) -> list[dict[str, Any]]:
    """Write ``findings.tsv``, the sessions, ``settings.json`` and ``index.html`` into the
    sweep's folder; returns the rows."""
    from .atomic import write_text

    out = result.out
    sessions = out / "sessions"
    sessions.mkdir(exist_ok=True)
    rows = finding_rows(result)
    wanted = set()
    for row in rows:
        if row["_finding"] is None:
            continue
        name = f"{row['_key']}_cluster-{row['cluster']}.voxelscope.json"
        data = _session_json(row, result, settings, sessions)
        text = json.dumps(data, indent=1, ensure_ascii=False, allow_nan=False)
        write_text(sessions / name, text + "\n", force=True, kind="session")
        row["session_file"] = f"sessions/{name}"
        wanted.add(name)
    for old in sessions.glob("*.voxelscope.json"):  # findings of an earlier sweep
        if old.name not in wanted:
            try:
                old.unlink()
            except OSError:
                pass
    lines = ["\t".join(FINDING_COLUMNS)]
    for row in rows:
        lines.append("\t".join(_tsv_cell(row[c]) for c in FINDING_COLUMNS))
    write_text(out / "findings.tsv", "\n".join(lines) + "\n", force=True)
    write_text(
        out / "settings.json",
        json.dumps(json_safe(settings.to_json()), indent=1, sort_keys=True) + "\n",
        force=True,
    )
    write_text(out / "index.html", _page(result, settings, rows), force=True)
    return rows


_STYLE = """
body{font:14px/1.45 system-ui,sans-serif;margin:24px;color:#1d1d1d;background:#fafafa}
h1{font-size:22px;margin:0 0 4px} h2{font-size:17px;margin:28px 0 8px}
.caution{border-left:4px solid #D55E00;background:#fff4ec;padding:8px 12px;margin:12px 0}
table{border-collapse:collapse;background:#fff} td,th{border:1px solid #ddd;padding:4px 6px;
vertical-align:top;text-align:left} th{background:#eef1f4;cursor:pointer;user-select:none;
position:sticky;top:0} tr.flagged td{background:#fff8e6} .flag{display:inline-block;
background:#D55E00;color:#fff;border-radius:3px;padding:0 5px;margin:1px;font-size:12px}
.why{font-size:12px;color:#444;max-width:34em} img{display:block;width:300px}
#filter{font-size:14px;padding:4px 8px;width:24em} .num{text-align:right;
font-variant-numeric:tabular-nums} code{font-size:12px} .small{font-size:12px;color:#555}
"""

_SCRIPT = """
(function(){
var table=document.getElementById('findings'),body=table.tBodies[0];
var box=document.getElementById('filter'),only=document.getElementById('flagged');
function apply(){var q=box.value.toLowerCase(),f=only.checked,n=0;
 Array.prototype.forEach.call(body.rows,function(r){
  var show=(!q||r.textContent.toLowerCase().indexOf(q)>=0)&&(!f||r.className=='flagged');
  r.style.display=show?'':'none';if(show)n++;});
 document.getElementById('count').textContent=n+' of '+body.rows.length+' rows';}
box.addEventListener('input',apply);only.addEventListener('change',apply);
Array.prototype.forEach.call(table.tHead.rows[0].cells,function(th,col){
 th.addEventListener('click',function(){
  var asc=th.getAttribute('data-dir')!='asc';th.setAttribute('data-dir',asc?'asc':'desc');
  var rows=Array.prototype.slice.call(body.rows);
  rows.sort(function(a,b){var x=a.cells[col].getAttribute('data-v'),
   y=b.cells[col].getAttribute('data-v');var nx=parseFloat(x),ny=parseFloat(y);
   var c=(!isNaN(nx)&&!isNaN(ny))?nx-ny:x.localeCompare(y);return asc?c:-c;});
  rows.forEach(function(r){body.appendChild(r);});});});
apply();})();
"""

_SHOWN = (
    ("subject", "subject"),
    ("session", "session"),
    ("task", "task"),
    ("run", "run"),
    ("cluster", "cluster"),
    ("voxels", "voxels"),
    ("t", "t"),
    ("peak", "peak (i, j, k; x, y, z mm)"),
    ("flags", "flags"),
    ("edge_mm", "edge (mm)"),
    ("task_motion_r", "task-motion r"),
    ("runs_q_p", "runs Q p"),
    ("figure", "figure"),
    ("session_file", "open"),
)


def _cell(row: dict, name: str) -> tuple[str, str]:
    """(sort value, inner HTML) of one cell."""
    e = html.escape
    if name == "peak":
        if row["_finding"] is None:
            return "", ""
        text = f"({row['peak_i']}, {row['peak_j']}, {row['peak_k']}); "
        text += f"{row['peak_x_mm']}, {row['peak_y_mm']}, {row['peak_z_mm']}"
        return text, e(text)
    if name == "flags":
        parts = [f'<span class="flag">{e(fid)}</span>' for fid, _t in row["_flag_texts"]]
        why = "".join(f"<div class='why'>{e(t)}</div>" for _f, t in row["_flag_texts"])
        return row["flags"], "".join(parts) + why
    if name == "figure":
        fig = row["_figure"]
        if not fig:
            return "", ""
        base64.b64decode(fig, validate=True)  # only base64 goes into the page
        alt = f"signal at the peak of cluster {row['cluster']}"
        return "", f'<img alt="{e(alt)}" src="data:image/png;base64,{fig}">'
    if name == "session_file":
        p = row["session_file"]
        if not p:
            return "", ""
        return p, f'<a href="{e(p)}" title="voxelscope view --session {e(p)}">session</a>'
    value = str(row.get(name, ""))
    return value, e(value)


def _page(result: SweepResult, settings: SweepSettings, rows: list[dict]) -> str:
    e = html.escape
    n_flag = sum(1 for r in rows if r["flags"])
    n_fail = sum(1 for r in rows if r["flags"] == "failed")
    now = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    ok_runs = [r for r in result.runs if r["status"] == "ok"]
    out = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>voxelscope sweep: {e(result.plan.root.name)}</title>",
        f"<style>{_STYLE}</style></head><body>",
        f"<h1>Sweep of {e(str(result.plan.root))}</h1>",
        f'<p class="caution">{e(CAUTION)}</p>',
        f"<p>{len(result.runs)} run(s), {len(result.subjects)} combined subject map(s); "
        f"{len(rows) - n_fail} finding(s), {n_flag - n_fail} flagged, {n_fail} failure(s). "
        f"{e(settings.describe())}. Written {e(now)}.</p>",
    ]
    for note in result.plan.skipped:
        out.append(f'<p class="small">{e(note)}</p>')
    out += [
        "<h2>Findings</h2>",
        '<p><input id="filter" type="search" placeholder="filter: subject, flag, run...">',
        ' <label><input id="flagged" type="checkbox"> flagged only</label>',
        ' <span id="count" class="small"></span></p>',
        '<p class="small">Click a column title to sort. Each session opens the window at the '
        "peak with that run and model: <code>voxelscope view --session FILE</code>.</p>",
        '<table id="findings"><thead><tr>',
        *(f"<th>{e(title)}</th>" for _n, title in _SHOWN),
        "</tr></thead><tbody>",
    ]
    numeric = {"cluster", "voxels", "t", "edge_mm", "task_motion_r", "runs_q_p"}
    for row in rows:
        cls = ' class="flagged"' if row["flags"] else ""
        cells = []
        for name, _title in _SHOWN:
            v, inner = _cell(row, name)
            if name == "t" and v:
                v = str(abs(float(v)))  # sort by strength
            klass = ' class="num"' if name in numeric else ""
            cells.append(f'<td{klass} data-v="{e(v)}">{inner}</td>')
        out.append(f"<tr{cls}>{''.join(cells)}</tr>")
    out.append("</tbody></table>")
    out.append("<h2>Model settings</h2>")
    out.append(
        '<p class="small">Also in <a href="settings.json">settings.json</a>; each run\'s '
        "resolved model is in <code>runs/KEY.json</code>.</p>"
    )
    out.append(
        f"<pre>{e(json.dumps(json_safe(settings.to_json()), indent=1, sort_keys=True))}</pre>"
    )
    out.append(
        "<h2>Inputs</h2><table><thead><tr><th>run</th><th>role</th><th>file</th>"
        "<th>bytes</th><th>SHA-256</th></tr></thead><tbody>"
    )
    for r in ok_runs:
        for role, rec in r.get("inputs", {}).items():
            out.append(
                f"<tr><td>{e(r['key'])}</td><td>{e(role)}</td><td>{e(os.fspath(rec['path']))}"
                f"</td><td class='num'>{rec['size']}</td><td><code>{e(rec['sha256'])}</code>"
                "</td></tr>"
            )
    out.append("</tbody></table>")
    notes = [(r["key"], n) for r in ok_runs for n in r.get("notes", [])]
    if notes:
        out.append("<h2>Notes from the runs</h2><ul>")
        out += [f"<li><code>{e(k)}</code>: {e(n)}</li>" for k, n in notes]
        out.append("</ul>")
    out.append(f'<p class="caution">{e(CAUTION)}</p>')
    out.append(f"<script>{_SCRIPT}</script></body></html>")
    return "\n".join(out) + "\n"
