"""Sign-off and promotion: exactly the reviewed build goes out, or nothing does.

A staged build is identified by its content hash: SHA-256 over the lines ``<sha256>  <path>``
(the format of ``sha256sum``), one per file of the staged site in path order, leaving out
``fairgauge-signoff.json`` (the one file promotion writes). ``fairgauge sign-off`` records the
signers, their roles, a date and a note against that hash; ``fairgauge promote`` recomputes it,
refuses unless it equals the signed-off one (and the history record and the history itself are
as staged), then swaps a copy of the site in place of the public output (atomically, as a build
does) and enters the cycle into the history. Anyone can check a published site the same way:
hash its files except ``fairgauge-signoff.json`` and compare with ``reviewed_sha256`` in it.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import tempfile
from dataclasses import dataclass
from datetime import UTC, date, datetime
from pathlib import Path

from pipeline.config import CycleConfig
from pipeline.cycle import new_build_folder, publish
from pipeline.errors import ReviewError
from pipeline.history import cycle_key, enter_record
from pipeline.website.render import SIGNOFF

STAGED = "fairgauge-staged.json"  # in the staging folder: what was staged, its hashes, sign-offs


@dataclass(frozen=True)
class Promoted:
    site: Path
    digest: str
    signers: list[dict]


def content_hash(folder: Path, leave_out: str = SIGNOFF) -> tuple[str, dict[str, str]]:
    """(digest, per-file SHA-256) of every file under ``folder`` except ``leave_out`` at its
    top."""
    files = {}
    for path in sorted(p for p in folder.rglob("*") if p.is_file()):
        name = path.relative_to(folder).as_posix()
        if name != leave_out:
            files[name] = hashlib.sha256(path.read_bytes()).hexdigest()
    lines = "".join(f"{h}  {name}\n" for name, h in sorted(files.items()))
    return hashlib.sha256(lines.encode("utf-8")).hexdigest(), files


def read_staged(staging: Path) -> dict | None:
    path = staging / STAGED
    return json.loads(path.read_text("utf-8")) if path.is_file() else None


def history_state(folder: Path) -> list[dict]:
    """The history's cycles as listed in cycles.json (to see whether it changed since staging)."""
    path = folder / "cycles.json"
    return json.loads(path.read_text("utf-8")) if path.is_file() else []


def sign_off(config: CycleConfig, signers: list[tuple[str, str]], when: str, note: str) -> dict:
    """Record sign-off of the staged build by ``signers`` ((name, role) pairs) on ``when``
    (YYYY-MM-DD); refused if nothing is staged or the staged build was altered."""
    staging = config.review.staging
    staged = _checked(config, staging)
    if not signers or any(not n.strip() or not r.strip() for n, r in signers):
        raise ReviewError("sign-off needs at least one signer, each with a name and a role.")
    try:
        day = date.fromisoformat(when)
    except ValueError:
        raise ReviewError(f"the sign-off date '{when}' is not a date like 2026-12-04.") from None
    entry = {
        "signers": [{"name": n.strip(), "role": r.strip()} for n, r in signers],
        "date": day.isoformat(),
        "note": note.strip(),
        "recorded": _now(),
        "site_sha256": staged["site_sha256"],
    }
    staged["sign_offs"].append(entry)
    write_json(staging / STAGED, staged)
    return entry


