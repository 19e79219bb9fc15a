"""Unit page addresses: file-name-safe, stable from cycle to cycle."""

from __future__ import annotations

import hashlib
import re


def address_for(unit_id: str, taken: set[str]) -> str:
    """A file-name-safe, stable address for a unit (from its id), unique within ``taken``."""
    base = re.sub(r"[^a-z0-9]+", "-", unit_id.lower()).strip("-")[:60] or "unit"
    candidate, n = base, 2
    while candidate in taken:
        candidate, n = f"{base}-{n}", n + 1
    taken.add(candidate)
    return candidate


def unit_addresses(unit_ids, kept: dict[str, str] | None = None) -> dict[str, str]:
    """Each unit's address: the one it had in an earlier cycle (``kept``), else the address of its
    id.

    Addresses do not depend on the order of the units or on which other units exist, except when
    two ids make the same address: then the later-coming id gets a suffix from a hash of the id
    itself (not a counter), and keeps it in later cycles through ``kept``.
    """
    ids = [str(u) for u in unit_ids]
    out: dict[str, str] = {}
    taken: set[str] = set()
    for uid in ids:  # earlier cycles' addresses first
        old = (kept or {}).get(uid)
        if old and old not in taken:
            out[uid] = old
            taken.add(old)
    plain = {uid: address_for(uid, set()) for uid in ids if uid not in out}
    # an id that already is its address wins it
    for uid in sorted(plain, key=lambda u: (plain[u] != u, u)):
        candidate, n = plain[uid], 6
        while candidate in taken:
            candidate, n = f"{plain[uid]}-{hashlib.sha256(uid.encode()).hexdigest()[:n]}", n + 2
        out[uid] = candidate
        taken.add(candidate)
    return {uid: out[uid] for uid in ids}
