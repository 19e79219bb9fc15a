"""The demo site in a real browser: Debian's chromium driven by Playwright, with axe-core.

Set-up (done by the README's test command, ``tests/setup.sh``): ``apt-get install chromium``,
``pip install playwright`` and ``npm install axe-core``. Deselect with ``-m "not browser"`` on a
machine without them. The site is served over HTTP from a local thread, as a web host would.
"""

from __future__ import annotations

import functools
import http.server
import re
import shutil
import threading
from collections import deque
from pathlib import Path
from urllib.parse import urlparse

import pytest

pytestmark = [pytest.mark.slow, pytest.mark.browser]

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
AXE = Path(__file__).parents[1] / "node_modules" / "axe-core" / "axe.min.js"
ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--no-first-run",
]
# One page of each kind; axe-core runs on each.
KINDS = {
    "home": "index.html",
    "units": "units.html",
    "guide": "guide.html",
    "measure": "measures/readmit30.html",
    "continuous measure": "measures/stay.html",
    "unit profile": "units/mv01.html",
    "model report": "models/readmit30.html",
    "changes": "changes.html",
    "methods": "methods.html",
    "cautions": "cautions.html",
    "downloads": "downloads.html",
    "search": "search.html",
}


class _Quiet(http.server.SimpleHTTPRequestHandler):
    def log_message(self, *args):
        pass


@pytest.fixture(scope="module")
def served(demo_cycle):
    _, _, site = demo_cycle
    server = http.server.ThreadingHTTPServer(
        ("127.0.0.1", 0), functools.partial(_Quiet, directory=str(site))
    )
    threading.Thread(target=server.serve_forever, daemon=True).start()
    yield f"http://127.0.0.1:{server.server_address[1]}/", site
    server.shutdown()
    server.server_close()


@pytest.fixture(scope="module")
def browser():
    from playwright.sync_api import sync_playwright

    assert Path(CHROMIUM).exists(), (
        "chromium is not installed: run tests/setup.sh (apt-get install chromium)"
    )
    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
        yield b
        b.close()


def _page(browser, **context):
    page = browser.new_context(**context).new_page()
    page.errors = []  # console errors, page errors and failed requests, in order
    page.on(
        "console", lambda m: page.errors.append(f"console: {m.text}") if m.type == "error" else None
    )
    page.on("pageerror", lambda e: page.errors.append(f"page error: {e}"))
    # A request the browser gave up because the test moved on to the next page (the favicon,
    # fetched after load) is not a broken resource: a missing file answers 404 (below).
    page.on(
        "requestfailed",
        lambda r: (
            None
            if r.failure == "net::ERR_ABORTED"
            else page.errors.append(f"failed: {r.url} ({r.failure})")
        ),
    )
    page.on(
        "response",
        lambda r: page.errors.append(f"HTTP {r.status}: {r.url}") if r.status >= 400 else None,
    )
    return page


def _first_number(text: str) -> float | None:
    m = re.search(r"-?\d[\d,]*(\.\d+)?", text)
    return float(m.group(0).replace(",", "")) if m else None


def test_home_table_sorts_filters_and_leads_to_a_unit(served, browser):
    base, _ = served
    page = _page(browser)
    page.goto(base + "index.html")
    table = page.locator("#unit-table table")
    rows = table.locator("tbody tr")
    n = rows.count()
    assert n == 44
    button = table.get_by_role("button", name="Sort by Readmission within 30 days")
    button.click()
    assert table.locator("th").nth(2).get_attribute("aria-sort") == "ascending"
    cells = [rows.nth(i).locator("td").nth(2).inner_text() for i in range(n)]
    values = [v for v in map(_first_number, cells) if v is not None]
    assert values == sorted(values) and len(values) >= 40
    assert _first_number(cells[-1]) is None  # units with too few cases sort last
    button.click()
    cells = [rows.nth(i).locator("td").nth(2).inner_text() for i in range(n)]
    values = [v for v in map(_first_number, cells) if v is not None]
    assert values == sorted(values, reverse=True)
    assert "highest first" in page.locator("#unit-table .fg-status").inner_text()
    # filter by name, then by group
    first_name = rows.nth(0).locator("td").nth(0).inner_text()
    page.locator("#unit-table-filter").fill(first_name)
    assert page.locator("#unit-table tbody tr:not([hidden])").count() >= 1
    assert f"of {n} units" in page.locator("#unit-table .fg-status").inner_text()
    page.locator("#unit-table-filter").fill("")
    page.locator("#unit-table-filter-group").select_option("Stands out as worse")
    shown = page.locator("#unit-table tbody tr:not([hidden])")
    assert 0 < shown.count() < n and all(
        "Stands out as worse" in shown.nth(i).inner_text() for i in range(shown.count())
    )
    # follow a link to the unit's profile
    name = shown.nth(0).locator("td a").first.inner_text()
    shown.nth(0).locator("td a").first.click()
    page.wait_for_load_state()
    assert re.search(r"/units/[a-z0-9-]+\.html$", page.url)
    assert page.locator("h1").inner_text() == name
    assert page.errors == []


