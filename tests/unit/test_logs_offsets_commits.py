"""Offsets and commits log entries: parsing, rewriting, and byte-exact formatting."""

import pytest

from migrate.checkpoint.logs import (
    PROVIDER_CONF,
    format_commit,
    format_offsets,
    log_batch_ids,
    parse_commit,
    parse_offsets,
    parse_query_metadata,
    with_conf,
)
from migrate.errors import CorruptInput

# Observed from a Spark 4.3.0 checkpoint (shortened conf); the file has no trailing newline.
OFFSETS = (
    'v1\n{"batchWatermarkMs":5000,"batchTimestampMs":1796190911017,"conf":{'
    '"spark.sql.streaming.stateStore.providerClass":"org.apache.spark.sql.execution.streaming.state.HDFSBackedStateStoreProvider",'
    '"spark.sql.shuffle.partitions":"2","spark.sql.streaming.stateStore.compression.codec":"lz4"}}\n'
    '{"logOffset":2}\n-'
)


def test_offsets_round_trip_is_byte_exact():
    entry = parse_offsets(OFFSETS, 2, "offsets/2")
    assert entry.log_version == 1
    assert entry.watermark_ms == 5000
    assert entry.conf["spark.sql.shuffle.partitions"] == "2"
    assert entry.source_lines == ('{"logOffset":2}', "-")
    assert format_offsets(entry) == OFFSETS


def test_rewriting_the_provider_changes_only_that_value_and_keeps_key_order():
    entry = parse_offsets(OFFSETS, 2, "offsets/2")
    new = with_conf(entry, {PROVIDER_CONF: "org.example.OtherProvider"})
    text = format_offsets(new)
    assert text == OFFSETS.replace(
        "org.apache.spark.sql.execution.streaming.state.HDFSBackedStateStoreProvider", "org.example.OtherProvider"
    )
    assert entry.conf[PROVIDER_CONF].endswith("HDFSBackedStateStoreProvider")  # original untouched


@pytest.mark.parametrize(
    "text, problem",
    [
        ("", "truncated"),
        ("v1", "truncated"),
        ("x1\n{}", "log version"),
        ('v1\n{"batchWatermarkMs":0', "not valid JSON"),
        ("v1\n[1,2]", "not a JSON object"),
        ('v1\n{"conf":[1]}', "'conf' is not a JSON object"),
        ('v1\n{}\n{"logOffset":', "source offset (line 3)"),
    ],
)
def test_malformed_offsets_are_refused_with_the_file_name(text, problem):
    with pytest.raises(CorruptInput) as err:
        parse_offsets(text, 7, "/ckpt/offsets/7")
    assert problem in str(err.value)
    assert str(err.value).startswith("/ckpt/offsets/7: ")
    assert "\n" not in str(err.value)


def test_commit_round_trip_and_errors():
    text = 'v1\n{"nextBatchWatermarkMs":1200}'
    entry = parse_commit(text, 3, "commits/3")
    assert entry.metadata == {"nextBatchWatermarkMs": 1200}
    assert format_commit(entry) == text
    with pytest.raises(CorruptInput, match="commits/4: commit metadata"):
        parse_commit("v1\n{nope}", 4, "commits/4")


def test_query_metadata_and_batch_listing():
    assert parse_query_metadata('{"id":"0c7e-aa"}', "metadata")["id"] == "0c7e-aa"
    with pytest.raises(CorruptInput, match="no string 'id'"):
        parse_query_metadata('{"name":1}', "metadata")
    with pytest.raises(CorruptInput):
        parse_query_metadata("stateshift: incomplete", "metadata")
    assert log_batch_ids(["0", ".0.crc", "10", "2", "tmp", ".1.tmp"]) == [0, 2, 10]
