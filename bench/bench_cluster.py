"""Cost of running the passes on a dask.distributed cluster, against the same passes on local threads.

Data: bench/out/p20_n{ROWS}_zstd.parquet (run_all.py makes it: 10^7 rows × 20 features + target,
zstd Parquet). The cluster is a LocalCluster of one worker process per core on this machine, so
the figure is the cluster path's overhead (part descriptions out, accumulators back, the merges
as tasks, a process per worker instead of a thread); on a real cluster the parts spread over more
machines. In each of --repeats rounds, one after the other: the fit on local threads, the fit on
the cluster, the second pass (robust sums only, HC3) on local threads and on the cluster, and
predict (to one Parquet file; local: one stream, cluster: a staging file per part, then joined).
Printed: median seconds, the median per-round ratio cluster ÷ local, and this (the client)
process's peak RSS (the workers hold the batches; only accumulators come back).

    PYTHONPATH=src:. python bench/bench_cluster.py --rows 10000000
"""

from __future__ import annotations

import argparse
import resource
import statistics

from _measure import OUT, TARGET, alternating_rounds, features_for, p20_file


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    import distributed

    import tallfit
    from tallfit.engine.cluster import on_cluster
    from tallfit.engine.parallel import worker_count
    from tallfit.engine.second_pass import second_pass

    feats = features_for(20)
    data = str(p20_file(args.rows))
    cluster = distributed.LocalCluster(n_workers=worker_count(None), threads_per_worker=1, processes=True,
                                       dashboard_address=None, silence_logs=50)
    client = distributed.Client(cluster)
    client.wait_for_workers(worker_count(None))
    try:
        model = tallfit.fit(data, TARGET, feats)

        def on(fn):
            def run():
                with on_cluster(client):
                    fn()
            return run

        fit = lambda: tallfit.fit(data, TARGET, feats)  # noqa: E731
        robust = lambda: second_pass(model, data, diagnostics=False)  # noqa: E731
        scored = OUT / "cluster-predictions.parquet"
        score = lambda: tallfit.predict(model, data, out=scored)  # noqa: E731
        cases = {"fit, local threads": fit, "fit, cluster": on(fit),
                 "second pass (HC3), local threads": robust, "second pass (HC3), cluster": on(robust),
                 "predict, local": score, "predict, cluster": on(score)}
        for run in cases.values():
            run()  # numba caches and imports, here and on the workers
        seconds, _ = alternating_rounds(cases, args.repeats)
    finally:
        client.close()
        cluster.close()
    print(f"{args.rows:,} rows × 20 features, LocalCluster of {worker_count(None)} worker processes, "
          f"median of {args.repeats} rounds")
    names = list(cases)
    scored.unlink(missing_ok=True)
    for local, remote in (names[0:2], names[2:4], names[4:6]):
        ratio = statistics.median(r / t for r, t in zip(seconds[remote], seconds[local]))
        print(f"{local:34s} {statistics.median(seconds[local]):6.2f} s")
        print(f"{remote:34s} {statistics.median(seconds[remote]):6.2f} s   × local {ratio:.2f}")
    print(f"peak resident memory of the client process: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB")


if __name__ == "__main__":
    main()
