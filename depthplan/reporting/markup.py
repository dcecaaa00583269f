"""The report as blocks, and their two renderings: Markdown and self-contained HTML.

A block is a tuple whose first item names its kind:

    ("h", level, text, anchor)       heading
    ("p", text) / ("p", text, cls)   paragraph (cls: "answer", "caution", "small")
    ("ul", [text, ...])              list
    ("table", header, rows, cls)     table; cls "numbers" right-aligns all but the first column
    ("fig", FigureFile)              figure with its number and caption
    ("pre", summary, text)           preformatted text (the config), folded away in HTML

Text may hold `**bold**`, `` `code` ``, exponents `K^{-1.03}`, the badge `EXTRAPOLATED`, and number
references made by `Words.num`: `⟦power_law.slope|.2f⟧` is the value at that
path in fit.json, formatted with that spec (`.3g@1e3` multiplies by 1000
first). Markdown shows the number; HTML wraps it in
`<span class="num" data-key="power_law.slope" data-fmt=".2f">`.
"""
from __future__ import annotations

import base64
import html
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

Block = tuple
EXTRAPOLATED = "⟦!extrapolated⟧"
_REF = re.compile(r"⟦([^|⟧!]+)\|([^⟧]*)⟧")


@dataclass(frozen=True)
class FigureFile:
    """One figure of the report: its files and its words."""

    name: str
    title: str
    caption: str
    alt: str
    png: Path
    svg: Path


def lookup(fit: dict[str, Any], path: str) -> Any:
    """The value at a dotted path in a fit dict (`per_depth.2.median`); None when absent."""
    value: Any = fit
    for part in path.split("."):
        if isinstance(value, dict):
            value = value.get(part)
        elif isinstance(value, list) and part.lstrip("-").isdigit() and -len(value) <= int(part) < len(value):
            value = value[int(part)]
        else:
            return None
    return value


def format_value(value: Any, fmt: str) -> str:
    """`value` formatted with a format spec, optionally scaled first (`spec@factor`)."""
    if value is None or isinstance(value, (dict, list)):
        return "n/a"
    if isinstance(value, bool) or isinstance(value, str):
        return str(value)
    spec, _, factor = fmt.partition("@")
    if factor:
        value = value * float(factor)
    if spec.endswith("d"):
        value = int(round(value))
    return format(value, spec)


class Words:
    """Number references into one fit (or one rate group of it, by path prefix)."""

    def __init__(self, fit: dict[str, Any], prefix: str = "") -> None:
        self.root, self.prefix = fit, prefix

    def get(self, path: str) -> Any:
        return lookup(self.root, self.prefix + path)

    def num(self, path: str, fmt: str = ".2f") -> str:
        """A reference to the number at `path` (rendered from fit.json, tagged in HTML)."""
        return f"⟦{self.prefix}{path}|{fmt}⟧"

    def interval(self, path: str, fmt: str = ".2f") -> str:
        """'a to b' for the interval at `path`, or '' when it is not there."""
        ci = self.get(path)
        if not isinstance(ci, list) or len(ci) != 2 or None in ci:
            return ""
        return f"{self.num(path + '.0', fmt)} to {self.num(path + '.1', fmt)}"

    def ci(self, path: str, fmt: str = ".2f") -> str:
        """' (95 % interval a to b)' for the interval at `path`, or ''."""
        text = self.interval(path, fmt)
        return f" (95 % interval {text})" if text else ""


# ---------------------------------------------------------------- Markdown

_SUP = re.compile(r"\^\{([^{}]*)\}")


def _md_text(text: str, fit: dict[str, Any]) -> str:
    text = _SUP.sub(r"^\1", text.replace(EXTRAPOLATED, " [extrapolated]"))
    return _REF.sub(lambda m: format_value(lookup(fit, m[1]), m[2]), text)


def _md_cell(text: Any, fit: dict[str, Any]) -> str:
    return _md_text(str(text), fit).replace("|", "\\|").replace("\n", " ")


