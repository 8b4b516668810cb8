"""hnswlib side of examples/hnsw_bench.rs, driven one step at a time.

Reads data.npy, queries.npy and truth.npy (exact top-k row indices) from the
directory given as the first argument, then answers one command per line on stdin
with one JSON object per line on stdout, so that the benchmark can alternate its own
steps with hnswlib's and a slow spell of the machine hits both sides:

  build         builds a new index on one thread     -> {"build_s": seconds}
  search EF     one pass over the queries at ef EF   -> {"qps": rate, "recall": recall@k}
  load          saves the index and times a reload   -> {"load_s": seconds}

usage: hnswlib_reference.py DIR M EF_CONSTRUCTION
"""

import json
import sys
import time
from pathlib import Path

import hnswlib
import numpy as np


def main() -> None:
    directory = Path(sys.argv[1])
    m, ef_construction = (int(a) for a in sys.argv[2:4])
    data = np.load(directory / "data.npy")
    queries = np.load(directory / "queries.npy")
    truth = np.load(directory / "truth.npy")
    k = truth.shape[1]
    index = None

    for line in sys.stdin:
        command, *args = line.split()
        if command == "build":
            # Inner-product space: distance 1 - <a, b>, cosine for L2-normalised rows.
            index = hnswlib.Index(space="ip", dim=data.shape[1])
            index.init_index(
                max_elements=data.shape[0], M=m, ef_construction=ef_construction, random_seed=100
            )
            index.set_num_threads(1)
            started = time.perf_counter()
            index.add_items(data, np.arange(data.shape[0]), num_threads=1)
            answer = {"build_s": time.perf_counter() - started}
        elif command == "search":
            index.set_ef(int(args[0]))
            started = time.perf_counter()
            labels, _ = index.knn_query(queries, k=k, num_threads=1)
            rate = len(queries) / (time.perf_counter() - started)
            hits = sum(len(set(found) & set(expected)) for found, expected in zip(labels, truth))
            answer = {"qps": rate, "recall": hits / truth.size}
        elif command == "load":
            saved = directory / "hnswlib.bin"
            index.save_index(str(saved))
            started = time.perf_counter()
            reloaded = hnswlib.Index(space="ip", dim=data.shape[1])
            reloaded.load_index(str(saved), max_elements=data.shape[0])
            answer = {"load_s": time.perf_counter() - started}
            del reloaded
            saved.unlink()
        else:
            raise SystemExit(f"unknown command {command!r}")
        print(json.dumps(answer), flush=True)


if __name__ == "__main__":
    main()
