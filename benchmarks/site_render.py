"""Time to build the site of a big network with the built-in renderer; target: under 30 s.

An invented network of 200 units and 4 patient-level measures is fitted once (not timed). Then
the site step (figures, downloads, pages, rendering: ``build_site``) is timed twice:

- cold: an empty figure cache, so every figure is drawn (what a new cycle costs);
- warm: figures from the cache (what a wording or template change costs).

Peer, measured in the same run: pandoc 3 (from PyPI's pypandoc-binary) converting the same
Quarto markdown pages to standalone HTML, one call per page, as a plain static-site build would
(no figures drawn, so the peer does less work than we do).

    pip install -e ".[bench]"        # the peer: pandoc 3 from PyPI's pypandoc-binary
    python benchmarks/site_render.py [--units 200]
"""

from __future__ import annotations

import argparse
import re
import shutil
import tempfile
import time
from pathlib import Path

from pipeline.cache import Cache
from pipeline.config import load_config
from pipeline.cycle import build_manifest, build_site
from pipeline.demo import write_demo
from pipeline.downloads import public_table
from pipeline.fitting import fit_measures
from pipeline.history import past_cycles
from pipeline.inputs.data import load_cohort
from pipeline.progress import SilentReporter
from pipeline.website.render import Renderer

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "benchmarks" / "out" / "site-render"
TARGET_SECONDS = 30.0


def four_measures(config_text: str) -> str:
    """The demo config without its unit-summary measure: four patient-level measures."""
    blocks = re.split(r"(?m)^(?=\[\[measures\]\])", config_text)
    return "".join(b for b in blocks if 'key = "pressure"' not in b)


def broken_links(site: Path) -> list[str]:
    """Every href/src in the site's pages that points to a missing local file."""
    broken = []
    for page in site.rglob("*.html"):
        if "_source" in page.parts:
            continue
        for target in re.findall(r'(?:href|src)="(?![a-z]+:)([^"#?]+)', page.read_text("utf-8")):
            if not (page.parent / target).is_file():
                broken.append(f"{page.relative_to(site)} -> {target}")
    return broken


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--units", type=int, default=200)
    args = parser.parse_args()
    for old in OUT.glob("*") if OUT.exists() else []:
        # the invented inputs are the same every run; their fits may be reused
        if old.name != "fit-cache":
            shutil.rmtree(old) if old.is_dir() else old.unlink()
    files = write_demo(OUT / "inputs", OUT / "site", n_units=args.units, largest=1500)
    files.config.write_text(four_measures(files.config.read_text()))
    config = load_config(files.config)
    cohort = load_cohort(config)
    print(
        f"network: {len(cohort.units)} units, {len(config.measures)} measures, "
        f"{len(cohort.rows):,} patient rows"
    )
    t = time.perf_counter()
    results = fit_measures(config, cohort, Cache(OUT / "fit-cache"), SilentReporter())
    print(f"fits (not timed as part of the target): {time.perf_counter() - t:.1f} s")
    renderer = Renderer("builtin", "benchmark", "asked for")
    manifest, table = build_manifest(config, cohort, renderer, results), public_table(results)
    past = past_cycles(config.cycle.history, config.cycle.period)
    timings = {}
    figure_cache = Cache(OUT / "figure-cache")
    for run in ("cold", "warm"):
        start = time.perf_counter()
        build = build_site(
            config, cohort, results, table, manifest, past, renderer, figure_cache, SilentReporter()
        )
        timings[run] = time.perf_counter() - start
        pages = sorted(p for p in build.rglob("*.html") if "_source" not in p.parts)
        figures = sorted((build / "figures").glob("*.svg"))
        print(f"{run}: {timings[run]:.1f} s for {len(pages)} pages and {len(figures)} SVG figures")
        if run == "warm":
            project = build / "_source"
            broken = broken_links(build)
            print(
                f"local links and images that do not resolve in the built site: {len(broken)}",
                *broken[:3],
                sep="\n  ",
            )
        else:
            shutil.rmtree(build)

    import pypandoc

    pandoc = pypandoc.get_pandoc_path()
    qmds = sorted(project.rglob("*.qmd"))
    with tempfile.TemporaryDirectory() as tmp:
        start = time.perf_counter()
        for i, qmd in enumerate(qmds):
            pypandoc.convert_file(
                str(qmd),
                "html",
                format="markdown",
                outputfile=f"{tmp}/{i}.html",
                extra_args=["--standalone"],
            )
        peer = time.perf_counter() - start
    shutil.rmtree(build)
    print(
        f"peer: pandoc ({pandoc}) converted the same {len(qmds)} pages in {peer:.1f} s (pages "
        "only, no figures)"
    )
    print(
        f"ratio cold / peer: {timings['cold'] / peer:.2f}; warm / peer: "
        f"{timings['warm'] / peer:.2f}"
    )
    verdict = "meets" if timings["cold"] < TARGET_SECONDS else "MISSES"
    print(
        f"target: cold build under {TARGET_SECONDS:.0f} s for {args.units} units x "
        f"{len(config.measures)} measures: {verdict} ({timings['cold']:.1f} s)"
    )


if __name__ == "__main__":
    main()
