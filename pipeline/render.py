"""Rendering: the Quarto project in ``_source/`` becomes the browsable site.

``quarto render`` is used when the ``quarto`` command exists (or is asked for); otherwise
the built-in renderer turns the same ``.qmd`` sources and the same ``_quarto.yml`` navigation
into HTML with markdown-it-py and our own HTML shell and CSS. Both produce the same pages,
links, figures and downloads.
"""

from __future__ import annotations

import html
import re
import shutil
from dataclasses import dataclass
from pathlib import Path, PurePosixPath

import jinja2
import yaml
from markdown_it import MarkdownIt
from markupsafe import Markup

from . import __version__, templates_path
from .errors import RenderError
from .external import find_tool, run_tool

ASSETS = ("figures", "downloads", "assets", "fairgauge-manifest.json")  # copied as they are


@dataclass(frozen=True)
class Renderer:
    name: str  # "quarto" or "builtin"
    version: str
    reason: str  # why this renderer was chosen, for the log


def choose_renderer(setting: str) -> Renderer:
    """Pick the renderer for ``setting`` (auto | quarto | builtin), saying why."""
    quarto = find_tool("quarto")
    if setting == "quarto" and not quarto:
        raise RenderError("[cycle].renderer is \"quarto\" but the `quarto` command is not on PATH. Install Quarto, or set renderer = \"auto\" to use the built-in renderer.")
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
    else:
        BuiltinRenderer(project).render(out)


_FRONT = re.compile(r"\A---\n(.*?)\n---\n", re.S)
_DIV_OPEN = re.compile(r"^:::+\s*\{\.([\w-]+)(?:\s+title=\"([^\"]*)\")?\s*\}\s*$")
_DIV_CLOSE = re.compile(r"^:::+\s*$")
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
        """Markdown with fenced divs (``::: {.class title="..."}``) to HTML."""
        html, chunk, i = [], [], 0
        while i < len(lines):
            opened = _DIV_OPEN.match(lines[i])
            if not opened:
                chunk.append(lines[i])
                i += 1
                continue
            html.append(self.md.render("\n".join(chunk)))
            chunk, depth, j = [], 1, i + 1
            while j < len(lines) and depth:
                depth += 1 if _DIV_OPEN.match(lines[j]) else -1 if _DIV_CLOSE.match(lines[j]) else 0
                j += 1
            inner = self.blocks(lines[i + 1 : j - 1])
            cls, title = opened.group(1), opened.group(2)
            head = f'<p class="callout-title">{self.inline(title)}</p>' if title else ""
            html.append(f'<aside class="callout {cls}" role="note">{head}{inner}</aside>\n')
            i = j
        html.append(self.md.render("\n".join(chunk)))
        return "".join(html)

    def nav(self, up: str) -> list[dict]:
        def link(item: dict) -> dict:
            text = Markup(self.inline(str(item["text"])))  # names in the navigation are escaped markdown
            if "menu" in item:
                return {"text": text, "href": "", "menu": [link(x) for x in item["menu"]]}
            return {"text": text, "href": up + item["href"].replace(".qmd", ".html"), "menu": []}

        return [link(x) for x in self.config["website"]["navbar"]["left"]]

    def page(self, rel: str) -> str:
        text = (self.project / rel).read_text("utf-8")
        front = _FRONT.match(text)
        if not front:
            raise RenderError(f"{self.project / rel}: a page must start with a YAML front matter block (--- ... ---).")
        meta = yaml.safe_load(front.group(1)) or {}
        body = self.blocks(text[front.end() :].splitlines())
        body = _QMD_LINK.sub(lambda m: f'{m.group(1)}.html{m.group(2) or ""}"', body)
        up = "../" * (len(PurePosixPath(rel).parts) - 1)
        website = self.config["website"]
        return self.shell.render(
            up=up,
            site_title=website["title"],
            title=Markup(self.inline(str(meta.get("title", "")))),
            subtitle=Markup(self.inline(str(meta.get("subtitle", "")))),
            plain_title=html.unescape(re.sub(r"\\(.)", r"\1", str(meta.get("title", "")))),
            body=Markup(body),
            nav=self.nav(up),
            current=rel.replace(".qmd", ".html"),
            footer=Markup(self.inline(website["page-footer"]["left"])),
        )

    def render(self, out: Path) -> None:
        for rel in self.config["project"]["render"]:
            target = out / PurePosixPath(rel).with_suffix(".html")
            target.parent.mkdir(parents=True, exist_ok=True)
            target.write_text(self.page(rel), encoding="utf-8")
        for folder in ASSETS:
            source = self.project / folder
            if source.is_dir():
                shutil.copytree(source, out / folder, dirs_exist_ok=True)
            elif source.is_file():
                shutil.copy2(source, out / folder)
