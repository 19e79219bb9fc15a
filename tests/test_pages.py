"""Pages and rendering pieces: escaping, addresses, strict templates, the built-in renderer, the
tool helper."""

from __future__ import annotations

import re
import sys

import jinja2
import pytest
from markdown_it import MarkdownIt

from pipeline.errors import ToolError
from pipeline.external import run_tool
from pipeline.website.addresses import address_for, unit_addresses
from pipeline.website.markup import chance, code_span, markdown_literal, natural_frequency
from pipeline.website.pages import environment
from pipeline.website.render import BuiltinRenderer


@pytest.mark.parametrize(
    "text",
    [
        "<script>alert(1)</script>",
        "[click](http://example.invalid)",
        "**bold** _it_ `code`",
        "St. Mary's #1 | A&E",
        "a\nb",
    ],
)
def test_data_text_is_shown_literally(text):
    html = MarkdownIt("commonmark").enable("table").renderInline(markdown_literal(text))
    assert (
        "<script" not in html
        and "<a " not in html
        and "<strong>" not in html
        and "<em>" not in html
        and "<code>" not in html
    )
    shown = (
        html.replace("&lt;", "<").replace("&gt;", ">").replace("&amp;", "&").replace("&quot;", '"')
    )
    assert shown == " ".join(text.split())


@pytest.mark.parametrize(
    "text", ["y ~ C(age_band) + a:b", "odd `tick` and ``two``", "<b>x</b> & *y*"]
)
def test_code_spans_show_formulas_without_escapes(text):
    html = MarkdownIt("commonmark").enable("table").renderInline(code_span(text))
    assert html.startswith("<code>") and html.endswith("</code>")
    assert html[6:-7].replace("&lt;", "<").replace("&gt;", ">").replace("&amp;", "&") == text


def test_slugs_are_safe_stable_and_unique():
    taken: set[str] = set()
    assert address_for("MV-01", taken) == "mv-01"
    assert address_for("../../etc/passwd", taken) == "etc-passwd"
    assert address_for("mv 01", taken) == "mv-01-2"
    assert address_for("!!!", taken) == "unit"


def test_natural_frequencies_and_chances_in_words():
    assert natural_frequency(0.142) == "about 14 in every 100 patients"
    assert natural_frequency(0.014) == "about 14 in every 1,000 patients"
    assert (
        chance(0.004) == "less than 1%"
        and chance(0.9996) == "more than 99%"
        and chance(0.5) == "50%"
    )


def test_templates_fail_loudly_on_a_missing_value():
    with pytest.raises(jinja2.UndefinedError):
        environment().get_template("qmd/cautions.qmd.j2").render(cycle=None, up="")


def test_builtin_renderer_turns_callouts_links_and_tables_into_html(tmp_path):
    (tmp_path / "_quarto.yml").write_text(
        'project:\n  render: ["index.qmd", "sub/page.qmd"]\nwebsite:\n  title: "T"\n  '
        'page-footer:\n    left: "F"\n'
        '  navbar:\n    left:\n      - href: index.qmd\n        text: "Home \\\\(A&amp;E\\\\)"\n'
    )
    (tmp_path / "index.qmd").write_text(
        '---\ntitle: "Home"\n---\n\n::: {.callout-warning}\n## Heed\n\nInner '
        "**text**.\n:::\n\n[next](sub/page.qmd#top)\n"
    )
    (tmp_path / "sub").mkdir()
    (tmp_path / "sub" / "page.qmd").write_text(
        '---\ntitle: "A \\\\<b\\\\>"\n---\n\n| a | b |\n|:--|--:|\n| 1 | 2 |\n'
    )
    out = tmp_path / "out"
    out.mkdir()
    BuiltinRenderer(tmp_path).render(out)
    index = (out / "index.html").read_text()
    assert (
        '<aside class="callout callout-warning" role="note"><p '
        'class="callout-title">Heed</p><p>Inner <strong>text</strong>.</p>' in index
    )
    assert 'href="sub/page.html#top"' in index
    page = (out / "sub" / "page.html").read_text()
    assert 'href="../index.html"' in page and 'href="../assets/fairgauge.css"' in page
    assert "<h1>A &lt;b&gt;</h1>" in page and "<title>A &lt;b&gt; · T</title>" in page
    assert '<a href="../index.html">Home (A&amp;E)</a>' in page
    # the CSP allows no inline styles
    assert '<td class="fg-right">2</td>' in page and "style=" not in page
    assert (
        'href="../index.html" aria-current="page"' not in page
        and 'href="index.html" aria-current="page"' in index
    )