def to_markdown(blocks: Sequence[Block], fit: dict[str, Any], title: str, fig_dir: str) -> str:
    """The report as Markdown; figures are linked from `fig_dir` beside the file."""
    out = [f"# {title}", ""]
    n_fig = 0
    for b in blocks:
        kind = b[0]
        if kind == "h":
            out += ["#" * b[1] + " " + _md_text(b[2], fit), ""]
        elif kind == "p":
            text = _md_text(b[1], fit)
            boxed = len(b) > 2 and b[2].split()[0] in ("answer", "caution")
            out += [("> " + text) if boxed else text, ""]
        elif kind == "ul":
            out += [f"- {_md_text(item, fit)}" for item in b[1]] + [""]
        elif kind == "table":
            header, rows = b[1], b[2]
            out.append("| " + " | ".join(_md_cell(h, fit) for h in header) + " |")
            out.append("|" + "|".join("---" if i == 0 or b[3] != "numbers" else "---:"
                                      for i in range(len(header))) + "|")
            out += ["| " + " | ".join(_md_cell(c, fit) for c in row) + " |" for row in rows]
            out.append("")
        elif kind == "fig":
            n_fig += 1
            f = b[1]
            out += [f"![{f.alt}]({fig_dir}/{f.png.name})", "",
                    f"*Figure {n_fig}. {_md_text(f.title, fit)}.* {_md_text(f.caption, fit)} "
                    f"(Vector version: `{fig_dir}/{f.svg.name}`.)", ""]
        elif kind == "pre":
            out += [f"**{b[1]}**", "", "```", b[2].rstrip("\n"), "```", ""]
    return "\n".join(out).rstrip("\n") + "\n"


# ---------------------------------------------------------------- HTML

_CSS = """
:root { --ink: #1d2733; --muted: #5a6775; --rule: #d5dbe1; --accent: #0b5f8a;
        --answer: #edf4f8; --caution: #fbf1e4; --caution-rule: #a8560b; }
* { box-sizing: border-box; }
body { margin: 0; color: var(--ink); background: #fff; line-height: 1.5;
       font: 16px/1.5 -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif; }
main { max-width: 58rem; margin: 0 auto; padding: 1.5rem 1.25rem 4rem; }
h1 { font-size: 1.7rem; margin: 0 0 .25rem; }
h2 { font-size: 1.25rem; margin: 2.2rem 0 .6rem; padding-bottom: .2rem; border-bottom: 1px solid var(--rule); }
h3 { font-size: 1.05rem; margin: 1.4rem 0 .4rem; }
p, ul { margin: .5rem 0 .8rem; }
li { margin: .2rem 0; }
nav { font-size: .9rem; color: var(--muted); margin-bottom: 1rem; }
nav a { color: var(--accent); margin-right: .8rem; white-space: nowrap; }
.answer { background: var(--answer); border-left: 5px solid var(--accent); padding: .7rem 1rem; }
.answer.lead { font-size: 1.15rem; }
.caution { background: var(--caution); border-left: 5px solid var(--caution-rule); padding: .7rem 1rem; }
.small { font-size: .88rem; color: var(--muted); }
.badge { display: inline-block; font-size: .72rem; letter-spacing: .04em; text-transform: uppercase;
         border: 1px dashed var(--caution-rule); color: var(--caution-rule); border-radius: 3px;
         padding: 0 .3rem; margin-left: .25rem; vertical-align: .1em; }
table { border-collapse: collapse; margin: .6rem 0 1.2rem; font-size: .88rem; width: 100%; }
th, td { border-bottom: 1px solid var(--rule); padding: .3rem .5rem; text-align: left; vertical-align: top; }
th { background: #f4f6f8; font-weight: 600; }
table.numbers td:not(:first-child), table.numbers th:not(:first-child),
table.fit td:nth-child(2), table.fit td:nth-child(3) { text-align: right; font-variant-numeric: tabular-nums; }
table.fit td:nth-child(3), table.numbers td { white-space: nowrap; }
table.plain td:first-child { white-space: nowrap; color: var(--muted); }
.scroll { overflow-x: auto; }
figure { margin: 1rem 0 1.6rem; }
figure img { display: block; max-width: 100%; height: auto; border: 1px solid var(--rule); }
figcaption { font-size: .9rem; color: var(--muted); margin-top: .4rem; }
code, pre { font-family: ui-monospace, "DejaVu Sans Mono", Menlo, Consolas, monospace; font-size: .85rem; }
pre { background: #f6f8fa; border: 1px solid var(--rule); padding: .7rem; overflow-x: auto; }
details summary { cursor: pointer; color: var(--accent); }
@media print { nav { display: none; } figure { break-inside: avoid; } }
"""

