"""Unit tests of audit.executors: chunks cover the items in order, results come back in item order
whatever the order of completion, and --scheduler refuses what cannot work (behaviour, common practice;
the Dask cases run a LocalCluster on the loopback, 2 worker processes)."""

from __future__ import annotations

import sys
import time

import pytest

from audit.cli import main
from audit.executors import (LOCAL, DaskExecutor, ProcessExecutor, SchedulerError, SerialExecutor, check_scheduler,
                             chunk_bounds, open_executor)


def slow_first(chunk: list, shared: dict) -> list:
    """The earlier the item, the longer its chunk takes: chunks finish in reverse order."""
    time.sleep(shared["pause_s"] * max(0, 3 - chunk[0] // 4))
    return [(x, x * x + shared["add"]) for x in chunk]


@pytest.mark.parametrize("n, k", [(0, 3), (1, 4), (7, 3), (10, 10), (10, 25), (1000, 8)])
def test_chunk_bounds_cover_every_item_once_in_order(n, k):
    b = chunk_bounds(n, k)
    flat = [i for a, z in b for i in range(a, z)]
    assert flat == list(range(n))
    assert len(b) == min(max(k, 1), n)
    if b:
        sizes = [z - a for a, z in b]
        assert max(sizes) - min(sizes) <= 1


def test_processes_give_the_serial_result_in_item_order():
    items = list(range(16))
    shared = {"pause_s": 0.05, "add": 3}
    want = SerialExecutor().map_chunks(slow_first, items, shared)
    assert want == [(x, x * x + 3) for x in items]
    got = ProcessExecutor(2, chunks_per_worker=2).map_chunks(slow_first, items, shared)
    assert got == want


def test_open_executor_follows_the_options():
    assert isinstance(open_executor(1, None), SerialExecutor)
    assert isinstance(open_executor(3, None), ProcessExecutor) and open_executor(3, None).workers == 3
    ex = open_executor(2, "local")
    assert isinstance(ex, DaskExecutor) and ex._client is None   # nothing started before the first use
    ex.close()


@pytest.mark.parametrize("address", ["foo", "http://host:8786", "tcp://", "tcp//host:1", ""])
def test_scheduler_address_refused(address):
    with pytest.raises(SchedulerError, match="give 'local' or a Dask scheduler address"):
        check_scheduler(address)


def test_without_dask_scheduler_is_a_users_mistake(monkeypatch, tmp_path, capsys):
    """No Dask installed: --scheduler gives exit 2 and says how to install it; nothing is written."""
    monkeypatch.setitem(sys.modules, "distributed", None)    # import distributed -> ImportError
    with pytest.raises(SchedulerError, match=r"pip install 'plant-audit\[cluster\]'"):
        check_scheduler("local")
    inv = tmp_path / "loops.csv"
    inv.write_text("tag,model,gain,tau1_s,dead_time_s,form,kc,ti_s,action\nF-1,fopdt,1,5,1,ideal,0.5,5,reverse\n",
                   encoding="utf-8")
    code = main(["run", str(inv), "--out", str(tmp_path / "out"), "--no-history", "--quiet", "--scheduler", "local"])
    err = capsys.readouterr().err
    assert code == 2 and "not installed" in err and "Traceback" not in err
    assert not (tmp_path / "out").exists()


def test_no_scheduler_answering_is_a_users_mistake(monkeypatch):
    """A closed port on the loopback: refused within the connect timeout, as a user's mistake."""
    pytest.importorskip("distributed")
    import audit.executors as ex
    monkeypatch.setattr(ex, "CONNECT_TIMEOUT_S", 1.0)
    d = DaskExecutor("tcp://127.0.0.1:9", 2)
    with pytest.raises(SchedulerError, match="no Dask scheduler answered"):
        d.map_chunks(slow_first, [1, 2], {"pause_s": 0.0, "add": 0})
    d.close()


@pytest.fixture(scope="module")
def cluster():
    """A Dask LocalCluster on the loopback: 2 worker processes, one thread each, no dashboard."""
    pytest.importorskip("distributed")
    import logging

    from distributed import LocalCluster
    c = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address=None,
                     silence_logs=logging.ERROR)
    yield c
    c.close()


def test_dask_gives_the_serial_result_in_item_order(cluster):
    items = list(range(16))
    shared = {"pause_s": 0.05, "add": 3}
    d = DaskExecutor(cluster.scheduler_address, 5)
    try:
        got = d.map_chunks(slow_first, items, shared)
        assert d.workers == 2          # the cluster's own count, not --jobs
        assert got == SerialExecutor().map_chunks(slow_first, items, shared)
        assert d.map_chunks(slow_first, [], shared) == []
    finally:
        d.close()


def test_local_cluster_serves_no_pages():
    """`--scheduler local`: Dask's HTTP servers listen on the loopback at a free port and serve no page
    (dashboard, health, metrics and identity pages all answer 404). Common practice: an audit run opens
    no service that shows its data."""
    pytest.importorskip("distributed")
    import urllib.error
    import urllib.request

    d = DaskExecutor(LOCAL, 2)
    try:
        assert d.map_chunks(slow_first, [1, 2], {"pause_s": 0.0, "add": 1}) == \
            SerialExecutor().map_chunks(slow_first, [1, 2], {"pause_s": 0.0, "add": 1})
        # the scheduler's server (in this process) and each worker's (in its own process, by address)
        addresses = [s.getsockname()[:2] for s in d._cluster.scheduler.http_server._sockets.values()]
        info = d._client.scheduler_info()["workers"]
        addresses += [(v["host"], v["services"]["dashboard"]) for v in info.values() if "dashboard" in v.get("services", {})]
        assert addresses
        for host, port in addresses:
            assert host == "127.0.0.1"
            for page in ("/", "/status", "/health", "/metrics", "/json/identity.json", "/info/main/workers.html"):
                with pytest.raises(urllib.error.HTTPError) as err:
                    urllib.request.urlopen(f"http://{host}:{port}{page}", timeout=5)
                assert err.value.code == 404
    finally:
        d.close()
