"""``stateshift verify A B``: compare two checkpoints' state digests at their latest consistent versions.

Identical means: the same set of (operator, store, partition) and, for each, the same row count
and digest of the canonical key and value bytes, whatever provider layout each one uses.
"""

from __future__ import annotations

import argparse
from collections.abc import Callable
from typing import Any

from ..checkpoint.model import Checkpoint, load_checkpoint
from ..digest import Digest
from ..storage import Location
from .common import DigestResult, add_jobs_argument, checked_jobs, digest_partitions, digest_task

Key = tuple[int, str, int]


def digests(
    ckpts: list[Checkpoint], jobs: int = 1, progress: Callable[[DigestResult], None] = lambda r: None,
    on_plan: Callable[[int], None] = lambda n: None,
) -> list[dict[Key, Digest]]:
    """Each checkpoint's digests per (operator, store, partition); the store partitions of all of
    them read ``jobs`` at a time (``on_plan`` hears how many there are first)."""
    keyed = [(i, (sp.operator_id, sp.store_name, sp.partition), digest_task(c, sp))
             for i, c in enumerate(ckpts) for sp in c.store_partitions()]
    on_plan(len(keyed))
    done = digest_partitions([t for _, _, t in keyed], jobs, progress)
    out: list[dict[Key, Digest]] = [{} for _ in ckpts]
    for (i, key, _), result in zip(keyed, done):
        out[i][key] = result.digest
    return out


def verify(
    a: Location, b: Location, progress: Callable[[DigestResult], None] = lambda r: None, jobs: int = 1,
    on_plan: Callable[[int], None] = lambda n: None,
) -> dict[str, Any]:
    ca, cb = load_checkpoint(a), load_checkpoint(b)
    da, db = digests([ca, cb], jobs, progress, on_plan)
    differences = []
    for key in sorted(set(da) | set(db)):
        left, right = da.get(key), db.get(key)
        if left != right:
            differences.append(
                {
                    "operator": key[0],
                    "store": key[1],
                    "partition": key[2],
                    "a": left.to_json() if left else None,
                    "b": right.to_json() if right else None,
                }
            )
    return {
        "command": "verify",
        "a": {"checkpoint": a.display, "provider": ca.provider_class, "batch": ca.latest_batch, "state_version": ca.state_version},
        "b": {"checkpoint": b.display, "provider": cb.provider_class, "batch": cb.latest_batch, "state_version": cb.state_version},
        "same_batch": ca.latest_batch == cb.latest_batch,
        "partitions_compared": len(set(da) | set(db)),
        "rows": {"a": sum(d.rows for d in da.values()), "b": sum(d.rows for d in db.values())},
        "identical": not differences and ca.latest_batch == cb.latest_batch,
        "differences": differences,
    }


def render(result: dict[str, Any]) -> str:
    a, b = result["a"], result["b"]
    lines = [
        f"A  {a['checkpoint']}  ({a['provider'].rsplit('.', 1)[-1]}, batch {a['batch']}, state version {a['state_version']})",
        f"B  {b['checkpoint']}  ({b['provider'].rsplit('.', 1)[-1]}, batch {b['batch']}, state version {b['state_version']})",
        f"compared {result['partitions_compared']} store partitions; rows A={result['rows']['a']} B={result['rows']['b']}",
    ]
    if not result["same_batch"]:
        lines.append(f"DIFFERENT latest consistent batch: A={a['batch']} B={b['batch']}")
    for d in result["differences"]:
        left = f"{d['a']['rows']} rows {d['a']['hash']}" if d["a"] else "absent"
        right = f"{d['b']['rows']} rows {d['b']['hash']}" if d["b"] else "absent"
        lines.append(f"DIFFERS  operator {d['operator']} store {d['store']} partition {d['partition']}: A {left} | B {right}")
    lines.append("IDENTICAL" if result["identical"] else f"NOT IDENTICAL ({len(result['differences'])} partition(s) differ)")
    return "\n".join(lines)


def add_parser(sub: Any, common: argparse.ArgumentParser) -> None:
    v = sub.add_parser("verify", parents=[common], help="compare the state of two checkpoints")
    v.add_argument("a", metavar="A")
    v.add_argument("b", metavar="B")
    add_jobs_argument(v)
    v.set_defaults(run=run)


def run(args: argparse.Namespace, ctx: Any) -> int:
    from ..errors import VerificationFailed

    result = verify(ctx.open(args.a), ctx.open(args.b), progress=ctx.progress.step, jobs=checked_jobs(args.jobs),
                    on_plan=ctx.progress.start)
    ctx.progress.close()
    ctx.emit(result, render(result))
    return 0 if result["identical"] else VerificationFailed.exit_code
