"""Does a 2-worker local Dask cluster pay off on a chain dominated by calibration (GR4J)?

Builds one invented region (the generator of ``large_region.py``; N basins x Y years, model
GR4J), writes its series store (``regional convert``), then runs the whole chain twice, each in
a fresh child process, one after the other on this machine:

- in-process (the default);
- on a local cluster of 2 worker processes, one thread each, whose tasks read their own basins
  from the series store (nothing daily is scattered).

numba's cache is filled first, untimed, by the same chain on a small region in process and on
the cluster (the cache is keyed by the source path: on a fresh checkout the first chain would
compile every kernel, about 40 s, and the other route find them compiled). With ``--pairs N``
the two runs are repeated N times, alternating; each pair's speed-up is printed with the
median, the least and the greatest, and a pair during which numba's cache changed is marked.

Printed (for the pair of the median speed-up, besides the list of pairs): the whole-chain
speed-up and, separately, the speed-up of the distributed stages
(calibration, leave-one-out, the held-out check of the fitted region and prediction); the time
of every stage, of writing the outputs and outside the stages (starting and closing the
cluster); the CPU time of the in-process run and of the cluster's client and workers (the
work each route does: a loaded machine changes it far less than wall time); the bytes the
client scattered to the workers per stage (per repeat of the held-out
check) and the bytes of results gathered back, per chunk. Before
each run, the load average and how much more work two processes did than one in a short spin
(about 2 on an idle 2-core machine, about 1 when other work keeps the cores busy): no cluster
can gain more than that, so read the ratios with it.

Run:  python benchmarks/cluster_speedup.py [--basins 60] [--years 10] [--pairs 1] [--save F]
Every value of the synthetic region is invented.
"""

from __future__ import annotations

import argparse
import json
import os
import pickle
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from large_region import make_region


def _shipping(chunks, context, results) -> dict:
    return {
        "chunks": len(chunks),
        "scattered_bytes": len(pickle.dumps(context)),
        "sent_bytes": sum(len(pickle.dumps(list(c))) for c in chunks),
        "gathered_bytes": sum(len(pickle.dumps(r)) for r in results),
    }


def _measure_shipping(record: list) -> None:
    """Wrap DaskExecutor.map, map_batches, map_keeping and start_map to count the pickled
    bytes scattered and gathered per stage (per batch: a repeat of the held-out check)."""
    from regional import compute

    original, batches = compute.DaskExecutor.map, compute.DaskExecutor.map_batches

    def counted(self, function, chunks, context, *, progress=None):
        results = original(self, function, chunks, context, progress=progress)
        record.append(_shipping(chunks, context, results))
        return results

    def counted_batches(self, items, *, ahead=compute.BATCHES_AHEAD, shared=None, keep=False):
        items = list(items)
        shared_bytes = len(pickle.dumps(shared)) if shared is not None else 0  # once
        for (_, chunks, context, *finish), results in zip(
            items, batches(self, items, ahead=ahead, shared=shared, keep=keep), strict=True
        ):
            # a batch finished on the workers sends back only what its finishing task gives
            # (with ``keep``: the small part; the kept part stays on a worker)
            gathered = results[0] if finish and keep else results
            shipped = _shipping(chunks, context, [gathered] if finish else gathered)
            if finish:
                shipped["finished"] = True
                shipped["shared_bytes"] = shared_bytes
            record.append(shipped)
            yield results

    keeping = compute.DaskExecutor.map_keeping

    def counted_keeping(self, function, chunks, context, *, progress=None):
        # the daily blocks stay on the workers: only the small parts are gathered
        small, kept = keeping(self, function, chunks, context, progress=progress)
        record.append(_shipping(chunks, context, small) | {"kept": True})
        return small, kept

    started = compute.DaskExecutor.start_map

    def counted_start(self, function, chunks, context, *, priority=0):
        wait = started(self, function, chunks, context, priority=priority)

        def gather():
            results = wait()
            record.append(_shipping(chunks, context, results))
            return results

        return gather

    compute.DaskExecutor.map = counted
    compute.DaskExecutor.map_batches = counted_batches
    compute.DaskExecutor.map_keeping = counted_keeping
    compute.DaskExecutor.start_map = counted_start


def _cpu_seconds() -> float:
    """User + system CPU time of this process, s."""
    import resource

    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


