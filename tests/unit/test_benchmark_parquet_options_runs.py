"""benchmarks/parquet_options.py runs on a small generated checkpoint and its options reach the
Parquet writer: the row count is the generator's, every variant is timed each round, and the
uncompressed variant writes more bytes than the Snappy one it is compared with."""

import json

from benchmarks import parquet_options
from benchmarks.generate import Params, generate


def test_parquet_options_measures_every_variant(tmp_path, capsys):
    generate(Params(keys=3000, partitions=4, shape="narrow", layout="hdfs", deltas=3, seed=3), tmp_path / "ckpt", jobs=1, quiet=True)
    recorded = json.loads((tmp_path / "ckpt.bench.json").read_text())
    assert parquet_options.main([str(tmp_path / "ckpt"), "--partitions", "2", "--rounds", "2"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["partitions"] == 2
    assert out["rows"] == sum(recorded["partitions"][p]["rows"] for p in (1, 2))  # partitions after the first
    assert set(out["us_per_row"]) == set(out["bytes_per_row"]) and "current" in out["us_per_row"]
    assert all(len(v) == 2 and all(x > 0 for x in v) for v in out["us_per_row"].values())
    assert out["bytes_per_row"]["no compression"] > out["bytes_per_row"]["current"] > 0
