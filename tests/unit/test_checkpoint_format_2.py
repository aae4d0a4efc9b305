"""State checkpoint format 2 (unique ids): reading what 4.3.0 wrote, and refusing inconsistencies.

Fixtures (tests/fixtures/engine_versions/spark-4.3.0, written by generate.py with
``checkpointFormatVersion=2``): ``agg_rocksdb_ckptv2`` (zips ``<v>_<uid>.zip``),
``agg_rocksdb_changelog_ckptv2`` (changelogs only, lineage back to version 1),
``agg_rocksdb_changelog_snap_ckptv2`` (changelogs and a zip per version, lineage truncated after
each snapshot), ``join_rocksdb_ckptv2`` (four stores per partition, four ids per partition).
The oracle for the rows: ``agg_rocksdb`` is the same query over the same input in format 1, so
every format-2 aggregation must hold exactly its rows.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest

from migrate.checkpoint.logs import CommitEntry, format_commit, parse_commit
from migrate.checkpoint.model import load_checkpoint
from migrate.checkpoint.uids import (
    checkpoint_format,
    commit_for_format,
    commits_for_target,
    crc32c_signed,
    derived_uid,
    parse_lineage,
    partition_uid,
    render_checksum_file,
    store_uid,
    target_format,
    verify_checksum_file,
)
from migrate.codecs import codec_for
from migrate.commands.verify import digests
from migrate.errors import CorruptInput, Unsupported
from migrate.providers.base import ReadContext
from migrate.providers.rocksdb_changelog import (
    changelog_lineage,
    parse_changelog,
    render_changelog,
)
from migrate.storage import open_location

V43 = Path(__file__).resolve().parents[1] / "fixtures" / "engine_versions" / "spark-4.3.0"
FORMAT_2 = ["agg_rocksdb_ckptv2", "agg_rocksdb_changelog_ckptv2", "agg_rocksdb_changelog_snap_ckptv2"]


def _ckpt(path: Path):
    return load_checkpoint(open_location(str(path)))


def _copy(tmp_path: Path, case: str) -> Path:
    dst = tmp_path / case
    shutil.copytree(V43 / case / "checkpoint", dst)
    return dst


def _read_rows(ckpt, sp) -> int:
    ctx = ReadContext(conf=ckpt.conf, listing=sp.listing, checkpoint_id=partition_uid(ckpt, sp))
    return sum(b.num_rows for b in ckpt.provider.read(sp.dir, ckpt.state_version, ctx))


def _drop_checksums(path: Path) -> None:
    """Remove both checksum files of ``path`` (visible JSON and Hadoop sidecars) after editing it."""
    for p in (path.parent / f"{path.name}.crc", path.parent / f".{path.name}.crc", path.parent / f".{path.name}.crc.crc"):
        p.unlink(missing_ok=True)


@pytest.mark.parametrize("case", FORMAT_2)
def test_format_2_aggregation_reads_the_same_rows_as_format_1(case: str) -> None:
    ckpt = _ckpt(V43 / case / "checkpoint")
    assert checkpoint_format(ckpt) == 2
    reference = _ckpt(V43 / "agg_rocksdb" / "checkpoint")
    assert checkpoint_format(reference) == 1
    assert digests([ckpt])[0] == digests([reference])[0]
    assert sum(d.rows for d in digests([ckpt])[0].values()) == 4


def test_commit_ids_name_one_store_per_entry_in_operator_metadata_order() -> None:
    ckpt = _ckpt(V43 / "join_rocksdb_ckptv2" / "checkpoint")
    names = [s.name for s in ckpt.operators[0].stores]
    assert names == ["left-keyToNumValues", "left-keyWithIndexToValue", "right-keyToNumValues", "right-keyWithIndexToValue"]
    for sp in ckpt.store_partitions():
        uid = store_uid(ckpt, 0, sp.partition, sp.store_name)
        assert f"{ckpt.state_version}_{uid}.zip" in sp.listing, sp.label  # the engine's file for that id
    assert sum(_read_rows(ckpt, sp) for sp in ckpt.store_partitions()) == 4


def test_plan_follows_the_lineage_and_stops_at_the_newest_zip_of_it(tmp_path: Path) -> None:
    src = _copy(tmp_path, "agg_rocksdb_changelog_snap_ckptv2")
    ckpt = _ckpt(src)
    sp = ckpt.store_partitions()[0]
    uid = partition_uid(ckpt, sp)
    # the engine wrote a zip for every version here; hide the newest so the lineage must be used
    (src / sp.dir.rel / f"4_{uid}.zip").rename(tmp_path / "hidden.zip")
    _drop_checksums(src / sp.dir.rel / f"4_{uid}.zip")
    ckpt = _ckpt(src)
    sp = ckpt.store_partitions()[0]
    ctx = ReadContext(conf=ckpt.conf, listing=sp.listing, checkpoint_id=uid)
    data = codec_for("lz4", "").decompress((src / sp.dir.rel / f"4_{uid}.changelog").read_bytes(), "")
    (v3, u3), = changelog_lineage(data, "4")  # observed: the lineage restarts after a snapshot
    assert v3 == 3
    assert ckpt.provider.plan(sp.dir, 4, sp.listing, ctx) == (f"3_{u3}.zip", [f"4_{uid}.changelog"])
    assert digests([ckpt])[0] == digests([_ckpt(V43 / "agg_rocksdb" / "checkpoint")])[0]


def test_files_of_other_attempts_are_ignored_and_the_commit_decides(tmp_path: Path) -> None:
    src = _copy(tmp_path, "agg_rocksdb_ckptv2")
    ckpt = _ckpt(src)
    sp = ckpt.store_partitions()[0]
    part = src / sp.dir.rel
    decoy = "0bad0bad-1111-4222-8333-444455556666"
    old = next(p for p in part.glob("1_*.zip"))  # version 1 holds fewer keys than version 4
    shutil.copy(old, part / f"4_{decoy}.zip")
    before = digests([_ckpt(src)])[0]
    assert before == digests([ckpt])[0]  # the extra version-4 zip of another attempt changes nothing
    commit = src / "commits" / str(ckpt.latest_batch)
    entry = parse_commit(commit.read_text(), ckpt.latest_batch, "c")
    ids = json.loads(json.dumps(entry.metadata["stateUniqueIds"]))
    ids["0"][0][0] = decoy
    commit.write_text(format_commit(CommitEntry(entry.batch_id, 2, {**entry.metadata, "stateUniqueIds": ids})))
    (commit.parent / f".{commit.name}.crc").unlink()
    after = digests([_ckpt(src)])[0]
    assert after[(0, "default", 0)] != before[(0, "default", 0)]  # now the decoy is read: the id decides
    assert after[(0, "default", 1)] == before[(0, "default", 1)]


def test_an_id_without_a_file_is_refused_naming_the_file(tmp_path: Path) -> None:
    src = _copy(tmp_path, "agg_rocksdb_ckptv2")
    ckpt = _ckpt(src)
    sp = ckpt.store_partitions()[1]
    uid = partition_uid(ckpt, sp)
    (src / sp.dir.rel / f"4_{uid}.zip").unlink()
    ckpt = _ckpt(src)
    with pytest.raises(CorruptInput, match=rf"state/0/1/4_{uid}.changelog: the commit log names unique id {uid}"):
        _read_rows(ckpt, ckpt.store_partitions()[1])


def test_a_commit_without_ids_for_a_store_is_refused() -> None:
    ckpt = _ckpt(V43 / "agg_rocksdb_ckptv2" / "checkpoint")
    with pytest.raises(CorruptInput, match="commits/3: .*none for store 'left'"):
        store_uid(ckpt, 0, 0, "left")
    with pytest.raises(CorruptInput, match="not for partition 5"):
        store_uid(ckpt, 0, 5, "default")


def _rewrite_changelog(path: Path, lineage: list[tuple[int, str]]) -> None:
    codec = codec_for("lz4", str(path))
    fmt, records = parse_changelog(codec.decompress(path.read_bytes(), str(path)), str(path))
    assert fmt == 1
    path.write_bytes(codec.compress(render_changelog(records, 3, lineage)))
    _drop_checksums(path)


def _chain(src: Path, part: str) -> dict[int, Path]:
    return {int(p.name.split("_")[0]): p for p in (src / part).glob("*.changelog")}


_STRANGER = "feedface-0000-4000-8000-000000000000"  # an id no file of the fixture has


@pytest.mark.parametrize(
    "version,lineage,problem",
    [
        # a lineage naming a changelog that does not exist
        (4, lambda ids: [(1, ids[1]), (2, _STRANGER), (3, ids[3])],
         rf"2_{_STRANGER}.changelog, named by the lineage of 4_"),
        # a lineage that skips a version
        (4, lambda ids: [(1, ids[1]), (3, ids[3])],
         r"4_.*\.changelog: cannot rebuild version 4: its lineage skips version 2"),
        # lineages inside one chain that disagree
        (3, lambda ids: [(1, ids[1]), (2, _STRANGER)],
         r"3_.*\.changelog: lineage names 2_feedface.* the chain being rebuilt has 2_"),
    ],
    ids=["names-a-missing-changelog", "skips-a-version", "disagrees-inside-the-chain"],
)
def test_bad_lineage_is_refused_naming_the_changelog(tmp_path: Path, version: int, lineage, problem: str) -> None:
    src = _copy(tmp_path, "agg_rocksdb_changelog_ckptv2")
    chain = _chain(src, "state/0/0")
    ids = {v: p.name.split("_")[1].split(".")[0] for v, p in chain.items()}
    _rewrite_changelog(chain[version], lineage(ids))
    ckpt = _ckpt(src)
    with pytest.raises(CorruptInput, match=problem):
        _read_rows(ckpt, ckpt.store_partitions()[0])


def test_lineage_starting_after_version_1_without_a_zip_is_refused(tmp_path: Path) -> None:
    src = _copy(tmp_path, "agg_rocksdb_changelog_snap_ckptv2")
    ckpt = _ckpt(src)
    sp = ckpt.store_partitions()[0]
    part = src / sp.dir.rel
    for z in part.glob("*.zip"):  # no snapshot left: version 4's lineage [3] cannot be rebuilt
        z.unlink()
        _drop_checksums(z)
    ckpt = _ckpt(src)
    with pytest.raises(CorruptInput, match="its lineage starts at version 3 and no zip of the lineage exists"):
        _read_rows(ckpt, ckpt.store_partitions()[0])


def test_checksum_json_is_verified(tmp_path: Path) -> None:
    src = _copy(tmp_path, "agg_rocksdb_ckptv2")
    ckpt = _ckpt(src)
    sp = ckpt.store_partitions()[0]
    uid = partition_uid(ckpt, sp)
    crc = src / sp.dir.rel / f"4_{uid}.zip.crc"
    meta = json.loads(crc.read_text())
    assert meta["algorithm"] == "CRC32C"
    meta["value"] = meta["value"] ^ 1
    crc.write_text(json.dumps(meta))
    (crc.parent / f".{crc.name}.crc").unlink()
    ckpt = _ckpt(src)
    with pytest.raises(CorruptInput, match=rf"4_{uid}.zip: CRC32C mismatch"):
        _read_rows(ckpt, ckpt.store_partitions()[0])
    meta["value"] ^= 1
    meta["mainFileSize"] += 1
    crc.write_text(json.dumps(meta))
    with pytest.raises(CorruptInput, match="its .crc checksum file records"):
        _read_rows(ckpt, ckpt.store_partitions()[0])


def test_crc32c_matches_the_engine_and_the_published_check_value() -> None:
    # CRC-32C check value of b"123456789" is 0xE3069283 (RFC 3720 appendix B.4 and the usual CRC
    # catalogues; common practice), as the signed int the engine's JSON would hold
    assert crc32c_signed(b"123456789") == 0xE3069283 - (1 << 32)
    for case in FORMAT_2 + ["join_rocksdb_ckptv2"]:
        for crc in (V43 / case / "checkpoint" / "state").rglob("*.crc"):
            if crc.name.startswith("."):
                continue
            main = crc.with_name(crc.name[: -len(".crc")])
            verify_checksum_file(main.read_bytes(), crc.read_bytes(), str(main))  # raises on mismatch
            ours = json.loads(render_checksum_file(main.read_bytes(), 0))
            theirs = json.loads(crc.read_text())
            assert (ours["algorithm"], ours["value"], ours["mainFileSize"]) == (
                theirs["algorithm"], theirs["value"], theirs["mainFileSize"]
            )
            assert list(ours) == list(theirs)  # same keys in the same order


def test_v3_changelog_renders_byte_for_byte_like_the_engine() -> None:
    for path in sorted((V43 / "agg_rocksdb_changelog_ckptv2" / "checkpoint" / "state" / "0").rglob("*.changelog")):
        data = codec_for("lz4", "").decompress(path.read_bytes(), "")
        lineage = changelog_lineage(data, str(path))
        _, records = parse_changelog(data, str(path))
        assert render_changelog(records, 3, lineage) == data, path.name
        assert [v for v, _ in lineage] == list(range(1, int(path.name.split("_")[0])))


def test_commits_for_each_target_format() -> None:
    ckpt = _ckpt(V43 / "join_rocksdb_ckptv2" / "checkpoint")
    stripped = commits_for_target(ckpt.commits, ckpt.latest_batch, 1, None)
    assert sorted(stripped) == [f"commits/{b}" for b in sorted(ckpt.commits)]
    for rel, data in stripped.items():
        text = data.decode()
        assert text.startswith("v1\n") and "stateUniqueIds" not in text
        assert json.loads(text.split("\n")[1]) == {"nextBatchWatermarkMs": ckpt.commits[int(rel.split("/")[1])].metadata["nextBatchWatermarkMs"]}
    new = {0: [["a", "b", "c", "d"], ["e", "f", "g", "h"]]}
    kept = commits_for_target(ckpt.commits, ckpt.latest_batch, 2, new)
    assert list(kept) == [f"commits/{ckpt.latest_batch}"]
    entry = parse_commit(kept[f"commits/{ckpt.latest_batch}"].decode(), ckpt.latest_batch, "c")
    assert entry.log_version == 2 and entry.metadata["stateUniqueIds"] == {"0": new[0]}
    assert list(entry.metadata) == list(ckpt.commits[ckpt.latest_batch].metadata)  # key order kept
    assert commit_for_format(ckpt.commits[0], 1).metadata == {"nextBatchWatermarkMs": ckpt.commits[0].metadata["nextBatchWatermarkMs"]}


def test_derived_ids_are_stable_and_distinct() -> None:
    a = derived_uid("seed", 0, 0, "default")
    assert a == derived_uid("seed", 0, 0, "default")
    assert len({a, derived_uid("seed", 0, 1, "default"), derived_uid("seed", 0, 0, "left"), derived_uid("other", 0, 0, "default")}) == 4


def test_target_format_per_provider() -> None:
    assert target_format(2, "hdfs") == 1 and target_format(2, "rocksdb") == 2
    assert target_format(1, "rocksdb") == 1 and target_format(1, "rocksdb", 2) == 2 and target_format(2, "rocksdb", 1) == 1
    with pytest.raises(Unsupported, match="heap-map provider supports only state checkpoint format 1"):
        target_format(1, "hdfs", 2)
    with pytest.raises(Unsupported, match="format 3"):
        target_format(1, "rocksdb", 3)


@pytest.mark.parametrize(
    "header, message",
    [
        (b"\x00\x02v3\x00\x05[]", "lineage of 5 bytes runs past the end"),
        (b"\x00\x02v3\x00\x02{}" + b"\xff\xff\xff\xff", "lineage is not a JSON list"),
        (b"\x00\x02v3\x00\x03[1]" + b"\xff\xff\xff\xff", "is not {version, checkpointUniqueId}"),
        (b'\x00\x02v3\x00\x04[x]]' + b"\xff\xff\xff\xff", "lineage is not valid JSON"),
    ],
)
def test_bad_lineage_headers_are_refused(header: bytes, message: str) -> None:
    with pytest.raises(CorruptInput, match=message):
        changelog_lineage(header, "f")


def test_lineage_must_ascend() -> None:
    text = '[{"version":2,"checkpointUniqueId":"b"},{"version":1,"checkpointUniqueId":"a"}]'
    with pytest.raises(CorruptInput, match="not in ascending version order"):
        parse_lineage(text, "f")
