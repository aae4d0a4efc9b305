"""The benchmark command: run the tool on large generated checkpoints and compare with the floor.

    python -m benchmarks.run --keys 1000000                  # 1M keys, 64 partitions, narrow rows
    python -m benchmarks.run --keys 10000000 --cases convert-h2r,export
    python -m benchmarks.run --keys 1000000 --partitions 16,256 --cases convert-h2r   # memory
    python -m benchmarks.run --keys 1000000 --engine         # also time the engine's own load

Cases (each runs ``python -m migrate ...`` as a child process, ``--jobs`` as given, default cores;
the tool's bytecode is compiled first, as an installed package has it):

* ``convert-h2r``: heap-map checkpoint -> RocksDB;   ``convert-r2h``: RocksDB -> heap map;
* ``export``: heap-map checkpoint -> Parquet archive; ``import``: that archive -> RocksDB.

Each case runs ``--repeat`` times (default 3), each tool run followed by its floor run, and the
run of median wall clock of each counts (the floor, mostly creating, writing and syncing files,
moves with the machine as much as the tool). Per case: keys/s and MB/s of source state files
(wall clock), CPU seconds, peak RSS (largest single process, and the whole process tree), and the
same-run **floor** (``floor.py``: read and
decompress the same source files, write as many bytes into as many files, no decoding) with the
ratio tool/floor; the CPU seconds of the libraries' own steps for the same rows: RocksDB's
(``rocksdb_steps.py``: the scan every case that touches RocksDB makes, and for a RocksDB target the
write) and the file codecs' (``codec_steps.py``: a heap-map target's LZ4 compression and its
read-back, an archive's Parquet encoding), and the least tool/floor wall ratio they leave
possible. With ``--engine``, the engine's own load of the heap-map state (``engine_load.py``) and
the ratio convert/engine. Missing checkpoints are generated first
(``generate.py``; kept in ``benchmarks/data/``, out of git). Results go to
``benchmarks/results/<date>.md`` (appended) with a table ready for the README.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import platform
import re
import shutil
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from . import measure, rowgen
from .generate import DATA, Params

HERE = Path(__file__).resolve().parent
RESULTS = HERE / "results"
CASES = ("convert-h2r", "convert-r2h", "export", "import")
_PART = re.compile(r"(?:^|/)(?:state/\d+/(\d+)(?:/|$)|partition=(\d+)/)")


@dataclass
class CaseResult:
    case: str
    params: Params
    rows: int
    source_bytes: int
    target_bytes: int
    tool: measure.Measured
    floor: measure.Measured | None
    largest_partition_raw: int
    jobs: int = 1
    engine_s: float | None = None
    note: str = ""
    #: RocksDB's own steps for the case's rows (``rocksdb_steps.py``): CPU s of the scan and the write
    steps: dict[str, float] | None = None
    #: the file codec's own steps for the case's target (``codec_steps.py``): CPU s of the write and read
    codec_steps: dict[str, Any] | None = None
    #: the wall clock of every run of the tool and of the floor, in run order (``--repeat``)
    tool_walls: list[float] | None = None
    floor_walls: list[float] | None = None

    def step_parts(self) -> list[tuple[str, float]]:
        """(name, CPU s) of each library step measured for the case."""
        parts = []
        if self.steps:
            parts.append(("RocksDB scan", self.steps["scan_cpu_s"]))
            if self.steps["write_cpu_s"]:
                parts.append(("RocksDB write", self.steps["write_cpu_s"]))
        if self.codec_steps:
            name = {"lz4": "LZ4", "parquet": "Parquet"}[self.codec_steps["kind"]]
            parts.append((f"{name} write", self.codec_steps["write_cpu_s"]))
            if self.codec_steps["read_cpu_s"]:
                parts.append((f"{name} read-back", self.codec_steps["read_cpu_s"]))
        return parts

    @property
    def steps_cpu_s(self) -> float | None:
        parts = self.step_parts()
        return sum(s for _, s in parts) if parts else None

    @property
    def least_ratio(self) -> float | None:
        """The least tool/floor wall ratio a case doing the libraries' steps can reach: their CPU
        seconds spread over the jobs, over the floor's wall clock."""
        if self.steps_cpu_s is None or not self.floor:
            return None
        return self.steps_cpu_s / self.jobs / self.floor.wall_s

    @property
    def keys_per_s(self) -> float:
        return self.rows / self.tool.wall_s

    @property
    def mb_per_s(self) -> float:
        return self.source_bytes / 1e6 / self.tool.wall_s

    @property
    def ratio(self) -> float | None:
        return self.tool.wall_s / self.floor.wall_s if self.floor else None

    @property
    def cpu_ratio(self) -> float | None:
        return self.tool.cpu_s / self.floor.cpu_s if self.floor and self.floor.cpu_s else None

    @property
    def keys_per_cpu_s(self) -> float:
        return self.rows / self.tool.cpu_s

    @property
    def rss_limit_mb(self) -> float:
        return 1.5 * self.largest_partition_raw / 2**20 + 300


