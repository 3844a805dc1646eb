"""index.html: one page that shows the plots and what was measured against what was expected."""
from __future__ import annotations

import html
from datetime import datetime, timezone

from kinemap._version import __version__

__all__ = ["write_index"]

_STYLE = """
body { font-family: system-ui, sans-serif; margin: 2em auto; max-width: 1200px; color: #222; }
h1 { font-size: 1.6em; } h2 { border-bottom: 1px solid #ccc; padding-bottom: .2em; margin-top: 2em; }
table { border-collapse: collapse; margin: 1em 0; }
th, td { border: 1px solid #ccc; padding: .3em .7em; text-align: right; }
th { background: #f3f3f3; } td.q, th.q { text-align: left; }
td.ok { background: #e7f5e7; } td.off { background: #fbe9e7; }
.grid { display: grid; grid-template-columns: repeat(auto-fill, minmax(340px, 1fr)); gap: 1em; }
figure { margin: 0; } figure img { width: 100%; border: 1px solid #ddd; }
figcaption { font-size: .85em; color: #555; }
.small { font-size: .85em; color: #555; }
"""


def _fmt(v, digits=4):
    if v is None:
        return ""
    if isinstance(v, str):
        return html.escape(v)
    try:
        return f"{float(v):.{digits}g}"
    except (TypeError, ValueError):
        return html.escape(str(v))


def write_index(path, *, title: str, intro: str, sections: list[dict]) -> None:
    """Write ``path``.

    Each section: {"name", "heading", "text", "rows": [comparison rows], "figures":
    [(relative png path, caption)], "products": [(relative path, key, description)]}.
    A comparison row: {"quantity", "measured", "error", "truth", "unit", "tolerance", "note"};
    ``tolerance`` marks the row green when |measured - truth| <= tolerance.
    """
    out = [f"<!DOCTYPE html><html><head><meta charset='utf-8'><title>{html.escape(title)}</title>",
           f"<style>{_STYLE}</style></head><body>", f"<h1>{html.escape(title)}</h1>",
           f"<p>{intro}</p>",
           f"<p class='small'>kinemap {__version__}, "
           f"{datetime.now(timezone.utc).strftime('%Y-%m-%d %H:%M UTC')}</p>"]
    for sec in sections:
        out.append(f"<h2 id='{html.escape(sec['name'])}'>{html.escape(sec['heading'])}</h2>")
        if sec.get("text"):
            out.append(f"<p>{sec['text']}</p>")
        rows = sec.get("rows") or []
        if rows:
            out.append("<table><tr><th class='q'>quantity</th><th>measured</th><th>1-sigma</th>"
                       "<th>truth</th><th>unit</th><th class='q'>note</th></tr>")
            for r in rows:
                cls = ""
                tol = r.get("tolerance")
                if tol is not None and r.get("truth") is not None and r.get("measured") is not None:
                    try:
                        good = abs(float(r["measured"]) - float(r["truth"])) <= float(tol)
                        cls = " class='ok'" if good else " class='off'"
                    except (TypeError, ValueError):
                        cls = ""
                out.append(f"<tr><td class='q'>{html.escape(r['quantity'])}</td>"
                           f"<td{cls}>{_fmt(r.get('measured'))}</td><td>{_fmt(r.get('error'), 2)}</td>"
                           f"<td>{_fmt(r.get('truth'))}</td><td>{html.escape(r.get('unit', ''))}</td>"
                           f"<td class='q'>{html.escape(r.get('note', ''))}</td></tr>")
            out.append("</table>")
        figs = sec.get("figures") or []
        if figs:
            out.append("<div class='grid'>")
            for src, caption in figs:
                out.append(f"<figure><a href='{html.escape(src)}'><img src='{html.escape(src)}' "
                           f"alt='{html.escape(caption)}'></a><figcaption>{html.escape(caption)}"
                           "</figcaption></figure>")
            out.append("</div>")
        prods = sec.get("products") or []
        if prods:
            out.append("<details><summary>products</summary><ul>")
            for src, key, desc in prods:
                out.append(f"<li><a href='{html.escape(src)}'>{html.escape(key)}</a>: "
                           f"{html.escape(desc)}</li>")
            out.append("</ul></details>")
    out.append("</body></html>")
    with open(path, "w") as fh:
        fh.write("\n".join(out))
