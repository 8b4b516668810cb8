"""hnswlib reference run for examples/hnsw_bench.rs.

Reads data.npy, queries.npy and truth.npy (exact top-k row indices) from the
directory given as the first argument, builds an hnswlib index with the given M and
ef_construction on one thread, sweeps ef_search, times saving and reloading the index
(median of REPEATS loads) and prints one JSON object on stdout.

usage: hnswlib_reference.py DIR M EF_CONSTRUCTION REPEATS EF [EF ...]
"""

import json
import statistics
import sys
import time
from pathlib import Path

import hnswlib
import numpy as np


def main() -> None:
    directory = Path(sys.argv[1])
    m, ef_construction, repeats = (int(a) for a in sys.argv[2:5])
    ef_values = [int(a) for a in sys.argv[5:]]
    data = np.load(directory / "data.npy")
    queries = np.load(directory / "queries.npy")
    truth = np.load(directory / "truth.npy")
    k = truth.shape[1]

    # Inner-product space: distance 1 - <a, b>, cosine for L2-normalised rows.
    index = hnswlib.Index(space="ip", dim=data.shape[1])
    index.init_index(max_elements=data.shape[0], M=m, ef_construction=ef_construction, random_seed=100)
    index.set_num_threads(1)
    started = time.perf_counter()
    index.add_items(data, np.arange(data.shape[0]), num_threads=1)
    build_s = time.perf_counter() - started

    sweep = []
    for ef in ef_values:
        index.set_ef(ef)
        rates = []
        labels = None
        for _ in range(repeats):
            started = time.perf_counter()
            labels, _ = index.knn_query(queries, k=k, num_threads=1)
            rates.append(len(queries) / (time.perf_counter() - started))
        hits = sum(len(set(found) & set(expected)) for found, expected in zip(labels, truth))
        sweep.append({"ef": ef, "recall": hits / truth.size, "qps": statistics.median(rates)})

    saved = directory / "hnswlib.bin"
    index.save_index(str(saved))
    load_times = []
    for _ in range(repeats):
        started = time.perf_counter()
        reloaded = hnswlib.Index(space="ip", dim=data.shape[1])
        reloaded.load_index(str(saved), max_elements=data.shape[0])
        load_times.append(time.perf_counter() - started)
        del reloaded
    saved.unlink()
    json.dump(
        {"build_s": build_s, "sweep": sweep, "load_s": statistics.median(load_times)},
        sys.stdout,
    )


if __name__ == "__main__":
    main()