def _measure_worker_cpu(record: dict) -> None:
    """Wrap DaskExecutor.close to add up the workers' CPU seconds before they stop."""
    from regional import compute

    original = compute.DaskExecutor.close

    def close(self):
        record["workers_cpu_s"] = sum(self.client.run(_cpu_seconds).values())
        original(self)

    compute.DaskExecutor.close = close


def _process_cpu_seconds() -> dict[str, float]:
    """CPU seconds (user + system) of this process and of all its descendants (on a local
    cluster: the nanny and worker processes), read without asking the cluster anything."""
    import psutil

    me = psutil.Process()
    children = 0.0
    for process in me.children(recursive=True):
        try:
            times = process.cpu_times()
        except psutil.Error:
            continue
        children += times.user + times.system
    return {"client": _cpu_seconds(), "children": children}


class _StageClock:
    """Stand-in for the pipeline's ``time`` module: every ``perf_counter()`` the pipeline
    calls (one at the start and one at the end of each stage) also notes the CPU seconds of
    this process and of its children, so each stage's work is split into client and workers."""

    def __init__(self) -> None:
        self.marks: list[tuple[float, dict[str, float]]] = []

    def perf_counter(self) -> float:
        now = time.perf_counter()
        self.marks.append((now, _process_cpu_seconds()))
        return now


def _stage_cpu(timings: dict, marks: list) -> dict[str, dict[str, float]]:
    """Per stage: CPU seconds of the client and of its children between its two marks."""
    if len(marks) != 2 * len(timings):
        return {}
    out = {}
    for number, stage in enumerate(timings):
        (_, start), (_, end) = marks[2 * number], marks[2 * number + 1]
        out[stage] = {part: end[part] - start[part] for part in start}
    return out


def child(folder: str, workers: int) -> None:
    """Run the chain on the region in ``folder`` and write its outputs, as ``regional run``
    does (one executor for both: on the cluster the workers draw the figures); print one JSON
    line."""
    import warnings

    from regional import pipeline
    from regional.compute import keep_freed_memory
    from regional.config import load_settings
    from regional.outputs import write_outputs

    warnings.simplefilter("ignore")
    keep_freed_memory()
    shipping: list[dict] = []
    _measure_shipping(shipping)
    cpu = {"workers_cpu_s": 0.0}
    _measure_worker_cpu(cpu)
    out = Path(folder) / f"results_{workers}"
    clock = _StageClock()
    pipeline.time = clock
    cpu_start = _cpu_seconds()
    start = time.perf_counter()
    settings = load_settings(folder)
    executor = pipeline.open_executor(settings, workers=workers or None)
    try:
        result = pipeline.run(settings, executor=executor)
        ran = time.perf_counter()
        before_outputs = _process_cpu_seconds()
        write_outputs(result, out, executor=executor)
        written = time.perf_counter()
        after = _process_cpu_seconds()
        children = clock.marks[-1][1]["children"] if clock.marks else 0.0
        children += after["children"] - before_outputs["children"]
    finally:
        executor.close()
    seconds = time.perf_counter() - start
    timings = dict(result.timings)
    stage_cpu = _stage_cpu(timings, clock.marks)
    stage_cpu["outputs"] = {p: after[p] - before_outputs[p] for p in after}
    timings["outside the stages (cluster start and close)"] = (
        seconds - (written - ran) - sum(timings.values())
    )
    timings["outputs"] = written - ran
    cpu["client_cpu_s"] = _cpu_seconds() - cpu_start
    row = {"seconds": seconds, "timings": timings, "stage_cpu": stage_cpu, "shipping": shipping}
    row["children_cpu_s"] = children
    print(json.dumps(row | cpu))


def _spin(_: int = 0) -> float:
    start = time.perf_counter()
    total = 0
    for i in range(10_000_000):
        total += i
    return time.perf_counter() - start


def parallel_capacity() -> float:
    """Work done per second by two processes at once over one alone: about 2 on an idle
    2-core machine, about 1 when other work already keeps the cores busy."""
    from concurrent.futures import ProcessPoolExecutor

    with ProcessPoolExecutor(2) as pool:
        list(pool.map(_spin, [0, 0]))  # start both processes first
        alone = pool.submit(_spin).result()
        together = max(pool.map(_spin, [0, 0]))
    return 2 * alone / together


def build(folder: Path, n_basins: int, years: int) -> None:
    """The invented region with GR4J, its series read from a series store."""
    from regional.region import convert_series

    make_region(folder, n_basins, years)
    toml = folder / "region.toml"
    text = toml.read_text().replace('name = "linear"', 'name = "gr4j"')
    toml.write_text(text)
    convert_series(folder, folder / "store.parquet")
    toml.write_text(text.replace('path = "series.parquet"', 'path = "store.parquet"'))


