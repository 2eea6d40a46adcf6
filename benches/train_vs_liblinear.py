#!/usr/bin/env python3
"""Times tamis's dual coordinate descent against liblinear-official on one svmlight file.

Generates the file once with `examples/gen_svmlight.rs` (seeded), then for each loss trains
tamis (`examples/train_svmlight.rs`, release build; the time covers training only) and
liblinear-official's `train` with the same options (`-s 3` hinge / `-s 1` squared hinge,
`-c C -B 1 -e EPS -q`; the time covers `train` only, the data already in liblinear's
structures). Both objectives are the same primal formula, 0.5*(|w|^2 + w_b^2) + C*sum(loss),
tamis's computed in Rust, liblinear's here with numpy. Reports the best of --repeat runs.

Run from anywhere: python benches/train_vs_liblinear.py [--rows 20000 --dims 262144 ...]
(use the .venv interpreter, which has liblinear-official and scikit-learn).
"""
import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

import numpy as np
from liblinear.liblinearutil import problem, svm_read_problem, train
from sklearn.datasets import load_svmlight_file

CRATE = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def cargo_example(name, *args):
    cmd = ["cargo", "run", "--quiet", "--release", "--example", name, "--"] + [str(a) for a in args]
    return subprocess.run(cmd, cwd=CRATE, check=True, capture_output=True, text=True).stdout


def primal_objective(X, y, w, b, c, loss):
    margins = 1.0 - y * (X @ w + b)
    xi = np.maximum(margins, 0.0)
    if loss == "squared_hinge":
        xi = xi * xi
    return 0.5 * (w @ w + b * b) + c * xi.sum()


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=20000)
    ap.add_argument("--dims", type=int, default=1 << 18)
    ap.add_argument("--seed", type=int, default=42)
    ap.add_argument("--c", type=float, default=1.0)
    ap.add_argument("--eps", type=float, default=0.1)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--file", help="use this svmlight file instead of generating one")
    args = ap.parse_args()

    with tempfile.TemporaryDirectory() as tmp:
        path = args.file or os.path.join(tmp, "bench.svm")
        if not args.file:
            cargo_example("gen_svmlight", path, args.rows, args.dims, args.seed)
        X, y = load_svmlight_file(path, n_features=args.dims)
        yl, xl = svm_read_problem(path)
        prob = problem(yl, xl)
        print(f"file: {path}: {X.shape[0]} rows, {args.dims} dims, {X.nnz} non-zeros, "
              f"{int((y > 0).sum())} positive; C={args.c} eps={args.eps} -B 1, best of {args.repeat}")
        for loss, solver in [("hinge", 3), ("squared_hinge", 1)]:
            ours = min((json.loads(cargo_example("train_svmlight", path, args.c, loss, args.eps, 1))
                        for _ in range(args.repeat)), key=lambda r: r["seconds"])
            best = None
            for _ in range(args.repeat):
                start = time.perf_counter()
                model = train(prob, f"-s {solver} -c {args.c!r} -B 1 -e {args.eps!r} -q")
                seconds = time.perf_counter() - start
                best = seconds if best is None else min(best, seconds)
            w, b = model.get_decfun()
            sign = 1.0 if model.get_labels()[0] == 1 else -1.0
            w = sign * np.array(w + [0.0] * (args.dims - len(w)))
            ref_obj = primal_objective(X, y, w, sign * b, args.c, loss)
            print(json.dumps({
                "loss": loss,
                "tamis_seconds": round(ours["seconds"], 4),
                "liblinear_seconds": round(best, 4),
                "ratio_tamis_over_liblinear": round(ours["seconds"] / best, 3),
                "tamis_objective": ours["objective"],
                "liblinear_objective": ref_obj,
                "objective_relative_difference": (ours["objective"] - ref_obj) / ref_obj,
                "tamis_iterations": ours["iterations"],
                "tamis_converged": ours["converged"],
            }))
    return 0


if __name__ == "__main__":
    sys.exit(main())
