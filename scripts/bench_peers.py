"""Times the Python peers of the benchmark on the files `cargo bench --bench fits -- --keep DIR`
writes, and prints them beside ratesheet's times from DIR/ratesheet_times.json.

Peers, each run as its own process (whole process: start-up, imports, read, fits):
  statsmodels  a loop over regions of sm.GLM(count, X, Poisson(), offset=log(exposure)).fit()
  numpy_irls   a loop over regions of a vectorised IRLS (X'WX solve per iteration)
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


def groups_of(table):
    import numpy as np

    region = table["region"].to_numpy(zero_copy_only=False)
    order = np.argsort(region, kind="stable")
    keys, starts = np.unique(region[order], return_index=True)
    bounds = list(starts) + [len(order)]
    return [order[bounds[i] : bounds[i + 1]] for i in range(len(keys))]


def irls(X, y, offset, tol=1e-10, max_iter=50):
    import numpy as np

    beta = np.zeros(X.shape[1])
    beta[0] = np.log(max(y.mean(), 1e-8)) - offset.mean()
    dev_old = np.inf
    for _ in range(max_iter):
        eta = X @ beta + offset
        mu = np.exp(eta)
        z = eta - offset + (y - mu) / mu
        XtW = X.T * mu
        beta = np.linalg.solve(XtW @ X, XtW @ z)
        mu = np.exp(X @ beta + offset)
        with np.errstate(divide="ignore", invalid="ignore"):
            dev = 2 * np.sum(np.where(y > 0, y * np.log(y / mu), 0.0) - (y - mu))
        if abs(dev - dev_old) <= tol * (abs(dev) + 0.1):
            break
        dev_old = dev
    return beta


def run_peer(peer, path):
    """One peer on one file; prints JSON with wall time, peak RSS and the first group's estimates."""
    start = time.perf_counter()
    import numpy as np
    import pyarrow.parquet as pq

    table = pq.read_table(path)
    X = design(table)
    y = table["count"].to_numpy().astype(float)
    offset = np.log(table["exposure"].to_numpy())
    first = None
    if peer == "statsmodels":
        import statsmodels.api as sm

        for rows in groups_of(table):
            res = sm.GLM(y[rows], X[rows], family=sm.families.Poisson(), offset=offset[rows]).fit()
            first = res.params if first is None else first
    else:
        for rows in groups_of(table):
            b = irls(X[rows], y[rows], offset[rows])
            first = b if first is None else first
    wall = time.perf_counter() - start
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(json.dumps({"wall_s": wall, "peak_rss_bytes": peak, "first": list(map(float, first))}))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("dir")
    ap.add_argument("--cases", default="S,M")
    ap.add_argument("--peer", help=argparse.SUPPRESS)
    ap.add_argument("--file", help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.peer:
        run_peer(a.peer, a.file)
        return
    times_path = os.path.join(a.dir, "ratesheet_times.json")
    ours = json.load(open(times_path)) if os.path.exists(times_path) else {}
    print(f"{'case':<8} {'peer':<12} {'wall s':>8} {'peak MiB':>9} {'ratesheet s':>12} {'ratio':>7}")
    for case in a.cases.split(","):
        path = os.path.join(a.dir, f"bench_{case}.parquet")
        results = {}
        for peer in ("statsmodels", "numpy_irls"):
            started = time.perf_counter()
            out = subprocess.run(
                [sys.executable, __file__, a.dir, "--peer", peer, "--file", path],
                check=True,
                capture_output=True,
                text=True,
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
            print(f"{case:<8} {peer:<12} {r['wall_s']:>8.2f} {r['peak_rss_bytes'] / 2**20:>9.0f} {ours_text}")


if __name__ == "__main__":
    main()
