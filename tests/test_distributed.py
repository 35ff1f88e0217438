"""Counting on a local Dask cluster writes the single-process model byte for byte."""

from __future__ import annotations

from pathlib import Path

import pytest

import nextword

distributed = pytest.importorskip("distributed", reason="the dask extra is not installed")


def test_local_dask_cluster_equals_one_process(tmp_path: Path) -> None:
    from pydoc_data.topics import topics  # real English shipped with CPython

    from nextword.distributed import train_on_dask

    keys = sorted(topics)
    paths = []
    for i in range(5):  # five input files, one task each
        p = tmp_path / f"part{i}.txt"
        p.write_text("\n".join(topics[k] for k in keys[i::5]) + "\n", encoding="utf-8")
        paths.append(p)
    single = tmp_path / "single.nwm"
    nextword.train(paths, single, min_count=1)
    on_dask = tmp_path / "dask.nwm"
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        with distributed.Client(cluster) as client:
            train_on_dask(paths, on_dask, client=client, min_count=1)
    assert on_dask.read_bytes() == single.read_bytes()
