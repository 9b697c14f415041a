"""Self-contained HTML pages: the chart libraries inlined, chart specs as escaped JSON.

A page opens offline (nothing is fetched), reads on a phone (one column, charts scale to
the screen width) and prints (charts are drawn as SVG).
"""

from __future__ import annotations

import html
import json
from functools import lru_cache

STYLE = """
body { font-family: Helvetica, Arial, sans-serif; color: #1a1a1a; margin: 0 auto; max-width: 980px;
       padding: 1rem; line-height: 1.45; }
h1 { font-size: 1.5rem; margin-bottom: .2rem; } h2 { font-size: 1.2rem; margin-top: 2rem;
     border-bottom: 2px solid #0072B2; padding-bottom: .2rem; }
.sub { color: #555; margin-top: 0; } .muted { color: #666; }
ul { padding-left: 1.2rem; } li { margin: .35rem 0; }
li.rise, li.fall, li.flat, li.note { list-style: none; margin-left: -1rem; }
.rise::before { content: "\\25B2  "; color: #0072B2; } .fall::before { content: "\\25BC  "; color: #D55E00; }
.flat::before { content: "\\25CF  "; color: #999; } .note::before { content: "\\2139  "; color: #CC79A7; }
table { border-collapse: collapse; font-size: .85rem; margin: .5rem 0; }
th, td { border-bottom: 1px solid #ddd; padding: .25rem .5rem; text-align: right; }
th:first-child, td:first-child { text-align: left; }
.chart { margin: 1rem 0; overflow-x: auto; max-width: 100%; }
.chart svg { max-width: 100%; height: auto; }
figure { margin: 1rem 0; }
.grid { display: grid; grid-template-columns: repeat(auto-fill, minmax(300px, 1fr)); gap: 0 1rem; }
.grid figure, .grid .chart { margin: 0; }
.caution { background: #f6f6f6; border-left: 4px solid #E69F00; padding: .5rem 1rem; }
@media print { .chart { page-break-inside: avoid; } body { max-width: none; } }
"""

EMBED = """
window.__chartErrors = [];
window.addEventListener('error', function (e) { window.__chartErrors.push(String(e.message)); });
var specs = JSON.parse(document.getElementById('chart-specs').textContent);
var done = 0;
specs.forEach(function (spec, i) {
  vegaEmbed('#chart-' + i, spec, {actions: false, renderer: 'svg'}).then(function () {
    done += 1; document.body.setAttribute('data-charts-drawn', String(done));
    if (done === specs.length) {  // the page's drawn height, for checks of its length
      document.body.setAttribute('data-page-height', String(document.documentElement.scrollHeight));
    }
  }).catch(function (err) {
    window.__chartErrors.push(String(err));
    document.body.setAttribute('data-chart-errors', window.__chartErrors.join(' | '));
    console.error(err);
  });
});
"""


@lru_cache(maxsize=1)
def _bundle() -> str:
    """The Vega, Vega-Lite and vega-embed libraries as one script (vl-convert bundles them in
    about 1.5 s), kept in the user's cache folder so later commands reuse it."""
    import os
    from pathlib import Path

    import vl_convert as vlc

    version = getattr(vlc, "__version__", "unknown")
    folder = Path(os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache") / "wavetell"
    path = folder / f"vega-bundle-{version}-vl6.4.js"
    try:
        return path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError):
        pass
    text = vlc.javascript_bundle(vl_version="6.4")  # type: ignore[call-arg]  # snippet is optional at run time
    try:  # a cache only: a folder that cannot be written is no error
        folder.mkdir(parents=True, exist_ok=True)
        tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, path)
    except OSError:
        pass
    return text


def script_json(data) -> str:
    """JSON safe inside a <script> element (no '</script>' or '<!--' can close it)."""
    return json.dumps(data).replace("<", "\\u003c").replace(">", "\\u003e").replace("&", "\\u0026")


def page(title: str, body_html: str, specs: list[dict]) -> str:
    """A whole HTML page; ``body_html`` must already be escaped; charts go in #chart-0.. divs."""
    scripts = ""
    if specs:
        scripts = (f'<script>{_bundle()}</script>\n'
                   f'<script type="application/json" id="chart-specs">{script_json(specs)}</script>\n'
                   f'<script>{EMBED}</script>')
    return (
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
        f"<title>{html.escape(title)}</title>\n<style>{STYLE}</style>\n</head>\n"
        f"<body data-charts-expected=\"{len(specs)}\" data-charts-drawn=\"0\">\n"
        f"{body_html}\n{scripts}\n</body>\n</html>\n"
    )


def chart_div(i: int) -> str:
    return f'<div class="chart" id="chart-{i}"></div>'


def chart_page(specs: list[dict], title: str = "chart") -> str:
    return page(title, "\n".join(chart_div(i) for i in range(len(specs))), specs)