# no fetch of any kind, no script: the page is what the file holds
_CSP = "default-src 'none'; img-src data:; style-src 'unsafe-inline'"


def _html_text(text: str, fit: dict[str, Any]) -> str:
    s = html.escape(text, quote=False)

    def num(m: re.Match) -> str:
        value = format_value(lookup(fit, m[1]), m[2])
        return (f'<span class="num" data-key="{html.escape(m[1])}" '
                f'data-fmt="{html.escape(m[2])}">{html.escape(value)}</span>')

    s = _REF.sub(num, s)
    s = s.replace(EXTRAPOLATED, '<span class="badge">extrapolated</span>')
    s = _SUP.sub(r"<sup>\1</sup>", s)
    s = re.sub(r"\*\*(.+?)\*\*", r"<strong>\1</strong>", s)
    return re.sub(r"`([^`]+)`", r"<code>\1</code>", s)


def _png_size(data: bytes) -> tuple[int, int]:
    """Pixel width and height from a PNG's IHDR chunk (PNG specification, section 11.2.2)."""
    return int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")


def _html_figure(f: FigureFile, number: int, fit: dict[str, Any]) -> str:
    data = f.png.read_bytes()
    width, height = _png_size(data)
    uri = "data:image/png;base64," + base64.b64encode(data).decode("ascii")
    # shown at the size of a 100 dpi screen; the 150 dpi pixels keep it sharp on finer ones
    return (f'<figure id="fig-{f.name}"><img src="{uri}" alt="{html.escape(f.alt)}" '
            f'width="{width * 2 // 3}" height="{height * 2 // 3}">'
            f"<figcaption><strong>Figure {number}. {_html_text(f.title, fit)}.</strong> "
            f"{_html_text(f.caption, fit)} Also written as <code>figures/{html.escape(f.png.name)}"
            f"</code> and <code>figures/{html.escape(f.svg.name)}</code>.</figcaption></figure>")


def html_body(blocks: Sequence[Block], fit: dict[str, Any]) -> str:
    """The blocks as HTML elements, one per line (the page's body, or a notebook cell's view)."""
    body: list[str] = []
    n_fig = 0
    for b in blocks:
        kind = b[0]
        if kind == "h":
            body.append(f'<h{b[1]} id="{b[3]}">{_html_text(b[2], fit)}</h{b[1]}>')
        elif kind == "p":
            cls = f' class="{b[2]}"' if len(b) > 2 else ""
            body.append(f"<p{cls}>{_html_text(b[1], fit)}</p>")
        elif kind == "ul":
            body.append("<ul>" + "".join(f"<li>{_html_text(i, fit)}</li>" for i in b[1]) + "</ul>")
        elif kind == "table":
            head = "".join(f"<th>{_html_text(str(h), fit)}</th>" for h in b[1])
            rows = "".join("<tr>" + "".join(f"<td>{_html_text(str(c), fit)}</td>" for c in row)
                           + "</tr>" for row in b[2])
            body.append(f'<div class="scroll"><table class="{b[3]}"><thead><tr>{head}</tr></thead>'
                        f"<tbody>{rows}</tbody></table></div>")
        elif kind == "fig":
            n_fig += 1
            body.append(_html_figure(b[1], n_fig, fit))
        elif kind == "pre":
            body.append(f"<details><summary>{html.escape(b[1])}</summary>"
                        f"<pre>{html.escape(b[2])}</pre></details>")
    return "\n".join(body)


def to_html(blocks: Sequence[Block], fit: dict[str, Any], title: str) -> str:
    """The report as one self-contained HTML page."""
    nav = [(b[3], b[2]) for b in blocks if b[0] == "h" and b[1] == 2]
    links = "".join(f'<a href="#{a}">{html.escape(t)}</a>' for a, t in nav)
    return ("<!doctype html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            f'<meta http-equiv="Content-Security-Policy" content="{_CSP}">\n'
            '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
            f"<title>{html.escape(title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n<main>\n"
            f"<h1>{html.escape(title)}</h1>\n<nav>{links}</nav>\n" + html_body(blocks, fit)
            + "\n</main>\n</body>\n</html>\n")
