"""The report as Markdown (CommonMark with pipe tables), figures linked beside it in
analysis/. Strings from files are escaped: HTML characters through html.escape (many
Markdown renderers pass raw HTML through) and the Markdown table and emphasis characters
with backslashes; the protocol copy goes in an indented block, which nothing in it can end."""
from __future__ import annotations

import html
import os
import re
from typing import List

from . import content

_MD = re.compile(r"([\\`*_\[\]|~])")


def e(s) -> str:
    s = html.escape(str(s), quote=False).replace("\r", " ").replace("\n", " ")
    return _MD.sub(r"\\\1", s)


def _table(head, rows) -> str:
    lines = ["| " + " | ".join(e(h) for h in head) + " |", "|" + "---|" * len(head)]
    lines += ["| " + " | ".join(e(c) for c in r) + " |" for r in rows]
    return "\n".join(lines)


def render(res: dict, meta: dict, events: List[dict]) -> str:
    title = f"fieldrun report: {meta.get('protocol_name') or meta.get('name') or 'run'}"
    if meta.get("sample"):
        title += f" — {meta['sample']}"
    out = [f"# {e(title)}", "", e(meta.get("name") or ""), ""]
    for name, kind, data in content.sections(res, meta, events):
        if name:
            out += [f"## {e(name)}", ""]
        if kind == "kv":
            out.append(_table(["", ""], data) if data else "none")
        elif kind == "table":
            out.append(_table(*data) if data[1] else "none")
        elif kind == "para":
            out.append(e(data))
        elif kind == "pre":
            out.append("\n".join("    " + ln for ln in str(data).splitlines()))
        elif kind == "figures":
            for f in data:
                out.append(f"![{e(f.get('caption', ''))}]({os.path.basename(f['path'])})")
                out.append("")
        out.append("")
    return "\n".join(out)