def _python() -> list[str]:
    return [sys.executable]


def _env(tool_path: str | None = None) -> dict[str, str]:
    """Child environment: this repository on the path (or ``tool_path`` first, for before/after runs)."""
    env = dict(os.environ)
    paths = ([tool_path] if tool_path else []) + [str(HERE.parent)] + ([env["PYTHONPATH"]] if env.get("PYTHONPATH") else [])
    env["PYTHONPATH"] = os.pathsep.join(paths)
    return env


def compile_bytecode(package: Path) -> None:
    """Write the bytecode of the tool's modules, as pip does when it installs a package, so every
    case runs the tool as installed. Without it, an editable install under
    ``PYTHONDONTWRITEBYTECODE=1`` (set on these machines) compiles about 50 modules from source in
    every process that imports them (measured: 0.15 CPU s per process)."""
    import compileall

    if not compileall.compile_dir(str(package), quiet=1):
        raise SystemExit(f"could not compile the bytecode of {package}")


def ensure_checkpoint(p: Params, jobs: int) -> tuple[Path, dict[str, Any]]:
    """The generated checkpoint for ``p`` (generating it when missing or made with other params)."""
    root = DATA / p.name
    info_path = DATA / f"{p.name}.bench.json"
    if info_path.exists() and root.exists():
        info = json.loads(info_path.read_text())
        if info.get("params") == p.__dict__:
            return root, info
    argv = _python() + ["-m", "benchmarks.generate", "--keys", str(p.keys), "--partitions", str(p.partitions),
                        "--shape", p.shape, "--layout", p.layout, "--deltas", str(p.deltas), "--seed", str(p.seed),
                        "--jobs", str(jobs)]
    m = measure.run(argv, env=_env())
    if m.returncode != 0:
        raise SystemExit(f"generating {p.name} failed:\n{m.stderr[-3000:]}")
    print(f"generated {p.name} in {m.wall_s:.1f} s", file=sys.stderr)
    return root, json.loads(info_path.read_text())


def source_files(checkpoint: Path) -> dict[int, list[tuple[str, int]]]:
    """Per partition: the state files (path, size) the tool reads for the latest version."""
    from migrate.checkpoint.model import load_checkpoint
    from migrate.providers.base import ReadContext
    from migrate.storage import open_location

    ck = load_checkpoint(open_location(str(checkpoint)))
    provider = ck.provider
    out: dict[int, list[tuple[str, int]]] = {}
    for sp in ck.store_partitions():
        files = provider.source_files(sp.dir, ck.state_version, ReadContext(conf=ck.conf, listing=sp.listing))
        out.setdefault(sp.partition, []).extend((str(checkpoint / f.rel), f.size) for f in files)
    return out


def archive_files(archive: Path) -> dict[int, list[tuple[str, int]]]:
    out: dict[int, list[tuple[str, int]]] = {}
    for path in archive.rglob("*.parquet"):
        m = _PART.search(path.relative_to(archive).as_posix())
        if m:
            out.setdefault(int(m.group(1) or m.group(2)), []).append((str(path), path.stat().st_size))
    return out


