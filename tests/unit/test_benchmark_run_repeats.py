"""``benchmarks.run.run_case`` with ``repeat``: every tool run is followed by its own floor run,
every run's rows and digests are checked, and the run of median wall clock of each is the one
reported (the tool and the floor each on their own), with every run's wall clock kept."""

from __future__ import annotations

import json

import pytest

from benchmarks import measure, run
from benchmarks.generate import Params

INFO = {"rows": 10, "largest_partition_raw_bytes": 100,
        "partitions": [{"partition": 0, "digest": "aa"}, {"partition": 1, "digest": "bb"}]}


def _m(wall: float, stdout: str = "") -> measure.Measured:
    return measure.Measured(("x",), 0, wall, wall, 100.0, 200.0, 150.0, 0.0, 150.0, 1.0, 1.0, stdout, "")


def _report(digests=("aa", "bb"), command="convert") -> str:
    """A ``--json`` report of the command, with its per-partition digests where it puts them."""
    if command == "export":
        files = [{"partition": i, "state_digest": {"rows": 5, "hash": d}} for i, d in enumerate(digests)]
        return json.dumps({"command": "export", "rows": 10, "data_files": files})
    field = "target_digest" if command == "import" else "source_digest"
    return json.dumps({"command": command, "rows": 10, "partitions": [{"partition": i, field: d} for i, d in enumerate(digests)]})


@pytest.fixture
def staged(monkeypatch, tmp_path):
    calls: list[str] = []
    tool_walls = iter([5.0, 3.0, 4.0])
    floor_walls = iter([1.0, 2.0, 0.5])
    reports = iter([_report(command="export")] * 3)
    monkeypatch.setattr(run, "ensure_checkpoint", lambda p, jobs: (tmp_path / "src", INFO))
    monkeypatch.setattr(run, "source_files", lambda src: {0: [("f", 1)]})
    monkeypatch.setattr(run, "written_sizes", lambda target: {0: [1]})

    def tool(args, jobs, tool_path, tool_python=None):
        calls.append("tool")
        (tmp_path / "export").mkdir(exist_ok=True)  # the target, which run_case keeps for the import case
        return _m(next(tool_walls), next(reports))

    def floor(sources, written, jobs, scratch):
        calls.append("floor")
        return _m(next(floor_walls))

    monkeypatch.setattr(run, "_tool", tool)
    monkeypatch.setattr(run, "run_floor", floor)
    monkeypatch.setattr(run, "run_codec_steps", lambda kind, root, jobs, scratch: (
        calls.append("steps"), {"kind": kind, "write_cpu_s": 1.0, "read_cpu_s": 0.0, "files": 1, "units": 10})[1])
    return calls, tmp_path


def test_tool_and_floor_alternate_and_each_median_counts(staged):
    calls, tmp_path = staged
    p = Params(10, 2, "narrow", "hdfs", 1, 1)
    r = run.run_case("export", p, 2, tmp_path, True, repeat=3)
    assert calls == ["tool", "floor"] * 3 + ["steps"]  # the library steps once, on the last target
    assert r.tool.wall_s == 4.0 and r.floor.wall_s == 1.0  # medians of 5/3/4 and 1/2/0.5
    assert r.tool_walls == [5.0, 3.0, 4.0] and r.floor_walls == [1.0, 2.0, 0.5]
    assert r.ratio == 4.0
    assert "tool 5.00 / 3.00 / 4.00, floor 1.00 / 2.00 / 0.50" in "\n".join(
        line for line in _details(r))


def _details(r):
    path = run.write_results([r], 2, ["--keys", "10"], name="test-run-repeats", environment="test")
    try:
        return path.read_text().splitlines()
    finally:
        path.unlink()
        path.with_suffix(".jsonl").unlink()


def test_a_wrong_digest_in_any_run_stops_the_case(staged, monkeypatch):
    calls, tmp_path = staged
    reports = iter([_report(command="export"), _report(("aa", "zz"), command="export")])
    walls = iter([1.0, 1.0])
    monkeypatch.setattr(run, "_tool", lambda *a, **k: (calls.append("tool"), _m(next(walls), next(reports)))[1])
    with pytest.raises(SystemExit, match="partition 1 digest zz"):
        run.run_case("export", Params(10, 2, "narrow", "hdfs", 1, 1), 2, tmp_path, True, repeat=3)
    assert calls == ["tool", "floor", "tool"]


def test_median_of_an_even_count_is_the_lower_middle():
    assert run.median_run([_m(4.0), _m(1.0), _m(3.0), _m(2.0)]).wall_s == 2.0


def test_repeat_below_one_is_refused(capsys):
    with pytest.raises(SystemExit):
        run.main(["--repeat", "0", "--cases", "export"])
    assert "--repeat must be at least 1" in capsys.readouterr().err


@pytest.mark.parametrize("command", ["convert", "export", "import"])
def test_every_commands_digests_are_held_to_the_generators(staged, monkeypatch, command):
    """Each command reports its digests in its own field; a wrong one, or a missing partition,
    stops the case (the check once read only a convert's field and passed the others unread)."""
    calls, tmp_path = staged
    archive = tmp_path / "archive-for-import-narrow-10-p2-hdfs"
    (archive / "manifest.json").parent.mkdir(parents=True)
    (archive / "manifest.json").write_text("{}")
    monkeypatch.setattr(run, "archive_files", lambda a: {0: [("f", 1)]})
    case = {"convert": "convert-h2r", "export": "export", "import": "import"}[command]
    p = Params(10, 2, "narrow", "hdfs", 1, 1)
    monkeypatch.setattr(run, "run_rocksdb_steps", lambda *a: {"scan_cpu_s": 0.0})
    for digests, message in ((("aa", "zz"), "partition 1 digest zz"), (("aa",), "partition 1 digest None")):
        monkeypatch.setattr(run, "_tool", lambda *a, d=digests, **k: _m(1.0, _report(d, command)))
        with pytest.raises(SystemExit, match=message):
            run.run_case(case, p, 2, tmp_path, False, repeat=1)
    monkeypatch.setattr(run, "_tool", lambda *a, **k: _m(1.0, _report(command=command)))
    assert run.run_case(case, p, 2, tmp_path, False, repeat=1).rows == 10


def test_the_import_case_reads_the_archive_of_its_own_partition_count(tmp_path):
    names = {run._archive_for_import(tmp_path, Params(10, n, "narrow", "hdfs", 1, 1)) for n in (16, 64, 256)}
    assert len(names) == 3
