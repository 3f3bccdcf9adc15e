"""Benchmarks: generation time, build time and host step throughput of the generated C.

Run from the repository root: ``python bench/run.py [--ticks N]``. Prints one row per model and
method. These numbers are measured here, never asserted in unit tests.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from codegen.build import build  # noqa: E402
from codegen.advice.cost import step_cost  # noqa: E402
from codegen.discretize import discretize  # noqa: E402
from codegen.methods import builtin  # noqa: E402
from codegen.model import load_model  # noqa: E402
from codegen.pipeline import generate  # noqa: E402
from codegen.simplify import simplify  # noqa: E402
from codegen.run import run_c  # noqa: E402
from codegen.verify import excitation  # noqa: E402

CASES = [("heater.toml", 0.5), ("axis.toml", 1e-4)]
METHODS = ["euler", "rk4", "dp5"]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--ticks", type=int, default=200_000, help="ticks per throughput run")
    args = parser.parse_args()
    print(f"{'model':<8} {'method':<8} {'prec':<6} {'gen s':>7} {'build s':>8} "
          f"{'ops/tick':>9} {'Mticks/s':>9}")
    for file, dt in CASES:
        model = load_model(ROOT / "examples" / file)
        u = excitation(model, args.ticks)
        for method_id in METHODS:
            method = builtin(method_id)
            ops = step_cost(simplify(discretize(model, method, dt))).total
            for precision in ("float", "double"):
                t0 = time.perf_counter()
                csource = generate(model, method, dt, precision=precision)
                t1 = time.perf_counter()
                built = build(csource, model)
                t2 = time.perf_counter()
                run_c(built, model, u[:10])  # warm-up
                t3 = time.perf_counter()
                run = run_c(built, model, u)
                t4 = time.perf_counter()
                assert np.all(np.isfinite(run.xs[: run.completed + 1]))
                print(f"{model.name:<8} {method_id:<8} {precision:<6} {t1 - t0:7.3f} "
                      f"{t2 - t1:8.2f} {ops:9d} {args.ticks / (t4 - t3) / 1e6:9.2f}")


if __name__ == "__main__":
    main()
