"""Times the Python peers of the benchmark on the files `cargo bench --bench fits -- --keep DIR`
writes, and prints them beside ratesheet's times from DIR/ratesheet_times.json.

Peers, each run as its own process (whole process: start-up, imports, read, fits), both on the
rows sorted once by region (each group a contiguous slice), BLAS pinned to one thread:
  statsmodels  a loop over regions of sm.GLM(count, X, Poisson(), offset=log(exposure)).fit()
  numpy_irls   a vectorised IRLS per region (X'WX by one matrix product per iteration), the
               regions split over two forked worker processes (--processes)
X is the benchmark's 8-parameter design: intercept, x1, x2, x3, flag, kind (4 levels, 3 dummies).

Run it in a throwaway virtual environment, with numpy's BLAS tuning variables unset:
  python3 -m venv /tmp/peers && /tmp/peers/bin/pip install numpy pyarrow statsmodels
  env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE /tmp/peers/bin/python scripts/bench_peers.py DIR --cases M,L
"""

import argparse
import json
import os
import resource
import subprocess
import sys
import time


def design(table):
    import numpy as np

    kind = table["kind"].to_numpy(zero_copy_only=False)
    levels = sorted(set(kind))
    cols = [np.ones(len(kind))]
    cols += [table[c].to_numpy().astype(float) for c in ("x1", "x2", "x3", "flag")]
    cols += [(kind == lv).astype(float) for lv in levels[1:]]
    return np.column_stack(cols)


def sorted_by_region(table):
    """The table's rows sorted once by region (integer codes, a stable sort), and each region's
    [start, end) bounds in that order: every group is then a contiguous slice, no gather per group."""
    import numpy as np
    import pyarrow as pa

    region = table["region"].combine_chunks().dictionary_encode()
    labels = np.array(region.dictionary.to_pylist(), dtype=object)
    # Codes ranked by label, so that groups come in region order.
    rank = np.empty(len(labels), dtype=np.int64)
    rank[np.argsort(labels)] = np.arange(len(labels))
    codes = rank[region.indices.to_numpy()]
    order = np.argsort(codes, kind="stable")
    table = table.take(pa.array(order))
    sorted_codes = codes[order]
    cuts = np.flatnonzero(np.diff(sorted_codes)) + 1
    bounds = np.concatenate(([0], cuts, [len(order)]))
    return table, list(zip(bounds[:-1], bounds[1:]))


def irls(X, y, offset, tol=1e-10, max_iter=50):
    """Poisson IRLS on one group: X'WX by one matrix product per iteration, one exp per row."""
    import numpy as np

    beta = np.zeros(X.shape[1])
    beta[0] = np.log(max(y.mean(), 1e-8)) - offset.mean()
    dev_old = np.inf
    eta = X @ beta + offset
    mu = np.exp(eta)
    for _ in range(max_iter):
        z = eta - offset + (y - mu) / mu
        Xw = X * mu[:, None]
        beta = np.linalg.solve(Xw.T @ X, Xw.T @ z)
        eta = X @ beta + offset
        mu = np.exp(eta)
        with np.errstate(divide="ignore", invalid="ignore"):
            dev = 2 * np.sum(np.where(y > 0, y * np.log(y / mu), 0.0) - (y - mu))
        if abs(dev - dev_old) <= tol * (abs(dev) + 0.1):
            break
        dev_old = dev
    return beta


def fit_slices(peer, X, y, offset, slices):
    """Fits the groups of `slices` (contiguous row ranges); returns the first group's estimates."""
    first = None
    if peer == "statsmodels":
        import statsmodels.api as sm

        for a, b in slices:
            res = sm.GLM(y[a:b], X[a:b], family=sm.families.Poisson(), offset=offset[a:b]).fit()
            first = res.params if first is None else first
    else:
        for a, b in slices:
            beta = irls(X[a:b], y[a:b], offset[a:b])
            first = beta if first is None else first
    return first


