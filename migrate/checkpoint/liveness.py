"""Signs that a query may still be running on a checkpoint (the running-query guard).

"Recently" means within ``RECENT_SECONDS`` (10 minutes) of this machine's clock. Ten minutes is
longer than typical micro-batches, so a batch in progress is caught, and leaves room for clock
skew between this machine and the object store that stamps the modification times. The signs:

* the newest offsets entry has no commit and was written recently (a batch is in flight);
* state files for versions newer than the last commit were written recently;
* new offsets or commits entries appeared while stateshift was reading (``changed_since``).

A stopped query shows none of them once the window has passed; ``--force`` overrides.
"""

from __future__ import annotations

import time

from ..storage import Entry
from .model import Checkpoint

RECENT_SECONDS = 600


def _age(entry: Entry | None, now: float) -> float | None:
    if entry is None or entry.mtime is None:
        return None
    return now - entry.mtime


def running_signs(ckpt: Checkpoint, now: float | None = None, window: float = RECENT_SECONDS) -> list[str]:
    now = time.time() if now is None else now
    signs: list[str] = []
    if ckpt.uncommitted:
        newest = max(ckpt.uncommitted)
        age = _age(ckpt.log_listings.get("offsets", {}).get(str(newest)), now)
        if age is not None and age < window:
            signs.append(f"offsets/{newest} has no commit and was written {int(age)} s ago")
    provider = ckpt.provider
    for sp in ckpt.store_partitions():
        newer = [v for v in provider.versions(sp.listing) if v > ckpt.state_version]
        for name, entry in sp.listing.items():
            if any(name.startswith(f"{v}.") or name.startswith(f"{v}_") for v in newer):
                age = _age(entry, now)
                if age is not None and age < window:
                    signs.append(f"{sp.dir.rel}/{name} is newer than the last commit and was written {int(age)} s ago")
                    return signs
    return signs


def changed_since(ckpt: Checkpoint) -> list[str]:
    """Log entries that appeared or disappeared after the model was read (a running query adds
    entries and purges old ones)."""
    signs = []
    for log in ("offsets", "commits"):
        before = {n for n in ckpt.log_listings.get(log, {}) if n.isdigit()}
        after = {n for n in ckpt.location.list_dir(log, refresh=True) if n.isdigit()}
        for name in sorted(after - before, key=int):
            signs.append(f"{log}/{name} appeared while stateshift was reading")
        for name in sorted(before - after, key=int):
            signs.append(f"{log}/{name} disappeared while stateshift was reading")
    return signs