WARM_BASINS, WARM_YEARS = 24, 3
"""The small region whose untimed chains, in process and on the cluster, fill numba's cache."""


def measure(folder: Path, workers: int) -> dict:
    """One chain in a fresh child (``workers`` 0: in process), its outputs then removed."""
    load = os.getloadavg()[0]
    capacity = parallel_capacity()
    command = [sys.executable, __file__, "--child", str(folder), str(workers)]
    output = subprocess.run(command, check=True, capture_output=True, text=True).stdout
    shutil.rmtree(folder / f"results_{workers}", ignore_errors=True)
    row = json.loads(output.strip().splitlines()[-1])
    row["load_before"] = load
    row["capacity"] = capacity
    return row


def _numba_cache() -> dict[str, tuple[int, int]]:
    """numba's cache files of the package run (index and code of every compiled kernel), with
    their size and modification time: a change means a kernel was compiled."""
    import importlib.util

    spec = importlib.util.find_spec("regional")
    files = {}
    for root in spec.submodule_search_locations:
        for path in Path(root).rglob("*.nb[ic]"):
            stat = path.stat()
            files[str(path)] = (stat.st_size, stat.st_mtime_ns)
    return files


def warm(folder: Path) -> tuple[float, int]:
    """Fill numba's cache for both routes before anything is timed: the chain on a small
    invented region in process and on the 2-worker cluster (whose tasks read the store:
    other array signatures), untimed. The cache is keyed by the source path, so on a fresh
    checkout the first chain compiles every kernel (about 40 s): the in-process child would
    pay it and the cluster child find it done. Returns the seconds taken and the cache files
    written or changed."""
    folder.mkdir()
    build(folder, WARM_BASINS, WARM_YEARS)
    before = _numba_cache()
    start = time.perf_counter()
    measure(folder, 0)
    measure(folder, 2)
    after = _numba_cache()
    return time.perf_counter() - start, sum(after.get(k) != v for k, v in before.items()) + len(
        after.keys() - before.keys()
    )


def _pairs(folder: Path, n_pairs: int) -> list[dict]:
    """``n_pairs`` chains in process and on the cluster, alternating; each pair notes whether
    numba's cache changed during it (a kernel compiled: that pair's times include it)."""
    pairs = []
    for _ in range(n_pairs):
        before = _numba_cache()
        local = measure(folder, 0)
        cluster = measure(folder, 2)
        pair = {"local": local, "cluster": cluster, "compiled": _numba_cache() != before}
        pair["ratio"] = local["seconds"] / cluster["seconds"]
        pair["work"] = (cluster["client_cpu_s"] + cluster["workers_cpu_s"]) / local["client_cpu_s"]
        pairs.append(pair)
    return pairs


