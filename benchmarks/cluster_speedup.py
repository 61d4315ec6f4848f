"""Does a 2-worker local Dask cluster pay off on a chain dominated by calibration (GR4J)?

Builds one invented region (the generator of ``large_region.py``; N basins x Y years, model
GR4J), writes its series store (``regional convert``), then runs the whole chain twice, each in
a fresh child process, one after the other on this machine:

- in-process (the default);
- on a local cluster of 2 worker processes, one thread each, whose tasks read their own basins
  from the series store (nothing daily is scattered).

Printed: the whole-chain speed-up and, separately, the speed-up of the distributed stages
(calibration, leave-one-out, the held-out check of the fitted region and prediction); the time
of every stage, of writing the outputs and outside the stages (starting and closing the
cluster); the CPU time of the in-process run and of the cluster's client and workers (the
work each route does: a loaded machine changes it far less than wall time); the bytes the
client scattered to the workers per stage (per repeat of the held-out
check) and the bytes of results gathered back, per chunk. Before
each run, the load average and how much more work two processes did than one in a short spin
(about 2 on an idle 2-core machine, about 1 when other work keeps the cores busy): no cluster
can gain more than that, so read the ratios with it.

Run:  python benchmarks/cluster_speedup.py [--basins 60] [--years 10]
Every value of the synthetic region is invented.
"""

from __future__ import annotations

import argparse
import json
import os
import pickle
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


def measure(folder: Path, workers: int) -> dict:
    load = os.getloadavg()[0]
    capacity = parallel_capacity()
    command = [sys.executable, __file__, "--child", str(folder), str(workers)]
    output = subprocess.run(command, check=True, capture_output=True, text=True).stdout
    row = json.loads(output.strip().splitlines()[-1])
    row["load_before"] = load
    row["capacity"] = capacity
    return row


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--basins", type=int, default=60)
    parser.add_argument("--years", type=int, default=10)
    parser.add_argument("--child", nargs=2, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        child(args.child[0], int(args.child[1]))
        return
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        build(folder, args.basins, args.years)
        local = measure(folder, 0)
        cluster = measure(folder, 2)
    stages = ("calibration_gr4j", "leave_one_out_gr4j", "fitted_region", "prediction")
    spread = [sum(row["timings"][s] for s in stages) for row in (local, cluster)]
    print(
        f"GR4J chain, {args.basins} basins x {args.years} years (invented), {os.cpu_count()} cores"
    )
    for name, row in (("in-process", local), ("2-worker cluster", cluster)):
        parts = ", ".join(f"{k} {v:.1f} s" for k, v in row["timings"].items())
        print(
            f"  {name:17s} {row['seconds']:7.1f} s (before it: load average "
            f"{row['load_before']:.1f}, two processes did {row['capacity']:.2f} x the work of "
            f"one)  [{parts}]"
        )
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
    print(
        f"whole chain speed-up: {local['seconds'] / cluster['seconds']:.2f} x   "
        "(target >= 1.6 on 2 cores)"
    )
    print(
        f"distributed stages (calibration, leave-one-out, the held-out check of the fitted "
        f"region, prediction): {spread[0]:.1f} s -> "
        f"{spread[1]:.1f} s, {spread[0] / spread[1]:.2f} x"
    )
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


if __name__ == "__main__":
    main()