def test_every_page_loads_with_images_and_no_errors_and_no_broken_links(served, browser):
    base, site = served
    page = _page(browser)
    queue, seen, broken = deque(["index.html"]), {"index.html"}, []
    while queue:
        rel = queue.popleft()
        response = page.goto(base + rel)
        assert response is not None and response.ok, rel
        images = page.eval_on_selector_all(
            "img", "els => els.map(e => [e.getAttribute('src'), e.complete && e.naturalWidth > 0])"
        )
        for src, loaded in images:
            if not loaded:
                page.locator(f'img[src="{src}"]').scroll_into_view_if_needed()
                page.wait_for_function(
                    's => { const i = document.querySelector(`img[src="${s}"]`); return '
                    "i.complete; }",
                    arg=src,
                )
                loaded = page.eval_on_selector(f'img[src="{src}"]', "e => e.naturalWidth > 0")
            assert loaded, f"{rel}: image {src} did not load"
        links = page.eval_on_selector_all(
            "a[href], link[href], script[src]", "els => els.map(e => e.href || e.src)"
        )
        for url in links:
            parsed = urlparse(url)
            if not url.startswith(base):
                assert parsed.scheme in ("http", "https", "mailto") and not url.startswith(
                    "http://127.0.0.1"
                ), url
                continue
            target = parsed.path[len(urlparse(base).path) :]
            if not (site / target).is_file():
                broken.append(f"{rel} -> {target}")
            elif target.endswith(".html") and target not in seen:
                seen.add(target)
                queue.append(target)
    assert broken == []
    assert page.errors == [], page.errors[:5]
    on_disk = {
        p.relative_to(site).as_posix() for p in site.rglob("*.html") if "_source" not in p.parts
    }
    assert seen == on_disk  # every page is reachable by links from the home page


@pytest.mark.parametrize("kind", list(KINDS))
def test_axe_finds_no_serious_or_critical_problem(served, browser, kind):
    # axe-core (Deque, open source) WCAG 2.x rules; we fail on "serious" and "critical" impacts.
    base, _ = served
    # the site's CSP rightly refuses injected scripts; axe is ours, not the site's
    page = _page(browser, bypass_csp=True)
    page.goto(base + KINDS[kind])
    page.add_script_tag(content=AXE.read_text())
    result = page.evaluate("async () => await axe.run(document, {resultTypes: ['violations']})")
    bad = [
        (v["id"], v["impact"], len(v["nodes"]), v["nodes"][0]["target"])
        for v in result["violations"]
        if v["impact"] in ("serious", "critical")
    ]
    minor = [
        (v["id"], v["impact"])
        for v in result["violations"]
        if v["impact"] not in ("serious", "critical")
    ]
    print(
        f"\naxe {kind}: {len(result['violations'])} violations; serious or critical: {bad}; "
        f"others: {minor}"
    )
    assert bad == []
    assert page.errors == []


def _pages_in_pdf(pdf: bytes) -> int:
    return len(re.findall(rb"/Type\s*/Page(?!s)", pdf))


def test_unit_profiles_print_on_one_page(served, browser):
    base, site = served
    page = _page(browser)
    longest = sorted(
        (site / "units").glob("*.html"), key=lambda p: len(p.read_text()), reverse=True
    )[:3]
    for profile in longest:
        page.goto(base + "units/" + profile.name)
        page.emulate_media(media="print")
        for paper in ("A4", "Letter"):
            assert _pages_in_pdf(page.pdf(format=paper)) == 1, f"{profile.name} on {paper}"


def test_site_search_finds_a_unit(served, browser):
    base, site = served
    page = _page(browser)
    page.goto(base + "index.html")
    name = page.locator("#unit-table tbody tr td a").first.inner_text()
    word = max(name.split(), key=len)
    page.locator("#fg-q").fill(word)
    page.locator(".fg-search button").click()
    page.wait_for_load_state()
    assert "search.html?q=" in page.url
    results = page.locator("#fg-search-results li a")
    assert 0 < results.count() < 20
    assert name in [results.nth(i).inner_text() for i in range(results.count())]
    assert page.errors == []


def test_pages_work_without_javascript(served, browser):
    base, _ = served
    page = _page(browser, java_script_enabled=False)
    page.goto(base + "index.html")
    assert page.locator("#unit-table tbody tr").count() == 44
    assert page.locator("#unit-table button").count() == 0  # no controls that would do nothing
    page.goto(base + "search.html")
    assert page.locator("#fg-search-results li").count() > 50  # the full page list
    page.goto(base + "measures/readmit30.html")
    assert page.locator("details table").count() == 3  # the numbers beside each picture still open
