"""Executors give the same results in the same order."""

import gc
import sys

import pytest

from regional import compute
from regional.compute import (
    InProcessExecutor,
    chunk_size,
    chunked,
    make_executor,
    tapered,
    worker_start_method,
)


def _square_all(chunk, context):
    return [context["offset"] + int(x) ** 2 for x in chunk]


def test_chunked_keeps_order_and_sizes():
    assert chunked(list("abcde"), 2) == [["a", "b"], ["c", "d"], ["e"]]
    with pytest.raises(ValueError, match="chunk size must be >= 1"):
        chunked(["a"], 0)


def test_tapered_chunks_shrink_towards_the_end_and_keep_the_order():
    items = [f"B{i:03d}" for i in range(150)]
    chunks = tapered(items, 10, n_workers=2)
    assert [b for chunk in chunks for b in chunk] == items
    sizes = [len(chunk) for chunk in chunks]
    assert sizes == sorted(sizes, reverse=True) and max(sizes) == 10
    assert sizes[-3:] == [2, 2, 2]  # the last tasks are short, but no lone basin
    # each chunk at most a quarter (2 workers) of what was left, rounded up, and 2 or more
    left = len(items)
    for size in sizes:
        assert 2 <= size <= max(2, -(-left // 4))
        left -= size
    assert [len(c) for c in tapered(items[:7], 10, n_workers=2)] == [2, 2, 3]
    assert [len(c) for c in tapered(items[:3], 1, n_workers=2)] == [1, 1, 1]
    assert [len(c) for c in tapered(items[:5], 2, n_workers=2)] == [2, 3]  # no lone last item
    for n in range(2, 60):  # only size 2 lets a chunk exceed the size, and only by one
        for size in (2, 3, 5, 10):
            longest = max(len(c) for c in tapered(items[:n], size, n_workers=2))
            assert longest <= (size + 1 if size == 2 else size)
    assert tapered(items, 10, n_workers=1) == chunked(items, 10)
    assert tapered([], 10, n_workers=2) == []


def test_chunk_size_leaves_every_worker_several_tasks():
    # in process: the stage's default; on 2 workers, 45 basins make at least 8 tasks
    assert chunk_size(45, 16, n_workers=1) == 16
    size = chunk_size(45, 16, n_workers=2)
    assert size == 6 and len(chunked(list(range(45)), size)) >= 4 * 2
    assert chunk_size(1000, 16, n_workers=2) == 16
    assert chunk_size(1, 16, n_workers=8) == 1
    # calibration asks for twice as many: 150 basins on 2 workers in tasks of 10, not 16
    assert chunk_size(150, 16, n_workers=2) == 16
    assert chunk_size(150, 16, n_workers=2, tasks_per_worker=8) == 10


def test_in_process_map_reports_progress_in_basins():
    seen = []
    result = InProcessExecutor().map(
        _square_all, [["1", "2"], ["3"]], {"offset": 10}, progress=lambda d, t: seen.append((d, t))
    )
    assert result == [[11, 14], [19]]
    assert seen == [(2, 3), (3, 3)]


def _shifted_squares(chunk, offset: int):
    return [offset + int(x) ** 2 for x in chunk]


def _batches(drawn: list, count: int):
    # the context is a plain number: Dask scatters a dict's values under its keys
    for i in range(count):
        drawn.append(i)
        yield _shifted_squares, [[str(i)], [str(i + 1), str(i + 2)]], 100 * i


def _expected(i: int) -> list:
    return [[100 * i + i**2], [100 * i + (i + 1) ** 2, 100 * i + (i + 2) ** 2]]


def test_in_process_map_batches_runs_one_batch_at_a_time():
    drawn: list[int] = []
    results = InProcessExecutor().map_batches(_batches(drawn, 3))
    assert next(results) == _expected(0) and drawn == [0]  # lazily: the next batch not drawn
    assert list(results) == [_expected(1), _expected(2)] and drawn == [0, 1, 2]


def test_in_process_imap_runs_a_chunk_when_its_result_is_taken():
    ran: list[list[str]] = []

    def squares(chunk, shift):
        ran.append(list(chunk))
        return _shifted_squares(chunk, shift)

    chunks = [["3"], ["1", "2"], ["4"]]
    results = InProcessExecutor().imap(squares, chunks, 5)
    assert ran == []  # nothing runs before a result is asked for
    assert next(results) == _shifted_squares(["3"], 5) and ran == [["3"]]
    assert list(results) == InProcessExecutor().map(_shifted_squares, chunks, 5)[1:]


def test_dask_map_batches_submits_ahead_and_keeps_batch_order():
    # Two worker processes (distributed.LocalCluster): while the first batch is gathered, the
    # next `ahead` batches are already submitted (no barrier between batches); results come
    # back batch by batch in order, each in chunk order, as in process.
    pytest.importorskip("distributed", reason="Dask 'distributed' is not installed")
    from regional.compute import DaskExecutor

    executor = DaskExecutor(workers=2)
    try:
        drawn: list[int] = []
        results = executor.map_batches(_batches(drawn, 5), ahead=2)
        assert drawn == [0, 1, 2]  # submitted by the call, before any result is taken
        assert next(results) == _expected(0)
        assert drawn == [0, 1, 2, 3]  # batches 1 and 2 were in flight; 3 sent as 0 came back
        assert list(results) == [_expected(i) for i in range(1, 5)]
        with pytest.raises(ValueError, match="ahead must be >= 0"):
            next(executor.map_batches(_batches([], 1), ahead=-1))
        # started now, gathered later: the results in chunk order, as in process
        chunks = [["3"], ["1", "2"], ["4"]]
        wait = executor.start_map(_shifted_squares, chunks, 5)
        assert wait() == InProcessExecutor().map(_shifted_squares, chunks, 5)
        # at a lower priority (behind other work): the same results, in chunk order
        wait = executor.start_map(_shifted_squares, chunks, 5, priority=-1)
        assert wait() == InProcessExecutor().map(_shifted_squares, chunks, 5)
        # taken one at a time as each is gathered: the results in chunk order, as in process
        taken = list(executor.imap(_shifted_squares, chunks, 5))
        assert taken == InProcessExecutor().map(_shifted_squares, chunks, 5)
    finally:
        executor.close()


def _total_plus(results: list, shared: int) -> int:
    return sum(sum(part) for part in results) + shared


def _finished_batches(count: int):
    # each batch finished by _total_plus: its chunks' results summed, plus the shared number
    for i in range(count):
        yield _shifted_squares, [[str(i)], [str(i + 1), str(i + 2)]], 100 * i, _total_plus


def test_batches_with_a_finishing_call_give_its_result_in_process_and_on_a_cluster():
    # A batch's fourth item finishes it where its chunks ran (on a cluster: one more task,
    # whose inputs stay on the workers); both executors give finish(results, shared), in
    # batch order.
    pytest.importorskip("distributed", reason="Dask 'distributed' is not installed")
    from regional.compute import DaskExecutor

    expected = [sum(sum(part) for part in _expected(i)) + 7 for i in range(4)]
    here = list(InProcessExecutor().map_batches(_finished_batches(4), shared=7))
    assert here == expected
    executor = DaskExecutor(workers=2)
    try:
        assert list(executor.map_batches(_finished_batches(4), ahead=1, shared=7)) == expected
    finally:
        executor.close()


def test_local_workers_are_forked_on_linux_when_dask_is_left_at_spawn():
    assert worker_start_method("spawn", platform="linux") == "fork"
    assert worker_start_method("spawn", platform="darwin") == "spawn"
    assert worker_start_method("spawn", platform="win32") == "spawn"
    assert worker_start_method("forkserver", platform="linux") == "forkserver"


def _client_mark() -> tuple:
    import gc

    import dask

    return (
        getattr(compute, "CLIENT_MARK", None),
        dask.config.get("distributed.worker.profile.enabled"),
        gc.get_freeze_count() > 0,
        {name: dask.config.get(name) for name in compute.QUIET_CLUSTER},
    )


@pytest.mark.skipif(sys.platform != "linux", reason="local workers are forked on Linux only")
def test_local_workers_start_as_copies_of_the_client_with_its_modules_unprofiled(monkeypatch):
    # A forked worker sees a value set in this process before the cluster started (a spawned
    # one would import regional.compute afresh, without it), and the modules it was asked to
    # import are imported here first, so it starts with them.
    pytest.importorskip("distributed", reason="Dask 'distributed' is not installed")
    import dask

    monkeypatch.setattr(compute, "CLIENT_MARK", "set in the client", raising=False)
    with dask.config.set({"distributed.worker.multiprocessing-method": "spawn"}):
        executor = compute.DaskExecutor(workers=1, worker_modules=("regional.pipeline",))
    try:
        assert "regional.pipeline" in sys.modules
        # no statistical profile is sampled on a local worker (no dashboard shows it), and
        # the objects it inherited are frozen (its collections skip them); this process's are
        # not; its event loop and system monitor run at the quieter intervals
        assert list(executor.client.run(_client_mark).values()) == [
            ("set in the client", False, True, compute.QUIET_CLUSTER)
        ]
        assert gc.get_freeze_count() == 0
    finally:
        executor.close()


def test_in_process_start_map_runs_when_its_results_are_asked_for():
    ran = []

    def note(chunk, context):
        ran.append(list(chunk))
        return len(chunk) + context

    wait = InProcessExecutor().start_map(note, [["a"], ["b", "c"]], 10)
    assert ran == []
    assert wait() == [11, 12] and ran == [["a"], ["b", "c"]]


def test_default_executor_is_in_process():
    assert make_executor().name == "in-process"


def test_local_dask_cluster_gives_the_same_loo_scores_as_in_process(tmp_path, region_parts):
    # Two worker processes on this machine (distributed.LocalCluster) against the default
    # in-process run of the same region: loo_scores.csv must be identical.
    pytest.importorskip("distributed", reason="Dask 'distributed' is not installed")
    import pandas as pd
    from tiny_region import write_region

    from regional.cli import main

    folder = write_region(tmp_path / "region", region_parts)
    here, there = tmp_path / "in_process", tmp_path / "cluster"
    assert main(["run", str(folder), "--out", str(here), "--quiet"]) == 0
    assert main(["run", str(folder), "--out", str(there), "--quiet", "--workers", "2"]) == 0
    first = pd.read_csv(here / "loo_scores.csv", dtype={"basin_id": str})
    second = pd.read_csv(there / "loo_scores.csv", dtype={"basin_id": str})
    pd.testing.assert_frame_equal(first, second)
    assert (here / "calibration.csv").read_text() == (there / "calibration.csv").read_text()


def test_keep_freed_memory_is_accepted_on_linux():
    import sys

    from regional.compute import keep_freed_memory

    assert keep_freed_memory() is sys.platform.startswith("linux")


def test_an_address_that_answers_in_another_protocol_is_named_not_a_scheduler():
    # A web server (e.g. the dashboard port) answers with text that a Dask client reads as a huge
    # frame length: that must end in one message naming the address, not "out of memory".
    pytest.importorskip("distributed", reason="Dask 'distributed' is not installed")
    import socket
    import threading

    from regional.errors import RunError

    server = socket.create_server(("127.0.0.1", 0))
    port = server.getsockname()[1]

    def _answer_like_a_web_server():
        connection, _ = server.accept()
        with connection:
            connection.sendall(b"HTTP/1.1 400 Bad Request\r\n\r\n" * 4)
            connection.recv(1024)

    threading.Thread(target=_answer_like_a_web_server, daemon=True).start()
    with pytest.raises(RunError, match=f"127.0.0.1:{port} answered, but not as a Dask scheduler"):
        make_executor(f"tcp://127.0.0.1:{port}", connect_timeout_s=3)
    server.close()


def _region_and_its_store(tmp_path, region_parts):
    """The tiny region, and a copy of it reading its series store (`regional convert`)."""
    from tiny_region import write_region

    from regional.cli import main

    folder = write_region(tmp_path / "region", region_parts)
    store = tmp_path / "store.parquet"
    assert main(["convert", str(folder), "--out", str(store)]) == 0
    region_parts.config["series"]["path"] = str(store)
    return folder, write_region(tmp_path / "from_store", region_parts)


def test_cluster_reading_a_series_store_gives_the_in_process_tables(tmp_path, region_parts):
    # `regional convert` writes the series store; a 2-worker local cluster whose tasks read
    # their own basins from it (calibration, leave-one-out, the held-out check's repeats and
    # the prediction's chunks of ungauged basins) must give the tables of the in-process run
    # from the CSV file.
    pytest.importorskip("distributed", reason="Dask 'distributed' is not installed")

    from regional.cli import main
    from regional.config import load_settings
    from regional.pipeline import _store_reader
    from regional.region import load_region

    folder, from_store = _region_and_its_store(tmp_path, region_parts)
    settings = load_settings(from_store)

    class Cluster:
        name = "dask"

    region = load_region(settings)
    assert _store_reader(region, settings, Cluster(), region.dates) is not None
    here, there = tmp_path / "in_process", tmp_path / "cluster"
    assert main(["run", str(folder), "--out", str(here), "--quiet"]) == 0
    assert main(["run", str(from_store), "--out", str(there), "--quiet", "--workers", "2"]) == 0
    names = ["loo_scores.csv", "calibration.csv", "parameters_ungauged.csv", "coverage.csv"]
    for name in [
        *names,
        "flows_ungauged.csv",
        "statistics_summary.csv",
        "statistics_ungauged.csv",
    ]:
        assert (here / name).read_text() == (there / name).read_text(), name
    # the figures were drawn by the workers (each from the run without its daily series and
    # its own series): the same PNG bytes as drawn here
    drawn = sorted(path.name for path in (here / "figures").glob("*.png"))
    assert drawn and drawn == sorted(path.name for path in (there / "figures").glob("*.png"))
    for name in drawn:
        assert (here / "figures" / name).read_bytes() == (there / "figures" / name).read_bytes()


def test_convert_refuses_a_target_that_is_not_parquet(tmp_path, region_parts, capsys):
    from tiny_region import write_region

    from regional.cli import main

    folder = write_region(tmp_path / "region", region_parts)
    assert main(["convert", str(folder), "--out", str(tmp_path / "store.csv")]) == 2
    assert "a series store is a Parquet file" in capsys.readouterr().err


def test_release_freed_memory_asks_glibc_on_linux_and_is_a_no_op_without_it(monkeypatch):
    import ctypes

    assert compute.release_freed_memory() is sys.platform.startswith("linux")

    def no_libc(name):
        raise OSError(f"{name}: cannot open shared object file")

    monkeypatch.setattr(ctypes, "CDLL", no_libc)
    assert compute.release_freed_memory() is False


def test_the_client_of_a_cluster_run_on_a_store_reads_no_whole_region_grid(
    tmp_path, region_parts, monkeypatch
):
    # Count what the client reads of the series store during a 2-worker run, blocks of 2
    # basins: every read holds at most a block (never the whole region's 6 basins), the file
    # is never streamed whole, and the outputs equal the run whose client holds
    # the grids (the run of test_cluster_reading_a_series_store_gives_the_in_process_tables
    # from the CSV file, in process).
    pytest.importorskip("distributed", reason="Dask 'distributed' is not installed")

    from regional import flowstats, io, series
    from regional.cli import main

    folder, from_store = _region_and_its_store(tmp_path, region_parts)
    here, there = tmp_path / "in_process", tmp_path / "cluster"
    assert main(["run", str(folder), "--out", str(here), "--quiet"]) == 0

    reads, read_groups, blocks = [], io.read_store_groups, io.iter_store_blocks

    def counted_groups(path, groups, columns):
        frame, rows = read_groups(path, groups, columns)
        reads.append((len(groups), len(frame)))
        return frame, rows

    def counted_blocks(path, columns, *, batch_rows):
        for groups, starts, frame in blocks(path, columns, batch_rows=batch_rows):
            reads.append((len(groups), len(frame)))
            yield groups, starts, frame

    def whole(*args, **kwargs):
        raise AssertionError("the client streamed the whole series file")

    per_basin = 1095  # days of each basin's records in the tiny region
    monkeypatch.setattr(series, "STORE_BLOCK", 2)
    monkeypatch.setattr(series, "BATCH_ROWS", 2 * per_basin)
    monkeypatch.setattr(flowstats, "BLOCK_BASINS", 2)
    monkeypatch.setattr(io, "read_store_groups", counted_groups)
    monkeypatch.setattr(io, "iter_store_blocks", counted_blocks)
    monkeypatch.setattr(series, "read_grids", whole)
    monkeypatch.setattr(io, "iter_series", whole)
    assert main(["run", str(from_store), "--out", str(there), "--quiet", "--workers", "2"]) == 0
    assert reads and max(basins for basins, _ in reads) <= 2
    assert max(rows for _, rows in reads) <= 2 * per_basin
    assert sum(rows for _, rows in reads) >= len(region_parts.series)  # the store was checked
    for name in ["loo_scores.csv", "calibration.csv", "coverage.csv", "flows_ungauged.csv"]:
        assert (here / name).read_text() == (there / name).read_text(), name
    for name in ["statistics_summary.csv", "statistics_ungauged.csv", "parameters_ungauged.csv"]:
        assert (here / name).read_text() == (there / name).read_text(), name


def test_a_client_holding_little_gives_freed_memory_back_until_closed(monkeypatch):
    # The cluster's client of a large region returns freed heap memory at once while the
    # executor is open; closing it sets the kept-memory settings again where they were set,
    # and leaves glibc's defaults where they were not.
    pytest.importorskip("distributed", reason="Dask 'distributed' is not installed")
    pads: list[int] = []
    monkeypatch.setattr(compute, "_set_heap_pad", lambda pad: pads.append(pad) or True)
    monkeypatch.setattr(compute, "_KEEPING", [False])  # the session's own flag put back after
    for keeping, expected in ((True, compute.HEAP_PAD_BYTES), (False, None)):
        pads.clear()
        compute.keep_freed_memory() if keeping else compute.return_freed_memory()
        executor = compute.DaskExecutor(workers=1)
        try:
            executor.hold_little()
            assert pads[-1] == compute.DEFAULT_PAD_BYTES
        finally:
            executor.close()
        assert pads[-1] == (expected or compute.DEFAULT_PAD_BYTES)
        assert len(pads) == (3 if keeping else 2)
