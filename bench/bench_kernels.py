"""Accumulator kernels against the machine's dgemm rate, in one process.

    python bench/bench_kernels.py K [--rows M] [--threads 1|2]

Folds M × K random rows (in blocks as the engine makes them) with the Householder kernel
(tsqr.fold_rows, dtpqrt on row tiles) and the Gram kernel (np.dot), split over `threads` threads
each with one BLAS thread as the engine runs them, and times a 2000 × 2000 dgemm on all cores.
Flop counts: QR 2·m·k² (Householder on tall rows), Gram m·k² (one triangle), dgemm 2n³.
"""

from __future__ import annotations

import argparse
import threading
import time

import numpy as np

from _measure import report


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("k", type=int)
    ap.add_argument("--rows", type=int, default=200_000)
    ap.add_argument("--threads", type=int, default=2)
    args = ap.parse_args()
    from tallfit.engine.passes import block_rows
    from tallfit.kernels.lapack_calls import single_blas_thread
    from tallfit.kernels.tsqr import fold_rows

    k, m, w = args.k, args.rows, args.threads
    rows = block_rows(65_536, k)
    rng = np.random.default_rng(0)
    block = np.asfortranarray(rng.standard_normal((rows, k)))
    blocks = max(1, m // rows)

    def run(kernel) -> float:
        def work(count):
            with single_blas_thread():
                R = np.zeros((k, k))
                G = np.zeros((k, k))
                for _ in range(count):
                    if kernel == "qr":
                        R = fold_rows(R, block)
                    else:
                        G += np.dot(block.T, block)
        work(1)  # warm up
        shares = [blocks // w + (1 if i < blocks % w else 0) for i in range(w)]
        threads = [threading.Thread(target=work, args=(s,)) for s in shares]
        t = time.perf_counter()
        for th in threads:
            th.start()
        for th in threads:
            th.join()
        return time.perf_counter() - t

    n = blocks * rows
    t_qr, t_gram = run("qr"), run("gram")
    A = np.asfortranarray(rng.standard_normal((2000, 2000)))
    np.dot(A, A)
    t = time.perf_counter()
    for _ in range(3):
        np.dot(A, A)
    t_mm = (time.perf_counter() - t) / 3
    dgemm = 2 * 2000**3 / t_mm / 1e9
    qr = 2 * n * k * k / t_qr / 1e9
    gram = n * k * k / t_gram / 1e9
    report({"seconds": t_qr, "rows": n, "rows_per_s": n / t_qr, "k": k, "threads": w,
            "qr_gflops": qr, "gram_gflops": gram, "dgemm_gflops": dgemm,
            "qr_share_of_dgemm": qr / dgemm, "gram_share_of_dgemm": gram / dgemm})


if __name__ == "__main__":
    main()
