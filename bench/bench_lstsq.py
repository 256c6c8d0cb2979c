"""Floor: read the whole table into memory, build [1 | X] and call numpy.linalg.lstsq.

    python bench/bench_lstsq.py FILE P [--coef OUT.npy]
"""

from __future__ import annotations

import argparse

import numpy as np

from _measure import TARGET, features_for, report, timed


def fit_in_memory(path: str, features: list[str]) -> np.ndarray:
    import pyarrow.parquet as pq

    table = pq.read_table(path, columns=features + [TARGET])
    X = np.column_stack([np.ones(table.num_rows)] + [table.column(c).to_numpy() for c in features])
    y = table.column(TARGET).to_numpy()
    return np.linalg.lstsq(X, y, rcond=None)[0]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("path")
    ap.add_argument("p", type=int)
    ap.add_argument("--coef", default=None)
    args = ap.parse_args()
    import pyarrow.parquet  # noqa: F401  (imports are not part of the measurement)

    seconds, beta = timed(lambda: fit_in_memory(args.path, features_for(args.p)))
    if args.coef:
        np.save(args.coef, beta)
    import pyarrow.parquet as pq

    rows = pq.ParquetFile(args.path).metadata.num_rows
    report({"seconds": seconds, "rows": rows, "rows_per_s": rows / seconds})


if __name__ == "__main__":
    main()
