"""The report as one self-contained HTML page: figures embedded as base64 PNG (RFC 2397
data URLs), no scripts, no outside links; every string that comes from a file or from the
analysis is passed through html.escape."""
from __future__ import annotations

import base64
import html
from typing import List

from . import content

CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:1100px;margin:2em auto;
padding:0 1em;color:#111;line-height:1.45}
h1{font-size:1.5em;margin-bottom:.2em} h2{font-size:1.2em;border-bottom:1px solid #999;margin-top:1.6em}
table{border-collapse:collapse;margin:.5em 0;font-size:.92em} td,th{border:1px solid #bbb;padding:.25em .5em;
vertical-align:top;text-align:left} th{background:#eee} table.kv td:first-child{font-weight:600;width:18em}
pre{background:#f4f4f4;border:1px solid #ccc;padding:.7em;overflow-x:auto;font-size:.85em;white-space:pre-wrap}
figure{margin:1em 0;page-break-inside:avoid} img{max-width:100%;border:1px solid #ddd}
figcaption{font-size:.9em;color:#333}
table.grid td{white-space:nowrap} table.grid td:last-child{white-space:normal}
.verdict{padding:.6em .9em;border-left:6px solid #888;background:#f7f7f7}
.v-ok{border-color:#228833}.v-bad{border-color:#CC3311;background:#fff0ee}.v-mid{border-color:#CCBB44}
@media print{body{max-width:none;margin:0} h2{page-break-after:avoid}}
"""


def e(s) -> str:
    return html.escape(str(s), quote=True)


def _img(path: str) -> str:
    try:
        with open(path, "rb") as fh:
            data = base64.b64encode(fh.read()).decode("ascii")
    except OSError:
        return "<p>(figure missing)</p>"
    return f'<img alt="" src="data:image/png;base64,{data}">'


def _kv(rows) -> str:
    return '<table class="kv">' + "".join(f"<tr><td>{e(k)}</td><td>{e(v)}</td></tr>" for k, v in rows) + "</table>"


def _table(head, rows) -> str:
    h = "".join(f"<th>{e(c)}</th>" for c in head)
    b = "".join("<tr>" + "".join(f"<td>{e(c)}</td>" for c in r) + "</tr>" for r in rows)
    return f'<table class="grid"><thead><tr>{h}</tr></thead><tbody>{b}</tbody></table>'


def render(res: dict, meta: dict, events: List[dict]) -> str:
    verdict = (res.get("trust") or {}).get("verdict", "")
    cls = {"apparently reasonable": "v-ok", "do not trust": "v-bad", "caution": "v-mid"}.get(verdict, "")
    title = f"fieldrun report: {meta.get('protocol_name') or meta.get('name') or 'run'}"
    if meta.get("sample"):
        title += f" — {meta['sample']}"
    parts = [f"<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>{e(title)}</title>"
             f"<style>{CSS}</style></head><body><h1>{e(title)}</h1>"
             f"<p>{e(meta.get('name') or '')}</p>"]
    for name, kind, data in content.sections(res, meta, events):
        if name:
            parts.append(f"<h2>{e(name)}</h2>")
        if kind == "kv":
            parts.append(_kv(data))
        elif kind == "table":
            parts.append(_table(*data) if data[1] else "<p>none</p>")
        elif kind == "para":
            klass = f' class="verdict {cls}"' if name.startswith("Can these") else ""
            parts.append(f"<p{klass}>{e(data)}</p>")
        elif kind == "pre":
            parts.append(f"<pre>{e(data)}</pre>")
        elif kind == "figures":
            for f in data:
                parts.append(f"<figure>{_img(f['path'])}<figcaption>{e(f.get('caption', ''))}</figcaption></figure>")
            if not data:
                parts.append("<p>no figures (no usable data)</p>")
    parts.append("</body></html>\n")
    return "\n".join(parts)