def _median_pair(pairs: list[dict]) -> dict:
    """The pair of the median speed-up (of an even count, the lower of the middle two)."""
    ranked = sorted(pairs, key=lambda pair: pair["ratio"])
    return ranked[(len(ranked) - 1) // 2]


def _print_pairs(pairs: list[dict]) -> None:
    for number, pair in enumerate(pairs, start=1):
        local, cluster = pair["local"], pair["cluster"]
        compiled = "  NUMBA COMPILED DURING THIS PAIR" if pair["compiled"] else ""
        print(
            f"  pair {number}: in process {local['seconds']:.1f} s -> cluster "
            f"{cluster['seconds']:.1f} s, {pair['ratio']:.2f} x; the cluster's work "
            f"{pair['work']:.2f} x one process's (load average {local['load_before']:.1f} / "
            f"{cluster['load_before']:.1f}; two processes did {local['capacity']:.2f} / "
            f"{cluster['capacity']:.2f} x the work of one){compiled}"
        )
    ratios = sorted(pair["ratio"] for pair in pairs)
    works = sorted(pair["work"] for pair in pairs)
    print(
        f"whole chain speed-up: median {statistics.median(ratios):.2f} x (min {ratios[0]:.2f}, "
        f"max {ratios[-1]:.2f}; {len(pairs)} pairs)   (target >= 1.6 on 2 cores); the "
        f"cluster's work: median {statistics.median(works):.2f} x one process's (min "
        f"{works[0]:.2f}, max {works[-1]:.2f})"
    )


def _print_stages(local: dict, cluster: dict) -> None:
    print("CPU seconds per stage, in process -> cluster client + cluster worker processes:")
    for stage, local_cpu in local["stage_cpu"].items():
        remote = cluster["stage_cpu"].get(stage)
        if remote is None:
            continue
        print(
            f"  {stage:22s} {local_cpu['client']:6.1f} s -> {remote['client']:6.1f} s + "
            f"{remote['children']:6.1f} s (wall {local['timings'][stage]:6.1f} s -> "
            f"{cluster['timings'][stage]:6.1f} s)"
        )
    in_stages = sum(cpu["children"] for cpu in cluster["stage_cpu"].values())
    print(
        f"  worker processes outside the stages (start, imports, warm-up): "
        f"{cluster['children_cpu_s'] - in_stages:.1f} s"
    )
    work = cluster["client_cpu_s"] + cluster["workers_cpu_s"]
    print(
        f"work (CPU seconds, which the load changes far less than wall time): in process "
        f"{local['client_cpu_s']:.1f} s; cluster {work:.1f} s (client "
        f"{cluster['client_cpu_s']:.1f} s, workers {cluster['workers_cpu_s']:.1f} s), "
        f"{work / local['client_cpu_s']:.2f} x the work"
    )


def _print_shipping(cluster: dict) -> None:
    for stage in cluster["shipping"]:
        scattered = stage["scattered_bytes"] / 1e3
        sent = stage["sent_bytes"] / stage["chunks"] / 1e3
        if stage.get("finished"):
            print(
                f"  stage of {stage['chunks']} chunks finished on the workers: scattered once "
                f"{scattered:.0f} kB (and {stage['shared_bytes'] / 1e3:.0f} kB once for all "
                f"such stages); sent {sent:.0f} kB per chunk; gathered "
                f"{stage['gathered_bytes'] / 1e3:.0f} kB in all"
            )
            continue
        per_chunk = stage["gathered_bytes"] / stage["chunks"] / 1e3
        kept = " (its daily blocks kept on the workers)" if stage.get("kept") else ""
        print(
            f"  stage of {stage['chunks']} chunks{kept}: scattered once {scattered:.0f} kB; "
            f"sent {sent:.0f} kB and gathered {per_chunk:.0f} kB per chunk"
        )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--basins", type=int, default=60)
    parser.add_argument("--years", type=int, default=10)
    parser.add_argument(
        "--pairs", type=int, default=1, help="in-process / cluster pairs run alternately"
    )
    parser.add_argument("--save", type=Path, help="write every pair's measurements (JSON)")
    parser.add_argument("--child", nargs=2, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        child(args.child[0], int(args.child[1]))
        return
    if args.pairs < 1:
        parser.error(f"--pairs must be at least 1: got {args.pairs}")
    with tempfile.TemporaryDirectory() as tmp:
        warm_s, compiled = warm(Path(tmp) / "warm")
        folder = Path(tmp) / "region"
        folder.mkdir()
        build(folder, args.basins, args.years)
        pairs = _pairs(folder, args.pairs)
    if args.save:
        args.save.write_text(json.dumps(pairs))
    print(
        f"GR4J chain, {args.basins} basins x {args.years} years (invented), {os.cpu_count()} cores"
    )
    print(
        f"numba's cache warmed first, untimed: the chain on {WARM_BASINS} basins x {WARM_YEARS} "
        f"years in process and on the cluster ({warm_s:.1f} s; {compiled} cache files written)"
    )
    _print_pairs(pairs)
    middle = _median_pair(pairs)
    local, cluster = middle["local"], middle["cluster"]
    print(f"the pair of the median speed-up ({middle['ratio']:.2f} x):")
    for name, row in (("in-process", local), ("2-worker cluster", cluster)):
        parts = ", ".join(f"{k} {v:.1f} s" for k, v in row["timings"].items())
        print(f"  {name:17s} {row['seconds']:7.1f} s  [{parts}]")
    _print_stages(local, cluster)
    stages = ("calibration_gr4j", "leave_one_out_gr4j", "fitted_region", "prediction")
    spread = [sum(row["timings"][s] for s in stages) for row in (local, cluster)]
    print(
        f"distributed stages (calibration, leave-one-out, the held-out check of the fitted "
        f"region, prediction): {spread[0]:.1f} s -> "
        f"{spread[1]:.1f} s, {spread[0] / spread[1]:.2f} x"
    )
    _print_shipping(cluster)


if __name__ == "__main__":
    main()
