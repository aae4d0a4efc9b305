"""A store whose older versions were written with another codec reads as one history.

Every case is built from engine-written files only (tests/fixtures/codecs: the same query on the
same input run once per codec, so version v of partition p holds the same records whatever the
codec). A mixed chain takes version 1 from one codec's run and version 2 from another's; it must
rebuild to exactly the rows the single-codec chain gives, whatever codec the conf names today.
"""

from __future__ import annotations

import itertools
import json
import shutil
from pathlib import Path

import pyarrow as pa
import pytest

from migrate.codecs import CODEC_NAMES, codec_for, codec_of_stream
from migrate.codecs.hadoop_crc import crc_name
from migrate.errors import CorruptInput
from migrate.providers.base import ReadContext, StoreDir
from migrate.providers.hdfs import HDFSProvider
from migrate.storage import open_location

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures" / "codecs"
CODEC_CONF = "spark.sql.streaming.stateStore.compression.codec"


def _store(tmp_path: Path, picks: dict[int, str], partition: int = 0) -> StoreDir:
    """A store dir holding ``<v>.delta`` from the codec picked for each version (+ sidecars)."""
    root = tmp_path / "ckpt"
    store = root / "state" / "0" / str(partition)
    store.mkdir(parents=True, exist_ok=True)
    for version, codec in picks.items():
        src = FIXTURES / codec / "small" / str(partition)
        for name in (f"{version}.delta", crc_name(f"{version}.delta")):
            shutil.copyfile(src / name, store / name)
    return StoreDir(open_location(str(root)), f"state/0/{partition}", 0, partition)


def _rows(store: StoreDir, version: int, conf_codec: str) -> list[tuple[bytes, bytes]]:
    ctx = ReadContext(conf={CODEC_CONF: conf_codec})
    table = pa.Table.from_batches(list(HDFSProvider().read(store, version, ctx)))
    return sorted(zip(table.column("key").to_pylist(), table.column("value").to_pylist()))


def test_the_fixture_run_has_two_versions_per_partition() -> None:
    manifest = json.loads((FIXTURES / "manifest.json").read_text())
    assert manifest["cases"]["small"]["versions"] == 2


@pytest.mark.parametrize("partition", [0, 1])
@pytest.mark.parametrize("old,new", list(itertools.permutations(CODEC_NAMES, 2)))
def test_mixed_chain_rebuilds_like_a_single_codec_chain(tmp_path: Path, old: str, new: str, partition: int) -> None:
    expected = _rows(_store(tmp_path / "plain", {1: new, 2: new}, partition), 2, new)
    assert expected  # the fixture partitions are not empty
    mixed = _store(tmp_path / "mixed", {1: old, 2: new}, partition)
    # whatever the conf names now (the new codec, or even a third one), each file is read with
    # the codec that wrote it
    for conf in CODEC_NAMES:
        assert _rows(mixed, 2, conf) == expected


@pytest.mark.parametrize("codec", CODEC_NAMES)
def test_engine_streams_are_recognised_by_their_first_bytes(codec: str) -> None:
    for path in sorted((FIXTURES / codec).rglob("*.delta")):
        for conf in CODEC_NAMES:
            assert codec_of_stream(path.read_bytes(), conf) is codec_for(codec)


def test_our_own_streams_are_recognised_too() -> None:
    raw = b"\x00\x00\x00\x04abcd\x00\x00\x00\x01z\xff\xff\xff\xff"
    for codec in CODEC_NAMES:
        stream = codec_for(codec).compress(raw)
        assert codec_of_stream(stream, "lz4") is codec_for(codec)


def test_unknown_leading_bytes_are_left_to_the_conf_codec_which_names_the_file() -> None:
    with pytest.raises(CorruptInput) as err:
        codec_of_stream(b"not a stream at all", "lz4", "state/0/0/7.delta").decompress(b"not a stream at all", "state/0/0/7.delta")
    assert "state/0/0/7.delta" in str(err.value)
