"""The resume journal is saved after the first finished partition, then at most once per
``SAVE_EVERY_S`` seconds, and always once the partitions are done or one of them failed: the
partitions recorded on disk are then every finished one, and a many-partition run does not
rewrite the journal once per partition (time quadratic in the partition count)."""

from __future__ import annotations

import json
from dataclasses import dataclass, field

import pytest

from migrate.commands import journal
from migrate.digest import Digest
from migrate.providers.base import WrittenFile
from migrate.storage import open_location


@dataclass
class Result:
    operator_id: int
    store_name: str
    partition: int
    written: tuple[WrittenFile, ...] = field(default=())
    ok: bool = True


class Clock:
    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now


def _run(tmp_path, monkeypatch, count: int, step_s: float, fail_at: int | None = None):
    clock = Clock()
    monkeypatch.setattr(journal.time, "monotonic", clock)
    dst = open_location(str(tmp_path / "target"), readonly=False)
    saves: list[set[str]] = []
    real_save = journal.save

    def counting_save(location, state):
        real_save(location, state)
        saves.append(set(json.loads(location.read_bytes(journal.JOURNAL))["partitions"]))

    monkeypatch.setattr(journal, "save", counting_save)

    def run(tasks, finished):
        out = []
        for t in tasks:
            if t == fail_at:
                raise RuntimeError(f"partition {t} failed")
            r = Result(0, "default", t, (WrittenFile(f"state/0/{t}/1.delta", 10),))
            clock.now += step_s
            finished(r)
            out.append(r)
        return out

    def go():
        return journal.run_with_journal(
            dst, {"source": "s"}, list(range(count)),
            key_of=lambda t: journal.key(0, "default", t), target_rel=lambda t: f"state/0/{t}",
            reverify=lambda t, d: None, run=run, result_digest=lambda r: Digest(rows=1, lane_a=r.partition, lane_b=0),
            resume=False, overwrite=False, progress=lambda r: None,
        )

    return dst, saves, go


def test_fast_partitions_are_saved_in_few_rewrites_and_all_recorded(tmp_path, monkeypatch) -> None:
    dst, saves, go = _run(tmp_path, monkeypatch, count=300, step_s=0.01)  # 3 s of partitions
    results, state = go()
    assert [r.partition for r in results] == list(range(300))
    # the start, the first partition, one per second of partitions (3), the final one
    assert 3 <= len(saves) <= 7, len(saves)
    assert saves[0] == set() and saves[1] == {"0/default/0"}
    assert saves[-1] == {journal.key(0, "default", t) for t in range(300)}
    on_disk = json.loads(dst.read_bytes(journal.JOURNAL))
    assert on_disk["identity"] == {"source": "s"} and len(on_disk["partitions"]) == 300


def test_slow_partitions_are_each_saved_at_once(tmp_path, monkeypatch) -> None:
    _, saves, go = _run(tmp_path, monkeypatch, count=5, step_s=journal.SAVE_EVERY_S)
    go()
    assert [len(s) for s in saves] == [0, 1, 2, 3, 4, 5]  # no final save needed: nothing unsaved


def test_a_failed_partition_still_leaves_the_finished_ones_recorded(tmp_path, monkeypatch) -> None:
    dst, saves, go = _run(tmp_path, monkeypatch, count=50, step_s=0.01, fail_at=40)
    with pytest.raises(RuntimeError, match="partition 40 failed"):
        go()
    on_disk = json.loads(dst.read_bytes(journal.JOURNAL))
    assert set(on_disk["partitions"]) == {journal.key(0, "default", t) for t in range(40)}
