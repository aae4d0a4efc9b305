"""The --jobs default counts the CPUs the process may use: its affinity mask, within its cgroup's
CPU quota (cgroup v2 ``cpu.max``, v1 ``cpu.cfs_quota_us`` / ``cpu.cfs_period_us``; the file
formats are the kernel's documented ones, Documentation/admin-guide/cgroup-v2.rst and cgroup-v1's
CFS bandwidth control, as common practice reads them). The cgroup trees here are built in a
temporary folder."""

from __future__ import annotations

import os

import pytest

from migrate import workers


def _tree(root, own: str, files: dict[str, str]):
    for rel, text in files.items():
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text)
    (root / "self-cgroup").write_text(own)
    return str(root / "fs"), str(root / "self-cgroup")


@pytest.mark.parametrize(
    "own, files, expected",
    [
        ("0::/\n", {"fs/cpu.max": "200000 100000\n"}, 2.0),  # v2, the container's own root
        ("0::/\n", {"fs/cpu.max": "max 100000\n"}, None),  # v2, no quota
        ("0::/kubepods/pod7/box\n", {"fs/kubepods/pod7/box/cpu.max": "150000 100000\n", "fs/cpu.max": "max 100000\n"}, 1.5),
        ("0::/gone\n", {"fs/cpu.max": "50000 100000\n"}, 0.5),  # its own folder not visible: the root
        ("4:memory:/x\n1:cpu,cpuacct:/job\n0::/\n",
         {"fs/cpu/job/cpu.cfs_quota_us": "300000\n", "fs/cpu/job/cpu.cfs_period_us": "100000\n"}, 3.0),  # v1
        ("1:cpu:/\n", {"fs/cpu/cpu.cfs_quota_us": "-1\n", "fs/cpu/cpu.cfs_period_us": "100000\n"}, None),  # v1, none
        ("1:cpu:/\n", {}, None),  # no cgroup files at all
        ("0::/\n", {"fs/cpu.max": "garbage\n"}, None),
        # a parent's quota binds its child, and the smallest on the way up counts
        ("0::/pod/box\n", {"fs/pod/box/cpu.max": "max 100000\n", "fs/pod/cpu.max": "250000 100000\n", "fs/cpu.max": "400000 100000\n"}, 2.5),
        ("1:cpu:/job/step\n", {"fs/cpu/job/step/cpu.cfs_quota_us": "-1\n", "fs/cpu/job/cpu.cfs_quota_us": "100000\n",
                               "fs/cpu/job/cpu.cfs_period_us": "100000\n"}, 1.0),
    ],
)
def test_the_cgroup_quota_is_read_from_either_version(tmp_path, own, files, expected):
    root, self_cgroup = _tree(tmp_path, own, files)
    assert workers.cgroup_cpu_quota(root, self_cgroup) == expected


@pytest.mark.parametrize("affinity, quota, expected", [(64, 2.0, 2), (64, 1.5, 2), (64, 0.5, 1), (4, 8.0, 4), (3, None, 3)])
def test_the_default_is_the_affinity_within_the_quota(monkeypatch, affinity, quota, expected):
    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: set(range(affinity)))
    monkeypatch.setattr(workers, "cgroup_cpu_quota", lambda: quota)
    assert workers.default_jobs() == expected