def _fit_half(args):
    peer, half = args
    return list(map(float, fit_slices(peer, *SHARED, half)))


SHARED = None


def run_peer(peer, path, processes):
    """One peer on one file; prints JSON with wall time, peak RSS and the first group's estimates.
    The numpy peer splits the groups over `processes` forked workers (the sorted arrays are
    shared copy-on-write); statsmodels runs in one process."""
    global SHARED
    start = time.perf_counter()
    import numpy as np
    import pyarrow.parquet as pq

    table, slices = sorted_by_region(pq.read_table(path))
    X = np.ascontiguousarray(design(table))
    y = table["count"].to_numpy().astype(float)
    offset = np.log(table["exposure"].to_numpy())
    if peer == "numpy_irls" and processes > 1:
        import multiprocessing as mp

        SHARED = (X, y, offset)
        halves = [slices[i::processes] for i in range(processes)]
        with mp.get_context("fork").Pool(processes) as pool:
            firsts = pool.map(_fit_half, [(peer, h) for h in halves])
        first = firsts[0]
        peak_children = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024
    else:
        first = list(map(float, fit_slices(peer, X, y, offset, slices)))
        peak_children = 0
    wall = time.perf_counter() - start
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(json.dumps({"wall_s": wall, "peak_rss_bytes": peak, "peak_child_rss_bytes": peak_children, "first": first}))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("dir")
    ap.add_argument("--cases", default="S,M")
    ap.add_argument("--peer", help=argparse.SUPPRESS)
    ap.add_argument("--file", help=argparse.SUPPRESS)
    ap.add_argument("--processes", type=int, default=2, help="worker processes of the numpy peer")
    a = ap.parse_args()
    if a.peer:
        run_peer(a.peer, a.file, a.processes)
        return
    times_path = os.path.join(a.dir, "ratesheet_times.json")
    ours = json.load(open(times_path)) if os.path.exists(times_path) else {}
    print(f"{'case':<8} {'peer':<12} {'wall s':>8} {'peak MiB':>9} {'ratesheet s':>12} {'ratio':>7}")
    for case in a.cases.split(","):
        path = os.path.join(a.dir, f"bench_{case}.parquet")
        results = {}
        for peer in ("statsmodels", "numpy_irls"):
            started = time.perf_counter()
            # BLAS pinned to one thread per process: the numpy peer's parallelism is its worker
            # processes, statsmodels runs single-threaded.
            env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1", MKL_NUM_THREADS="1")
            out = subprocess.run(
                [sys.executable, __file__, a.dir, "--peer", peer, "--file", path, "--processes", str(a.processes)],
                check=True,
                capture_output=True,
                text=True,
                env=env,
            )
            results[peer] = json.loads(out.stdout.strip().splitlines()[-1])
            # Whole process, interpreter start-up included, as seen from outside.
            results[peer]["wall_s"] = time.perf_counter() - started
        # Both peers fit the same model: their first-group estimates must agree.
        import numpy as np

        a1, a2 = (np.array(results[p]["first"]) for p in ("statsmodels", "numpy_irls"))
        assert np.allclose(a1, a2, rtol=1e-6, atol=1e-8), (a1, a2)
        whole = ours.get(f"{case}_whole_process", {}).get("wall_s")
        in_process = ours.get(case, {}).get("fit_s")
        mine = whole if whole is not None else in_process
        label = "whole" if whole is not None else "query"
        for peer, r in results.items():
            ours_text = f"{mine:>8.3f} {label:<5}{r['wall_s'] / mine:>6.1f}x" if mine else f"{'n/a':>8} {'':<5}{'n/a':>7}"
            peak = max(r["peak_rss_bytes"], r.get("peak_child_rss_bytes", 0))
            print(f"{case:<8} {peer:<12} {r['wall_s']:>8.2f} {peak / 2**20:>9.0f} {ours_text}")


if __name__ == "__main__":
    main()