def written_sizes(target: Path) -> dict[int, list[int]]:
    """Sizes of the files a command wrote, per partition (-1: files outside any partition)."""
    out: dict[int, list[int]] = {}
    for path in target.rglob("*"):
        if path.is_file():
            m = _PART.search(path.relative_to(target).as_posix())
            part = int(m.group(1) or m.group(2)) if m else -1
            out.setdefault(part, []).append(path.stat().st_size)
    return out


def run_floor(sources: dict[int, list[tuple[str, int]]], written: dict[int, list[int]], jobs: int, scratch: Path) -> measure.Measured:
    parts = sorted(set(sources) | {p for p in written if p >= 0})
    tasks = []
    for i, part in enumerate(parts):
        sizes = list(written.get(part, [])) + (written.get(-1, []) if i == 0 else [])
        tasks.append([[p for p, _ in sources.get(part, [])], sizes, str(scratch / f"p{part}")])
    plan = scratch / "floor-plan.json"
    plan.write_text(json.dumps({"jobs": jobs, "tasks": tasks}))
    m = measure.run(_python() + ["-m", "benchmarks.floor", str(plan)], env=_env())
    if m.returncode != 0:
        raise SystemExit(f"floor failed:\n{m.stderr[-3000:]}")
    return m


def _run_steps(module: str, plan: dict[str, Any], scratch: Path) -> dict[str, Any]:
    """Run ``python -m benchmarks.<module>`` on ``plan``; its last output line, as JSON."""
    path = scratch / f"{module}-plan.json"
    path.write_text(json.dumps(plan))
    m = measure.run(_python() + ["-m", f"benchmarks.{module}", str(path)], env=_env())
    if m.returncode != 0:
        raise SystemExit(f"{module} failed:\n{m.stderr[-3000:]}")
    return json.loads(m.stdout.strip().splitlines()[-1])


def run_rocksdb_steps(root: Path, partitions: int, write: bool, jobs: int, scratch: Path) -> dict[str, float]:
    return _run_steps("rocksdb_steps", {"root": str(root), "partitions": partitions, "write": write, "jobs": jobs}, scratch)


def run_codec_steps(kind: str, root: Path, jobs: int, scratch: Path) -> dict[str, Any]:
    return _run_steps("codec_steps", {"kind": kind, "root": str(root), "jobs": jobs}, scratch)


def _tool(args: list[str], jobs: int, tool_path: str | None, tool_python: str | None = None) -> measure.Measured:
    # the child's working directory comes first on its path, so it must hold the package to run
    m = measure.run([tool_python or sys.executable, "-m", "migrate"] + args + ["--jobs", str(jobs), "--json"], env=_env(tool_path),
                    cwd=tool_path or str(HERE.parent))
    if m.returncode != 0:
        raise SystemExit(f"{' '.join(args)} failed ({m.returncode}):\n{m.stderr[-3000:]}")
    return m


