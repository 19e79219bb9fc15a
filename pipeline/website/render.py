"""Rendering: the Quarto project in ``_source/`` becomes the browsable site.

``quarto render`` is used when the ``quarto`` command exists (or is asked for); otherwise
the built-in renderer turns the same ``.qmd`` sources and the same ``_quarto.yml`` navigation
into HTML with markdown-it-py and our own HTML shell and CSS. Both produce the same pages,
links, figures and downloads.
"""

from __future__ import annotations

import html
import json
import re
import shutil
from dataclasses import dataclass
from pathlib import Path, PurePosixPath

import jinja2
import yaml
from markdown_it import MarkdownIt
from markupsafe import Markup

from pipeline import __version__, templates_path
from pipeline.errors import RenderError
from pipeline.external import find_tool, run_tool
from pipeline.website.readability import prose

# a staged build's sign-off record: a placeholder until `fairgauge promote` writes it
SIGNOFF = "fairgauge-signoff.json"
ASSETS = ("figures", "downloads", "assets", "fairgauge-manifest.json", SIGNOFF)  # copied as is


# what `quarto render` leaves in a project folder besides its output (Quarto writes a .gitignore
# for its .quarto/ folder)
QUARTO_WORKING = (".quarto", ".gitignore", "_freeze")


@dataclass(frozen=True)
class Renderer:
    name: str  # "quarto" or "builtin"
    version: str
    reason: str  # why this renderer was chosen, for the log


def choose_renderer(setting: str) -> Renderer:
    """Pick the renderer for ``setting`` (auto | quarto | builtin), saying why."""
    quarto = find_tool("quarto")
    if setting == "quarto" and not quarto:
        raise RenderError(
            '[cycle].renderer is "quarto" but the `quarto` command is not on PATH. Install '
            'Quarto, or set renderer = "auto" to use the built-in renderer.'
        )
    if setting in ("quarto", "auto") and quarto:
        version = run_tool([quarto, "--version"]).strip()
        return Renderer("quarto", version, f"`quarto` found at {quarto}")
    why = "asked for in the config" if setting == "builtin" else "`quarto` not found on PATH"
    return Renderer("builtin", __version__, why)


def render_site(project: Path, out: Path, renderer: Renderer) -> None:
    """Render the Quarto project folder ``project`` into the site folder ``out``."""
    if renderer.name == "quarto":
        run_tool([find_tool("quarto") or "quarto", "render", str(project)], cwd=project)
        built = project / "_site"
        for item in built.iterdir():
            shutil.move(str(item), out / item.name)
        built.rmdir()
        # Quarto's working files are not sources: keep them out of the published _source/
        for working in QUARTO_WORKING:
            target = project / working
            if target.is_dir():
                shutil.rmtree(target)
            else:
                target.unlink(missing_ok=True)
    else:
        BuiltinRenderer(project).render(out)


_FRONT = re.compile(r"\A---\n(.*?)\n---\n", re.S)
_DIV_OPEN = re.compile(r"^:::+\s*\{([^}]*)\}\s*$")
_DIV_ATTR = re.compile(r'#([\w-]+)|\.([\w-]+)|([\w-]+)="([^"]*)"')
_FIGURE = re.compile(r'^!\[(?P<caption>.*)\]\((?P<src>[^)\s]+)\)\{fig-alt="(?P<alt>[^"]*)"\}\s*$')
_DIV_CLOSE = re.compile(r"^:::+\s*$")
# raw HTML lines passed through as they are (Quarto passes them too): a ``details`` block
_RAW = re.compile(
    r'^(<details class="[\w -]+">|<summary class="[\w -]+">[^<>&]*</summary>|</details>)$'
)
_ALIGN = re.compile(r'<(th|td) style="text-align:(left|right|center)">')
_QMD_LINK = re.compile(r'(href="[^"#:]*?)\.qmd(#[^"]*)?"')


