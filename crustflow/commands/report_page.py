"""The HTML of a run's ``report.html``: one self-contained page, standard library only.

Everything the page shows is passed in as already-gathered values; this module only escapes and
lays them out (``string.Template`` and ``html.escape``). Figures are embedded as ``data:`` URIs,
the style sheet is inline, and a Content-Security-Policy forbids any other source, so the page
opens offline and makes no request. A print style sheet keeps tables and figures whole on paper.
"""

from __future__ import annotations

import base64
from html import escape
from string import Template

__all__ = ["render_page", "table", "definition_list", "figure_block", "CONTENT_POLICY"]

#: The page may load nothing but its own inline styles and data: images.
CONTENT_POLICY = "default-src 'none'; img-src data:; style-src 'unsafe-inline'"

_PAGE = Template(
    """<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta http-equiv="Content-Security-Policy" content="$policy">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta name="generator" content="$generator">
<title>$title</title>
<style>
  body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; color: #1d1d22;
         max-width: 70rem; margin: 0 auto; padding: 1rem 1.5rem 3rem; line-height: 1.45; }
  h1 { font-size: 1.6rem; margin: 0.2rem 0 0.3rem; }
  h2 { font-size: 1.2rem; margin-top: 2rem; border-bottom: 1px solid #c9c9cf; }
  .job { font-size: 1.05rem; margin: 0 0 0.8rem; }
  .caution { background: #f4efe8; border-left: 0.4rem solid #8e4d26; padding: 0.6rem 0.9rem; }
  .warning { background: #f4efe8; }
  table { border-collapse: collapse; margin: 0.5rem 0; font-size: 0.92rem; }
  th, td { border: 1px solid #c9c9cf; padding: 0.25rem 0.55rem; text-align: left;
           vertical-align: top; }
  td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
  th { background: #ececf1; }
  dl { display: grid; grid-template-columns: max-content auto; gap: 0.15rem 1rem; }
  dt { font-weight: 600; }
  dd { margin: 0; }
  code, .mono { font-family: ui-monospace, "DejaVu Sans Mono", monospace; font-size: 0.85rem;
                word-break: break-all; }
  figure { margin: 1.2rem 0; }
  figure img { max-width: 100%; height: auto; border: 1px solid #e1e1e6; }
  figcaption { font-size: 0.92rem; color: #3a3a44; margin-top: 0.3rem; }
  nav ul { columns: 2; font-size: 0.92rem; }
  @media print {
    body { max-width: none; padding: 0; font-size: 10pt; }
    nav { display: none; }
    h2 { break-after: avoid; }
    figure, table, .caution { break-inside: avoid; }
    figure img { max-height: 22cm; border: none; }
    a { color: inherit; text-decoration: none; }
  }
</style>
</head>
<body>
<header>
<h1>$title</h1>
<p class="job">$job</p>
<p class="caution" id="caution"><strong>Caution.</strong> $caution</p>
</header>
<nav><ul>
<li><a href="#summary">Summary of the outputs</a></li>
<li><a href="#warnings">Warnings</a></li>
<li><a href="#budgets">Volume budgets</a></li>
<li><a href="#figures">Figures</a></li>
<li><a href="#scenario">Scenario</a></li>
<li><a href="#inputs">Inputs and versions</a></li>
</ul></nav>
<section id="summary"><h2>Summary of the outputs</h2>
$summary
</section>
<section id="warnings"><h2>Warnings</h2>
$warnings
</section>
<section id="budgets"><h2>Volume budgets</h2>
$budgets
</section>
<section id="figures"><h2>Figures</h2>
$figures
</section>
<section id="scenario"><h2>Scenario</h2>
$scenario
</section>
<section id="inputs"><h2>Inputs and versions</h2>
$inputs
</section>
<footer><p>$footer</p></footer>
</body>
</html>
"""
)


def table(header: list[str], rows: list[list], *, numeric: set[int] | None = None, cls="") -> str:
    """An HTML table; cells are escaped, columns in ``numeric`` right-aligned."""
    numeric = numeric or set()
    head = "".join(f"<th>{escape(str(h))}</th>" for h in header)
    body = "\n".join(
        "<tr>"
        + "".join(
            f'<td class="num">{escape(str(c))}</td>'
            if j in numeric
            else f"<td>{escape(str(c))}</td>"
            for j, c in enumerate(row)
        )
        + "</tr>"
        for row in rows
    )
    attr = f' class="{escape(cls)}"' if cls else ""
    return f"<table{attr}><thead><tr>{head}</tr></thead>\n<tbody>\n{body}\n</tbody></table>"


def definition_list(pairs: list[tuple[str, str]], *, mono: bool = False) -> str:
    """A ``<dl>`` of escaped terms and descriptions."""
    wrap = (lambda t: f"<code>{t}</code>") if mono else (lambda t: t)
    items = "\n".join(f"<dt>{escape(str(k))}</dt><dd>{wrap(escape(str(v)))}</dd>" for k, v in pairs)
    return f"<dl>\n{items}\n</dl>"


def paragraph(text: str, cls: str = "") -> str:
    """An escaped ``<p>``."""
    attr = f' class="{escape(cls)}"' if cls else ""
    return f"<p{attr}>{escape(text)}</p>"


def bullet_list(items: list[str], cls: str = "") -> str:
    """An escaped ``<ul>``."""
    attr = f' class="{escape(cls)}"' if cls else ""
    return f"<ul{attr}>" + "".join(f"<li>{escape(i)}</li>" for i in items) + "</ul>"


def figure_block(data: bytes, mime: str, name: str, caption: str) -> str:
    """A ``<figure>`` with the image embedded as a base64 ``data:`` URI and its caption."""
    uri = f"data:{mime};base64,{base64.b64encode(data).decode('ascii')}"
    return (
        f'<figure id="fig-{escape(name)}"><img src="{uri}" alt="{escape(caption)}">'
        f"<figcaption><strong>{escape(name)}</strong>: {escape(caption)}</figcaption></figure>"
    )


def render_page(
    *,
    title: str,
    job: str,
    caution: str,
    summary: str,
    warnings: str,
    budgets: str,
    figures: str,
    scenario: str,
    inputs: str,
    footer: str,
    generator: str,
) -> str:
    """The page. ``title``, ``job``, ``caution``, ``footer`` and ``generator`` are plain text
    (escaped here); the section arguments are HTML built with this module's helpers."""
    return _PAGE.substitute(
        policy=CONTENT_POLICY,
        title=escape(title),
        job=escape(job),
        caution=escape(caution),
        footer=escape(footer),
        generator=escape(generator),
        summary=summary,
        warnings=warnings,
        budgets=budgets,
        figures=figures,
        scenario=scenario,
        inputs=inputs,
    )