def test_builtin_renderer_makes_figures_details_and_divs_like_quarto(tmp_path):
    (tmp_path / "_quarto.yml").write_text(
        'project:\n  render: ["index.qmd"]\nwebsite:\n  title: "T"\n  site-url: "https://example.org/x/"\n'
        '  page-footer:\n    left: "F"\n  navbar:\n    left:\n      - href: index.qmd\n        '
        'text: "Home"\n'
    )
    (tmp_path / "index.qmd").write_text(
        '---\ntitle: "Home"\ndescription-meta: "About <this>"\n---\n\n'
        "::: {#box .fg-sortable}\n| a |\n|:--|\n| 1 |\n:::\n\n"
        '![Short *caption*.](figures/a.svg){fig-alt="Long alt with <tags> & 3 numbers"}\n\n'
        '<details class="callout fg-numbers">\n<summary class="callout-title">The numbers</summary>'
        "\n\nHidden **table**.\n\n</details>\n"
    )
    out = tmp_path / "out"
    out.mkdir()
    BuiltinRenderer(tmp_path).render(out)
    index = (out / "index.html").read_text()
    assert '<div id="box" class="fg-sortable"><table>' in index
    assert (
        '<figure><img src="figures/a.svg" alt="Long alt with &lt;tags&gt; &amp; 3 numbers" '
        'loading="lazy">'
        "<figcaption>Short <em>caption</em>.</figcaption></figure>"
    ) in index
    assert (
        '<details class="callout fg-numbers">\n<summary class="callout-title">The '
        "numbers</summary>\n<p>Hidden <strong>table</strong>.</p>\n</details>" in index
    )
    assert '<meta name="description" content="About &lt;this&gt;">' in index
    assert '<link rel="canonical" href="https://example.org/x/index.html">' in index
    search = (out / "search.html").read_text()
    assert '<a href="index.html">Home</a>' in search and 'src="assets/search-index.js"' in search
    assert "Hidden table" in (out / "assets" / "search-index.js").read_text()


def test_external_tool_output_is_returned_and_replayed_on_failure():
    assert run_tool([sys.executable, "-c", "print('fine')"]).strip() == "fine"
    with pytest.raises(ToolError) as caught:
        run_tool([sys.executable, "-c", "import sys; print('what went wrong'); sys.exit(3)"])
    assert caught.value.returncode == 3 and "what went wrong" in str(caught.value)
    with pytest.raises(ToolError, match="was not found on PATH"):
        run_tool(["fairgauge-no-such-tool-xyz"])


def test_unit_addresses_do_not_depend_on_the_other_units_and_are_kept_across_cycles():
    ids = ["MV-01", "mv02", "North Wing/3", "x"]
    base = unit_addresses(ids)
    assert base == {"MV-01": "mv-01", "mv02": "mv02", "North Wing/3": "north-wing-3", "x": "x"}
    assert unit_addresses(list(reversed(ids))) == base
    assert unit_addresses(ids[:2]) == {k: base[k] for k in ids[:2]}
    # A new unit whose id makes the same address: the id that already is its address wins, the other
    # gets a suffix from a hash of its own id (the same in every cycle) ...
    both = unit_addresses(["MV-01", "mv-01"])
    assert both["mv-01"] == "mv-01" and re.fullmatch(r"mv-01-[0-9a-f]{6}", both["MV-01"])
    # ... unless an earlier cycle published an address for it, which it keeps.
    assert unit_addresses(["MV-01", "mv-01"], kept=base)["MV-01"] == "mv-01"
    assert unit_addresses(["MV-01", "mv-01"], kept=base)["mv-01"] != "mv-01"


