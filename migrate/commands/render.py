"""Human-readable renderings of command reports (the dry-run plan is a diff)."""

from __future__ import annotations

from typing import Any


def _short(cls: str | None) -> str:
    return cls.rsplit(".", 1)[-1] if cls else "(unset)"


#: a dry run's ``target_action`` (``journal.plan_target``), as the plan's summary says it
_TARGET_ACTIONS = {"create": "create", "replace": "replace (--overwrite)", "resume": "finish (--resume)"}


def target_verdict(action: str | None) -> str:
    return f"a run would {_TARGET_ACTIONS.get(action or '', 'write')} the target"


def render_convert(report: Any) -> str:
    d = report.to_json()
    head = "PLAN (dry run, nothing written)" if d["dry_run"] else "CONVERTED"
    lines = [
        f"{head}: {d['source']}  ->  {d['target']}",
        f"query {d['query_id']}: latest consistent batch {d['batch']}, state version {d['state_version']}",
        f"provider {_short(d['source_provider'])} -> {_short(d['target_provider'])}",
    ]
    if d.get("source_engine"):
        e = d["source_engine"]
        lines.append(f"engine {e['family']} -> {d['target_engine']} (source written by {e['family']}: {e['evidence']}, {e['evidence_file']})")
    fmt = d.get("checkpoint_format") or {}
    if fmt and (fmt.get("source") != 1 or fmt.get("target") != 1):
        lines.append(
            f"state checkpoint format {fmt['source']} -> {fmt['target']}"
            + (" (unique ids in file names and commits)" if fmt["target"] == 2 else " (plain file names, v1 commits)")
        )
    if d["uncommitted_batches"]:
        lines.append(
            f"uncommitted batch(es) {d['uncommitted_batches']}: offsets entries kept (rewritten); the engine re-runs them"
        )
    lines += ["", "--- conf pinned in every offsets entry", "+++ after"]
    if not d["conf_changes"]:
        lines.append("  (no change: target provider equals source provider)")
    for key, change in d["conf_changes"].items():
        lines.append(f"- {key}={change['old']}")
        lines.append(f"+ {key}={change['new']}")
    lines += ["", f"state version {d['state_version']} per operator / store / partition:"]
    lines.append(f"  {'op':>3} {'store':<26} {'part':>4} {'rows':>10} {'source bytes':>13}  {'digest':<32}  status")
    for p in d["partitions"]:
        status = "plan" if d["dry_run"] else ("MISMATCH" if not p.get("verified") else "reused" if p.get("reused") else "verified")
        lines.append(
            f"  {p['operator']:>3} {p['store']:<26.26} {p['partition']:>4} {p['rows']:>10} {p['source_bytes']:>13}  "
            f"{p['source_digest']:<32}  {status}"
        )
        targets = p.get("target_files") or [w["path"] for w in p.get("written", [])]
        for t in targets:
            lines.append(f"+ {t}")
    copies = [f for f in d["files"] if f["action"] == "copy"]
    rewrites = [f for f in d["files"] if f["action"] in ("rewrite", "write") and not f["path"].endswith(".crc")]
    lines += ["", f"checkpoint files: {len(copies)} copied verbatim, {len(rewrites)} rewritten"]
    for f in d["files"]:
        mark = "+" if f["action"] == "copy" else "~"
        lines.append(f"{mark} {f['path']} ({f['action']}, {f['bytes']} B)")
    total_bytes = sum(int(p["source_bytes"]) for p in d["partitions"])
    reused = sum(1 for p in d["partitions"] if p.get("reused"))
    lines.append("")
    if reused:
        lines.append(f"resumed: {reused} store partition(s) reused from the interrupted run (read back, digest matched; "
                     "their source bytes not counted), the rest written now")
    verdict = (
        target_verdict(d.get("target_action"))
        if d["dry_run"] else ("all store partitions read back and verified" if d["verified"] else "NOT verified")
    )
    lines.append(f"summary: {len(d['partitions'])} store partitions, {d['rows']} rows, {total_bytes} source bytes; {verdict}")
    return "\n".join(lines)