def median_run(runs: list[measure.Measured]) -> measure.Measured:
    """The run of median wall clock (the lower of the two middle ones for an even count)."""
    return sorted(runs, key=lambda m: m.wall_s)[(len(runs) - 1) // 2]


def _archive_for_import(scratch: Path, p: Params) -> Path:
    """Where the export case leaves its archive for the import case of the same checkpoint."""
    return scratch / f"archive-for-import-{p.name}"


def reported_digests(report: dict[str, Any]) -> dict[int, str]:
    """Partition -> state digest from a command's ``--json`` report: the source's for a convert,
    the written target's for an import (each checked against the archive), and each data file's
    for an export. Every case's digests are held to the generator's."""
    if report.get("command") == "export":
        return {f["partition"]: f["state_digest"]["hash"] for f in report.get("data_files", [])}
    field = "target_digest" if report.get("command") == "import" else "source_digest"
    return {q["partition"]: q[field] for q in report.get("partitions", [])}


def run_case(
    case: str, p: Params, jobs: int, scratch: Path, with_floor: bool, tool_path: str | None = None,
    tool_python: str | None = None, repeat: int = 1,
) -> CaseResult:
    """Run a case ``repeat`` times, each tool run followed by its floor run, and keep the median
    run of each (the floor moves with the machine as much as the tool does)."""
    hdfs = Params(p.keys, p.partitions, p.shape, "hdfs", p.deltas, p.seed)
    rocks = Params(p.keys, p.partitions, p.shape, "rocksdb", p.deltas, p.seed)
    target = scratch / case
    if case == "convert-h2r":
        src, info = ensure_checkpoint(hdfs, jobs)
        args = ["convert", str(src), str(target), "--to", "rocksdb"]
        sources = source_files(src)
    elif case == "convert-r2h":
        src, info = ensure_checkpoint(rocks, jobs)
        args = ["convert", str(src), str(target), "--to", "hdfs"]
        sources = source_files(src)
    elif case == "export":
        src, info = ensure_checkpoint(hdfs, jobs)
        args = ["export", str(src), str(target)]
        sources = source_files(src)
    elif case == "import":
        src, info = ensure_checkpoint(hdfs, jobs)
        archive = _archive_for_import(scratch, hdfs)
        if not (archive / "manifest.json").exists():
            shutil.rmtree(archive, ignore_errors=True)
            _tool(["export", str(src), str(archive)], jobs, tool_path, tool_python)
        args = ["import", str(archive), str(target), "--to", "rocksdb"]
        sources = archive_files(archive)
    else:
        raise SystemExit(f"unknown case {case}")
    expected = {q["partition"]: q["digest"] for q in info["partitions"]}
    tool_runs: list[measure.Measured] = []
    floor_runs: list[measure.Measured] = []
    for _ in range(repeat):
        shutil.rmtree(target, ignore_errors=True)
        m = _tool(args, jobs, tool_path, tool_python)
        report = json.loads(m.stdout)
        rows = int(report.get("rows", 0))
        if rows != info["rows"]:
            raise SystemExit(f"{case}: the tool reports {rows} rows, the generator wrote {info['rows']}")
        got = reported_digests(report)
        wrong = sorted(k for k in set(got) | set(expected) if expected.get(k) != got.get(k))
        if wrong:
            raise SystemExit(f"{case}: partition {wrong[0]} digest {got.get(wrong[0])} differs from the generator's {expected.get(wrong[0])}")
        tool_runs.append(m)
        written = written_sizes(target)
        if with_floor:
            floor_dir = scratch / f"floor-{case}"
            shutil.rmtree(floor_dir, ignore_errors=True)
            floor_dir.mkdir(parents=True)
            floor_runs.append(run_floor(sources, written, jobs, floor_dir))
            shutil.rmtree(floor_dir, ignore_errors=True)
    m = median_run(tool_runs)
    floor = median_run(floor_runs) if floor_runs else None
    steps = None
    if with_floor and case in ("convert-h2r", "convert-r2h", "import"):
        steps_dir = scratch / f"steps-{case}"
        shutil.rmtree(steps_dir, ignore_errors=True)
        steps_dir.mkdir(parents=True)
        # the RocksDB side of the case: the target it wrote (scan and write), or its source (scan)
        root, write = (src, False) if case == "convert-r2h" else (target, True)
        steps = run_rocksdb_steps(root, p.partitions, write, jobs, steps_dir)
        shutil.rmtree(steps_dir, ignore_errors=True)
    codec = None
    if with_floor and case in ("convert-r2h", "export"):
        # the file format's side of the case's target: a heap map's LZ4 stream, an archive's Parquet
        steps_dir = scratch / f"codec-{case}"
        shutil.rmtree(steps_dir, ignore_errors=True)
        steps_dir.mkdir(parents=True)
        codec = run_codec_steps("lz4" if case == "convert-r2h" else "parquet", target, jobs, steps_dir)
        shutil.rmtree(steps_dir, ignore_errors=True)
    result = CaseResult(
        case=case, params=p, rows=rows,
        source_bytes=sum(s for files in sources.values() for _, s in files),
        target_bytes=sum(sum(v) for v in written.values()),
        tool=m, floor=floor, largest_partition_raw=int(info["largest_partition_raw_bytes"]), jobs=jobs, steps=steps,
        codec_steps=codec, tool_walls=[r.wall_s for r in tool_runs], floor_walls=[r.wall_s for r in floor_runs],
    )
    archive = _archive_for_import(scratch, Params(p.keys, p.partitions, p.shape, "hdfs", p.deltas, p.seed))
    if case == "export" and not archive.exists():
        target.rename(archive)  # the import case reads this archive instead of exporting again
    shutil.rmtree(target, ignore_errors=True)
    return result


def run_engine(p: Params, scratch: Path) -> tuple[float | None, str]:
    src, _ = ensure_checkpoint(Params(p.keys, p.partitions, p.shape, "hdfs", p.deltas, p.seed), 1)
    # settle: the tool's cases start only once the engine's JVM has exited too
    m = measure.run(_python() + ["-m", "benchmarks.engine_load", str(src), "--shape", p.shape,
                                 "--scratch", str(scratch / "engine")], env=_env(), settle=True)
    if m.returncode != 0:
        return None, f"engine run failed: {m.stderr.strip().splitlines()[-1] if m.stderr.strip() else m.returncode}"
    info = json.loads(m.stdout.strip().splitlines()[-1])
    note = info.get("note", "")
    return float(info["load_s"]), f"{note}; its JVM exited {m.settled_s:.1f} s after the driver" if note else note


# ------------------------------------------------------------------------ report
def _fmt_rate(x: float) -> str:
    return f"{x / 1e6:.2f}M" if x >= 1e6 else f"{x / 1e3:.0f}k"


def table(results: list[CaseResult]) -> str:
    head = ("| case | keys | partitions | jobs | wall s | keys/s | source MB/s | CPU s | keys/CPU-s "
            "| peak RSS MB (one process / tree) | tree PSS MB | tmpfs scratch MB | tree PSS + tmpfs MB | RSS limit MB | floor s (CPU s) | tool/floor wall (CPU) "
            "| engine s | tool/engine | libraries' steps CPU s | least tool/floor wall |")
    lines = [head, "|" + "|".join(["---"] * (head.count("|") - 1)) + "|"]
    for r in results:
        floor = (f"{r.floor.wall_s:.1f} ({r.floor.cpu_s:.1f}) | {r.ratio:.1f}x ({r.cpu_ratio:.1f}x)"
                 if r.floor and r.cpu_ratio else "- | -")
        engine = f"{r.engine_s:.1f} | {r.tool.wall_s / r.engine_s:.2f}x" if r.engine_s else "- | -"
        steps = (f"{r.steps_cpu_s:.1f} ({' + '.join(f'{name} {s:.1f}' for name, s in r.step_parts())}) | {r.least_ratio:.1f}x"
                 if r.least_ratio is not None else "- | -")
        lines.append(
            f"| {r.case} | {r.rows:,} | {r.params.partitions} | {r.jobs} | {r.tool.wall_s:.1f} | {_fmt_rate(r.keys_per_s)} "
            f"| {r.mb_per_s:.1f} | {r.tool.cpu_s:.1f} | {_fmt_rate(r.keys_per_cpu_s)} "
            f"| {r.tool.max_rss_mb:.0f} / {r.tool.tree_rss_mb:.0f} | {r.tool.tree_pss_mb:.0f} | {r.tool.shm_mb:.0f} "
            f"| {r.tool.tree_pss_shm_mb:.0f} | {r.rss_limit_mb:.0f} "
            f"| {floor} | {engine} | {steps} |"
        )
    return "\n".join(lines)


def targets(results: list[CaseResult]) -> list[str]:
    out = []
    for r in results:
        checks = []
        if r.case == "convert-h2r":
            checks.append(("keys/s >= 1M", r.keys_per_s >= 1e6))
        if r.case == "export":
            checks.append(("keys/s >= 2M", r.keys_per_s >= 2e6))
        if r.ratio is not None:
            bound = r.least_ratio
            name = "within 3x of floor"
            if r.ratio > 3 and bound is not None and bound > 3:
                name += f" (out of reach here: the libraries' own steps alone take {bound:.1f}x the floor's wall clock)"
            checks.append((name, r.ratio <= 3))
        if r.engine_s:
            checks.append(("no slower than the engine", r.tool.wall_s <= r.engine_s))
        checks.append((f"RSS <= {r.rss_limit_mb:.0f} MB (one process)", r.tool.max_rss_mb <= r.rss_limit_mb))
        checks.append((f"RSS <= {r.rss_limit_mb:.0f} MB (tree)", r.tool.tree_rss_mb <= r.rss_limit_mb))
        checks.append((f"PSS + tmpfs scratch <= {r.rss_limit_mb:.0f} MB (tree, shared pages once)",
                       r.tool.tree_pss_shm_mb <= r.rss_limit_mb))
        out.append(f"- {r.case} {r.rows:,} keys / {r.params.partitions} partitions: "
                   + ", ".join(f"{name}: {'met' if ok else 'NOT met'}" for name, ok in checks))
    return out


_PROBE = """
import importlib.util as u
print(u.find_spec('pandas') is not None)
from migrate.codecs import hadoop_crc, lz4_stream
print(hadoop_crc._chunkcrc.crc_library() if hadoop_crc._chunkcrc else 'python-loop')
print('liblz4' if lz4_stream._lz4stream is not None else 'python-lz4')
"""


def tool_environment(tool_python: str | None, tool_path: str | None = None) -> str:
    """The tool's interpreter, whether pandas is importable there (pyarrow imports it, when
    installed, on the first ``pa.array`` of a list or numpy array, which costs every process of
    the tool about 0.35 CPU s and 35-53 MB, measured; the tool itself never uses pandas), and which
    library computes the checksum sidecars' CRCs (the system's libdeflate, about 5x zlib) and
    which decodes LZ4 streams (the compiled decoder with the system's liblz4, or python-lz4)."""
    python = tool_python or sys.executable
    probe = subprocess.run([python, "-c", _PROBE], capture_output=True, text=True, env=_env(tool_path))
    lines = probe.stdout.split() + ["", "", ""]
    pandas = {"True": "pandas installed", "False": "no pandas"}.get(lines[0], "pandas unknown")
    crc, lz4 = lines[1] or "unknown", lines[2] or "unknown"
    return f"tool interpreter {python} ({pandas}; sidecar CRCs by {crc}; LZ4 streams by {lz4})"


def write_results(results: list[CaseResult], jobs: int, argv: list[str], name: str | None = None, environment: str = "") -> Path:
    RESULTS.mkdir(parents=True, exist_ok=True)
    now = dt.datetime.now()
    path = RESULTS / f"{name or f'{now:%Y-%m-%d}'}.md"
    lines = [
        f"## {now:%Y-%m-%d %H:%M} `python -m benchmarks.run {' '.join(argv)}`",
        "",
        f"Machine: {os.cpu_count()} cores, {platform.python_implementation()} {platform.python_version()}, "
        f"jobs {jobs}; {environment}; load average before/after each case: "
        + ", ".join(f"{r.case} {r.tool.load_before:.1f}/{r.tool.load_after:.1f}" for r in results),
        "",
        table(results),
        "",
        "Targets (issue 6):",
        *targets(results),
        "",
        "Details (source/target MB, CPU s of the median runs):",
        *[f"- {r.case} p{r.params.partitions}: source {r.source_bytes / 1e6:.1f} MB, target {r.target_bytes / 1e6:.1f} MB, "
          f"tool CPU {r.tool.cpu_s:.1f} s" + (f", floor CPU {r.floor.cpu_s:.1f} s" if r.floor else "")
          + (f"; wall s of each run, the median counts: tool {' / '.join(f'{w:.2f}' for w in r.tool_walls)}" if r.tool_walls and len(r.tool_walls) > 1 else "")
          + (f", floor {' / '.join(f'{w:.2f}' for w in r.floor_walls)}" if r.floor_walls and len(r.floor_walls) > 1 else "")
          + (f"; {r.note}" if r.note else "") for r in results],
        "",
    ]
    with open(path, "a", encoding="utf-8") as f:
        f.write("\n".join(lines) + "\n")
    with open(path.with_suffix(".jsonl"), "a", encoding="utf-8") as f:  # raw figures, one case a line
        for r in results:
            f.write(json.dumps({
                "when": f"{now:%Y-%m-%d %H:%M}", "case": r.case, "params": r.params.__dict__, "jobs": r.jobs,
                "rows": r.rows, "source_bytes": r.source_bytes, "target_bytes": r.target_bytes,
                "largest_partition_raw": r.largest_partition_raw, "engine_s": r.engine_s, "note": r.note,
                "tool": {k: v for k, v in r.tool.__dict__.items() if k not in ("stdout", "stderr", "argv")},
                "floor": {k: v for k, v in r.floor.__dict__.items() if k not in ("stdout", "stderr", "argv")} if r.floor else None,
                "rocksdb_steps": r.steps, "tool_walls": r.tool_walls, "floor_walls": r.floor_walls,
                "codec_steps": r.codec_steps,
            }) + "\n")
    return path


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    ap = argparse.ArgumentParser(prog="python -m benchmarks.run", description=__doc__.split("\n\n")[0])
    ap.add_argument("--keys", type=int, default=1_000_000)
    ap.add_argument("--partitions", default="64", help="one count or a comma list (e.g. 16,256 for the memory check)")
    ap.add_argument("--shape", default="narrow", choices=rowgen.SHAPES, help="row shape (see benchmarks/rowgen.py)")
    ap.add_argument("--deltas", type=int, default=4)
    ap.add_argument("--seed", type=int, default=20261202)
    ap.add_argument("--cases", default=",".join(CASES), help=f"comma list of: {', '.join(CASES)}")
    ap.add_argument("--jobs", type=int, default=os.cpu_count() or 1)
    ap.add_argument("--no-floor", action="store_true", help="skip the floor runs")
    ap.add_argument("--repeat", type=int, default=3, metavar="N",
                    help="run each case N times, each tool run followed by its floor run; the median run of each counts (default 3)")
    ap.add_argument("--engine", action="store_true", help="also time the engine's own load of the heap-map state")
    ap.add_argument("--scratch", type=Path, default=None, help="where targets are written (default: a temp dir)")
    ap.add_argument("--tool-path", default=None, metavar="DIR",
                    help="run the migrate package found in DIR instead of this repository's (before/after comparisons)")
    ap.add_argument("--tool-python", default=None, metavar="PATH",
                    help="the interpreter that runs the tool (default: this one); e.g. .venv-tool/bin/python from "
                         "`make install-tool`, which holds only the tool's dependencies, as users install it")
    ap.add_argument("--results", default=None, metavar="NAME",
                    help="append to benchmarks/results/NAME.md and NAME.jsonl (default: today's date)")
    args = ap.parse_args(argv)
    tool_path = str(Path(args.tool_path).resolve()) if args.tool_path else None
    args.tool_python = os.path.abspath(args.tool_python) if args.tool_python else None  # a venv's python: no resolve()
    if args.repeat < 1:
        ap.error("--repeat must be at least 1")
    cases = [c.strip() for c in args.cases.split(",") if c.strip()]
    unknown = sorted(set(cases) - set(CASES))
    if unknown:
        ap.error(f"unknown case(s): {', '.join(unknown)}")
    DATA.mkdir(parents=True, exist_ok=True)
    compile_bytecode(Path(tool_path or HERE.parent) / "migrate")
    scratch = args.scratch or Path(tempfile.mkdtemp(prefix="scratch-", dir=str(DATA)))
    scratch.mkdir(parents=True, exist_ok=True)
    results: list[CaseResult] = []
    try:
        for parts in [int(x) for x in args.partitions.split(",")]:
            p = Params(args.keys, parts, args.shape, "hdfs", args.deltas, args.seed)
            engine = run_engine(p, scratch) if args.engine else (None, "")
            if args.engine and engine[0] is None:
                print(f"{p.keys:,} keys / {parts} partitions: {engine[1]}", file=sys.stderr)
            for case in cases:
                r = run_case(case, p, args.jobs, scratch, not args.no_floor, tool_path, args.tool_python, args.repeat)
                if case == "convert-h2r" and engine[0]:
                    r.engine_s = engine[0]
                if case == "convert-h2r" and engine[1]:
                    r.note = engine[1]
                results.append(r)
                print(table([r]).splitlines()[-1], file=sys.stderr)
    finally:
        if args.scratch is None:
            shutil.rmtree(scratch, ignore_errors=True)
    path = write_results(results, args.jobs, argv, args.results, tool_environment(args.tool_python, tool_path))
    print(table(results))
    print("\n".join(targets(results)))
    print(f"results appended to {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