def test_history_keeps_each_units_address(tmp_path):
    import pandas as pd

    from pipeline.history import kept_addresses, past_cycles, record_cycle

    table = pd.DataFrame({"unit_id": ["a"], "measure": ["m"], "status": ["reported"]})
    record_cycle(tmp_path, "Cycle one", table, [], {"built": "now"}, {"a": "a", "B/2": "b-2"})
    record_cycle(tmp_path, "Cycle two", table, [], {"built": "now"}, {"a": "a-renamed"})
    assert kept_addresses(past_cycles(tmp_path, "Cycle three")) == {"a": "a-renamed", "B/2": "b-2"}


def test_templates_place_figures_by_their_kind_never_by_their_file_name():
    """A unit or measure whose address contains "position-" or "funnel-" must not move a chart under
    another heading."""
    import pandas as pd

    from pipeline import templates_path
    from pipeline.website import captions

    for template in sorted((templates_path() / "qmd").glob("*.j2")):
        assert not re.search(r"in f\.src", template.read_text()), template.name
    data = pd.DataFrame(
        {"measure": ["M"], "period": ["P"], "order": [0], "value": [1.0], "lo": [0.5], "hi": [1.5]}
    )
    trend = captions.trend("figures/trend-unit-position-x.svg", data, "Unit position-x")
    assert trend.kind == "trend"


def test_templates_count_nothing_and_type_no_number_the_code_owns():
    """Counts of units and measures' rows, thresholds and measured figures come from the code that
    owns them (views, history, sampling, funnel), never typed into a template."""
    from pipeline import templates_path

    for template in sorted((templates_path() / "qmd").glob("*.j2")):
        text = template.read_text(encoding="utf-8")
        assert not re.search(r"(rows|cells|units)\s*\|[^}]*length", text), template.name
        for typed in ("0.99", "95.1%", "twice the warm-up", "half and twice", "format(95)"):
            assert typed not in text, (template.name, typed)


def test_every_template_has_a_typed_context_holding_every_name_it_uses():
    """Each page template is rendered with SiteContext plus its own page dataclass
    (website/contexts.py); every name it reads must be a field of one of them (or a macro or
    loop name it makes itself), so a template cannot depend on an untyped key."""
    import dataclasses

    import jinja2.meta

    from pipeline import templates_path
    from pipeline.website.contexts import TEMPLATE_CONTEXTS, SiteContext
    from pipeline.website.pages import environment

    env = environment()
    folder = templates_path() / "qmd"
    pages = {p.name for p in folder.glob("*.j2") if not p.name.endswith(".md.j2")}
    assert pages == set(TEMPLATE_CONTEXTS)
    common = {f.name for f in dataclasses.fields(SiteContext)} | {"up"}
    for name, context in TEMPLATE_CONTEXTS.items():
        source = (folder / name).read_text(encoding="utf-8")
        used = jinja2.meta.find_undeclared_variables(env.parse(source))
        allowed = common | {f.name for f in dataclasses.fields(context)}
        assert used <= allowed, (name, sorted(used - allowed))
    every_page = common | {
        f.name for c in TEMPLATE_CONTEXTS.values() for f in dataclasses.fields(c)
    }
    for partial in sorted(folder.glob("*.md.j2")):  # included or imported by the pages
        used = jinja2.meta.find_undeclared_variables(env.parse(partial.read_text(encoding="utf-8")))
        assert used <= every_page, (partial.name, sorted(used - every_page))