class BuiltinRenderer:
    """Quarto-compatible subset: front matter, pipe tables, images, links, callout divs."""

    def __init__(self, project: Path):
        self.project = project
        self.config = yaml.safe_load((project / "_quarto.yml").read_text("utf-8"))
        self.md = MarkdownIt("commonmark", {"html": False}).enable("table")
        env = jinja2.Environment(
            loader=jinja2.FileSystemLoader(templates_path()),
            undefined=jinja2.StrictUndefined,
            autoescape=True,
        )
        self.shell = env.get_template("html/page.html.j2")

    def inline(self, text: str) -> str:
        return self.md.renderInline(text)

    def blocks(self, lines: list[str]) -> str:
        """Markdown with fenced divs (``::: {#id .class key="value"}``) and figures to HTML.

        Callout divs become notes (titled by a first ``## `` line; ``collapse="true"``: a
        ``<details>`` the reader opens); ``details`` lines of :data:`_RAW` pass through; other
        divs keep their id and classes; an image with ``{fig-alt="..."}`` becomes a figure whose
        caption is the image text and whose alt text is ``fig-alt``, as in Quarto.
        """
        out: list[str] = []
        chunk: list[str] = []
        i = 0

        def flush():
            out.append(self.md.render("\n".join(chunk)))
            chunk.clear()

        while i < len(lines):
            figure = _FIGURE.match(lines[i])
            opened = _DIV_OPEN.match(lines[i])
            if _RAW.match(lines[i]):  # the few HTML lines the pages write (a table that opens)
                flush()
                out.append(lines[i] + "\n")
                i += 1
                continue
            if figure:
                flush()
                out.append(
                    f'<figure><img src="{html.escape(figure["src"])}" '
                    f'alt="{html.escape(figure["alt"])}" loading="lazy">'
                    f"<figcaption>{self.inline(figure['caption'])}</figcaption></figure>\n"
                )
                i += 1
                continue
            if not opened:
                chunk.append(lines[i])
                i += 1
                continue
            flush()
            depth, j = 1, i + 1
            while j < len(lines) and depth:
                depth += 1 if _DIV_OPEN.match(lines[j]) else -1 if _DIV_CLOSE.match(lines[j]) else 0
                j += 1
            out.append(self.div(opened.group(1), lines[i + 1 : j - 1]))
            i = j
        flush()
        return "".join(out)

    def div(self, attributes: str, lines: list[str]) -> str:
        """A fenced div; a callout's title is its first line when that is a level-2 heading
        (Quarto's form, which leaves no ``title`` attribute, and so no tooltip, in its HTML)."""
        ident, classes, attrs = "", [], {}
        for m in _DIV_ATTR.finditer(attributes):
            if m.group(1):
                ident = m.group(1)
            elif m.group(2):
                classes.append(m.group(2))
            else:
                attrs[m.group(3)] = m.group(4)
        id_attr = f' id="{html.escape(ident)}"' if ident else ""
        callout = next((c for c in classes if c.startswith("callout")), None)
        if callout:
            first = next((k for k, line in enumerate(lines) if line.strip()), None)
            title = ""
            if first is not None and lines[first].startswith("## "):
                title = self.inline(lines[first][3:].strip())
                lines = lines[first + 1 :]
            inner = self.blocks(lines)
            if attrs.get("collapse") == "true":
                return (
                    f'<details{id_attr} class="callout {callout}"><summary '
                    f'class="callout-title">{title or "More"}</summary>'
                    f"{inner}</details>\n"
                )
            head = f'<p class="callout-title">{title}</p>' if title else ""
            return f'<aside{id_attr} class="callout {callout}" role="note">{head}{inner}</aside>\n'
        cls = f' class="{html.escape(" ".join(classes))}"' if classes else ""
        return f"<div{id_attr}{cls}>{self.blocks(lines)}</div>\n"

    def nav(self, up: str) -> list[dict]:
        def link(item: dict) -> dict:
            # names in the navigation are escaped markdown
            text = Markup(self.inline(str(item["text"])))
            if "menu" in item:
                return {"text": text, "href": "", "menu": [link(x) for x in item["menu"]]}
            return {"text": text, "href": up + item["href"].replace(".qmd", ".html"), "menu": []}

        return [link(x) for x in self.config["website"]["navbar"]["left"]]

    def page(self, rel: str) -> tuple[str, dict]:
        """(HTML of one page, its front matter)."""
        text = (self.project / rel).read_text("utf-8")
        front = _FRONT.match(text)
        if not front:
            raise RenderError(
                f"{self.project / rel}: a page must start with a YAML front matter block (--- "
                "... ---)."
            )
        meta = yaml.safe_load(front.group(1)) or {}
        body = self.blocks(text[front.end() :].splitlines())
        body = _QMD_LINK.sub(lambda m: f'{m.group(1)}.html{m.group(2) or ""}"', body)
        body = _ALIGN.sub(r'<\1 class="fg-\2">', body)  # the page's CSP allows no inline styles
        return self.shell_page(rel.replace(".qmd", ".html"), meta, Markup(body)), meta

    def shell_page(self, rel_html: str, meta: dict, body: Markup) -> str:
        up = "../" * (len(PurePosixPath(rel_html).parts) - 1)
        website = self.config["website"]
        site_url = website.get("site-url", "")
        return self.shell.render(
            up=up,
            site_title=website["title"],
            title=Markup(self.inline(str(meta.get("title", "")))),
            subtitle=Markup(self.inline(str(meta.get("subtitle", "")))),
            plain_title=_plain(meta.get("title", "")),
            description=str(meta.get("description-meta", website.get("description", ""))),
            canonical=(site_url + rel_html) if site_url else "",
            body=body,
            nav=self.nav(up),
            current=rel_html,
            footer=Markup(self.inline(website["page-footer"]["left"])),
        )

    def render(self, out: Path) -> None:
        index = []
        for rel in self.config["project"]["render"]:
            target = out / PurePosixPath(rel).with_suffix(".html")
            target.parent.mkdir(parents=True, exist_ok=True)
            page, meta = self.page(rel)
            target.write_text(page, encoding="utf-8")
            index.append(
                {
                    "title": _plain(meta.get("title", "")),
                    "url": str(PurePosixPath(rel).with_suffix(".html")),
                    "text": " ".join(prose(page))[:SEARCH_TEXT],
                }
            )
        for folder in ASSETS:
            source = self.project / folder
            if source.is_dir():
                shutil.copytree(source, out / folder, dirs_exist_ok=True)
            elif source.is_file():
                shutil.copy2(source, out / folder)
        self.search(out, index)

    def search(self, out: Path, index: list[dict]) -> None:
        """The site search: ``search.html`` lists every page (without JavaScript) and filters it as
        you type."""
        (out / "assets").mkdir(exist_ok=True)
        payload = json.dumps(index, ensure_ascii=False, separators=(",", ":")).replace("</", "<\\/")
        (out / "assets" / "search-index.js").write_text(
            f"window.FAIRGAUGE_INDEX = {payload};\n", encoding="utf-8"
        )
        items = "".join(
            f'<li><a href="{html.escape(p["url"])}">{html.escape(p["title"])}</a></li>'
            for p in index
        )
        body = Markup(
            '<form class="fg-search-page" role="search" aria-label="Search the pages" '
            'action="search.html" method="get">'
            '<label for="fg-search-box">Words to look for</label> '
            '<input type="search" id="fg-search-box" name="q" autocomplete="off"> <button '
            'type="submit">Search</button></form>'
            '<p id="fg-search-status" aria-live="polite">Every page of this site is listed '
            "below.</p>"
            f'<ul id="fg-search-results" class="fg-names" data-up="">{items}</ul>'
            '<script src="assets/search-index.js"></script>'
        )
        meta = {
            "title": "Search this site",
            "description": "Find a unit, a measure or a topic on this site.",
        }
        (out / "search.html").write_text(
            self.shell_page("search.html", meta, body), encoding="utf-8"
        )


SEARCH_TEXT = 4000  # characters of each page's prose kept in the search index


def _plain(title: object) -> str:
    return html.unescape(re.sub(r"\\(.)", r"\1", str(title)))
