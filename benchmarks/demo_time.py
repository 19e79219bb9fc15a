"""Wall time of the demo cycle from an installed (not editable) fairgauge; target: under 3 minutes.
Also the rebuild after a wording-only change, which reuses cached fits and figures; target: under 30
s.

Peer, measured in the same run: the same demo cycle with PyMC's own NUTS sampler
([sampler].engine = "pymc") instead of nutpie.

    python benchmarks/demo_time.py [--skip-peer]

Installs fairgauge into benchmarks/out/venv (system site-packages visible, so no dependency is
downloaded again), then times `fairgauge demo` there.
"""

from __future__ import annotations

import argparse
import shutil
import sys
import time
from pathlib import Path

from pipeline.external import run_tool

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "benchmarks" / "out"
TARGET_SECONDS = 180.0


def timed(command: list[str]) -> tuple[float, str]:
    start = time.perf_counter()
    output = run_tool(command, cwd=OUT)
    return time.perf_counter() - start, output


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--skip-peer", action="store_true")
    args = parser.parse_args()
    shutil.rmtree(OUT, ignore_errors=True)
    OUT.mkdir(parents=True)
    venv = OUT / "venv"
    run_tool([sys.executable, "-m", "venv", "--system-site-packages", str(venv)])
    run_tool([str(venv / "bin" / "pip"), "install", "--quiet", "--no-deps", str(ROOT)])
    fairgauge = str(venv / "bin" / "fairgauge")
    where = run_tool(
        [str(venv / "bin" / "python"), "-c", "import pipeline; print(pipeline.__file__)"], cwd=OUT
    ).strip()
    assert where.startswith(str(venv)) and "site-packages" in where, (
        f"not an installed copy: {where}"
    )

    seconds, output = timed([fairgauge, "demo", "--folder", "demo-cycle", "--site", "site-nutpie"])
    print(output.strip().splitlines()[-6], "...", sep="\n")
    print(
        f"demo cycle (installed package, nutpie): {seconds:.1f} s; target {TARGET_SECONDS:.0f} s; "
        f"ratio to target {seconds / TARGET_SECONDS:.2f}"
    )
    config_path = OUT / "demo-cycle" / "cycle.toml"
    original = config_path.read_text()
    config_path.write_text(
        original.replace("within 30 days of going home", "within 30 days of leaving hospital")
    )
    reword_seconds, _ = timed([fairgauge, "build", "demo-cycle/cycle.toml"])
    config_path.write_text(original)
    print(
        "rebuild after a wording-only change (fits and figures from the cache): "
        f"{reword_seconds:.1f} s; target 30 s; "
        f"ratio to target {reword_seconds / 30:.2f}; ratio to the full cycle "
        f"{reword_seconds / seconds:.2f}"
    )
    if args.skip_peer:
        return
    config = (OUT / "demo-cycle" / "cycle.toml").read_text()
    peer = config.replace("[sampler]\n", '[sampler]\nengine = "pymc"\n').replace(
        "site-nutpie", "site-pymc"
    )
    (OUT / "demo-cycle" / "cycle-pymc.toml").write_text(peer)
    peer_seconds, _ = timed([fairgauge, "build", "demo-cycle/cycle-pymc.toml"])
    print(
        f"peer, same cycle with PyMC's own NUTS: {peer_seconds:.1f} s; "
        f"fairgauge default / peer = {seconds / peer_seconds:.2f}"
    )


if __name__ == "__main__":
    main()
