"""The manifest round-trips through its JSON form, and any edit to it is refused by its own seal."""

from __future__ import annotations

import hashlib
import json

import pytest

from migrate.archive.manifest import (
    SEAL_KEY,
    ArchivedFile,
    Column,
    DataFile,
    Manifest,
    OperatorEntry,
    StoreEntry,
    manifest_text,
    parse_manifest,
    seal,
)
from migrate.digest import Digest
from migrate.errors import CorruptInput, Unsupported

WHERE = "/arch/manifest.json"


def sample() -> Manifest:
    cols = (Column("key", "bay", "string", "key_bay", True), Column("value", "sum", "long", "value_sum", True))
    store = StoreEntry("default", 0, "checkpoint/state/0/0/_metadata/schema", {"type": "struct", "fields": []}, None, cols, True, None)
    return Manifest(
        tool_version="0.1.0",
        created_utc="2031-04-02T06:00:00Z",
        source="s3://***@bucket/ckpt",
        query_id="0d9a4d8e-3f52-4b8e-9b1a-000000000001",
        batch_id=2,
        state_version=3,
        provider_class="org.example.Provider",
        codec="lz4",
        partitions=2,
        offsets=({"batch": 2, "log_version": 1, "metadata": {"conf": {}}, "sources": ['{"logOffset":2}']},),
        commits=({"batch": 2, "log_version": 1, "metadata": {"nextBatchWatermarkMs": 0}},),
        uncommitted=(),
        operators=(OperatorEntry(0, "stateStoreSave", {"operatorInfo": {}}, (store,)),),
        checkpoint_files=(ArchivedFile("checkpoint/metadata", 45, "a" * 64),),
        data_files=(
            DataFile("state/operator=0/store=default/partition=0/part-0.parquet", 0, "default", 0, 4, 900, "b" * 64,
                     Digest(4, 0x0123456789ABCDEF, 0xFEDCBA9876543210), 40, 80, 0),
        ),
        notes=("a note",),
    )


def test_round_trip_keeps_every_member():
    m = sample()
    back = parse_manifest(manifest_text(m), WHERE)
    assert back == m
    assert back.body() == m.body()
    assert back.data_files[0].digest == Digest(4, 0x0123456789ABCDEF, 0xFEDCBA9876543210)


def test_manifest_is_indented_human_readable_json():
    text = manifest_text(sample())
    assert text.startswith("{\n  \"format\": \"stateshift-state-archive\"")
    assert json.loads(text)["rows"] == 4


def test_seal_is_sha256_of_the_canonical_body():
    body = json.loads(manifest_text(sample()))
    stored = body.pop(SEAL_KEY)
    # reference: hashlib over sorted-key compact JSON, computed here without the module's helper
    canonical = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode()
    assert stored == hashlib.sha256(canonical).hexdigest()
    assert seal(body) == stored


@pytest.mark.parametrize(
    "edit",
    [
        lambda b: b["data_files"][0].__setitem__("rows", 5),
        lambda b: b["data_files"][0].__setitem__("sha256", "c" * 64),
        lambda b: b["checkpoint_files"][0].__setitem__("bytes", 44),
        lambda b: b.__setitem__("query_id", "someone-else"),
        lambda b: b["checkpoint_files"].pop(),
        lambda b: b["offsets"][0]["metadata"].__setitem__("conf", {"x": "y"}),
    ],
    ids=["rows", "sha256", "bytes", "query_id", "dropped-file", "offsets-conf"],
)
def test_any_edit_breaks_the_seal(edit):
    body = json.loads(manifest_text(sample()))
    edit(body)
    with pytest.raises(CorruptInput, match="manifest was edited or damaged") as info:
        parse_manifest(json.dumps(body, indent=2), WHERE)
    assert WHERE in str(info.value) and "\n" not in str(info.value)


def test_whitespace_only_reformatting_is_not_an_edit():
    body = json.loads(manifest_text(sample()))
    assert parse_manifest(json.dumps(body), WHERE) == sample()


def _resealed(body: dict) -> str:
    body = {k: v for k, v in body.items() if k != SEAL_KEY}
    body[SEAL_KEY] = seal(body)
    return json.dumps(body)


def test_truncated_manifest_is_refused_in_one_line():
    text = manifest_text(sample())
    with pytest.raises(CorruptInput, match="not valid JSON") as info:
        parse_manifest(text[: len(text) // 2], WHERE)
    assert "\n" not in str(info.value)


def test_other_json_is_not_a_manifest():
    with pytest.raises(CorruptInput, match="not a stateshift archive manifest"):
        parse_manifest('{"format": "something-else"}', WHERE)


def test_newer_format_version_is_unsupported():
    body = json.loads(manifest_text(sample()))
    body["format_version"] = 99
    with pytest.raises(Unsupported, match="format version 99"):
        parse_manifest(_resealed(body), WHERE)


@pytest.mark.parametrize("path", ["../outside.parquet", "/abs/file", "state/../../x", "state//x", "other/x.parquet"])
def test_unsafe_or_foreign_data_paths_are_refused_even_when_sealed(path):
    body = json.loads(manifest_text(sample()))
    body["data_files"][0]["path"] = path
    with pytest.raises(CorruptInput, match="path"):
        parse_manifest(_resealed(body), WHERE)


def test_rows_must_agree_with_the_digest_row_count():
    body = json.loads(manifest_text(sample()))
    body["data_files"][0]["rows"] = 7
    with pytest.raises(CorruptInput, match="7 rows but its state digest counts 4"):
        parse_manifest(_resealed(body), WHERE)


def test_wrong_member_type_names_the_member():
    body = json.loads(manifest_text(sample()))
    body["batch_id"] = "2"
    with pytest.raises(CorruptInput, match="'batch_id' has the wrong type"):
        parse_manifest(_resealed(body), WHERE)