def promote(config: CycleConfig) -> Promoted:
    """Publish the staged build of this cycle to ``[cycle].output`` and enter it into the
    history; refused (nothing changed) unless it is signed off and unaltered."""
    staging = config.review.staging
    staged = _checked(config, staging)
    signed = [s for s in staged["sign_offs"] if s["site_sha256"] == staged["site_sha256"]]
    if not signed:
        raise ReviewError(
            f"the build staged in {staging} has not been signed off, so it was not published. "
            "Record sign-off with `fairgauge sign-off` first."
        )
    roles = {s["role"].casefold() for entry in signed for s in entry["signers"]}
    missing = [r for r in config.review.sign_off_roles if r.casefold() not in roles]
    if missing:
        raise ReviewError(
            f"[review].sign_off_roles needs sign-off by {', '.join(missing)} as well; nothing "
            "was published."
        )
    if history_state(config.cycle.history) != staged["history"]:
        raise ReviewError(
            f"the history in {config.cycle.history} changed after this cycle was staged (another "
            "cycle was published), so the staged comparisons are out of date. Stage it again."
        )
    build = new_build_folder(config.cycle.output)
    signers = [s for entry in signed for s in entry["signers"]]
    record = {
        "reviewed_sha256": staged["site_sha256"],
        "period": staged["period"],
        "staged": staged["staged"],
        "sign_offs": signed,
        "promoted": _now(),
        "check": "SHA-256 over the lines '<sha256>  <path>' of every file of this site except "
        f"{SIGNOFF}, in path order, equals reviewed_sha256.",
    }
    try:
        shutil.copytree(staging / "site", build, dirs_exist_ok=True)
        if content_hash(build)[0] != staged["site_sha256"]:
            raise ReviewError(f"the copy of {staging / 'site'} does not match what was staged.")
        write_json(build / SIGNOFF, record)
    except BaseException:
        shutil.rmtree(build, ignore_errors=True)
        raise
    publish(build, config.cycle.output)
    _enter_history(config, staging, record)
    staged["promoted"] = record["promoted"]
    write_json(staging / STAGED, staged)
    return Promoted(config.cycle.output, staged["site_sha256"], signers)


def _checked(config: CycleConfig, staging: Path) -> dict:
    """The staging record, after checking that the staged site and history record are exactly as
    staged and are this config's cycle."""
    staged = read_staged(staging)
    if staged is None:
        raise ReviewError(
            f"nothing is staged in {staging} ([review].staging). Run `fairgauge stage` first."
        )
    if staged["period"] != config.cycle.period or staged["config_sha256"] != config.sha256:
        raise ReviewError(
            f"the build staged in {staging} is of period '{staged['period']}' with another cycle "
            "config than this one; stage this config again."
            if staged["period"] == config.cycle.period
            else f"the build staged in {staging} is of period '{staged['period']}', but this "
            f"config is for '{config.cycle.period}'. Stage it again."
        )
    for part, key in (("site", "site_sha256"), ("record", "record_sha256")):
        digest, files = content_hash(staging / part)
        if digest != staged[key]:
            was = staged["files"] if part == "site" else staged["record_files"]
            altered = sorted({n for n in files.keys() | was.keys() if files.get(n) != was.get(n)})
            raise ReviewError(
                f"the staged {part} in {staging / part} was altered after staging ({len(altered)} "
                f"file(s) differ: {', '.join(altered[:5])}), so it was refused. Stage again to "
                "review what is there now."
            )
    return staged


def _enter_history(config: CycleConfig, staging: Path, record: dict) -> None:
    """Copy the staged history record into the history, with its sign-off in its manifest."""
    history = config.cycle.history
    history.mkdir(parents=True, exist_ok=True)
    written = Path(tempfile.mkdtemp(prefix=f".{cycle_key(config.cycle.period)}.tmp-", dir=history))
    try:
        shutil.copytree(staging / "record", written, dirs_exist_ok=True)
        manifest = json.loads((written / "manifest.json").read_text("utf-8"))
        manifest.setdefault("review", {})["sign_off"] = record
        write_json(written / "manifest.json", manifest)
    except BaseException:
        shutil.rmtree(written, ignore_errors=True)
        raise
    enter_record(history, config.cycle.period, written, record["promoted"])


def write_json(path: Path, value: dict) -> None:
    path.with_suffix(".tmp").write_text(json.dumps(value, indent=2), encoding="utf-8")
    os.replace(path.with_suffix(".tmp"), path)


def _now() -> str:
    return datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")
