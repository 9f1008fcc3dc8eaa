"""Engine refit benchmark: one round (fit, sample, new batch) at the documented size.

15 parameters, 1000 finished runs scattered around the posterior (every one retained: the
newest half by age, the older ones for lying near the posterior), outputs of 3 channels x 200
values. Prints the median wall time over repeats, the peak traced memory of one refit,
and how the time scales with runs and output length. Run:

    .venv/bin/python tests/benchmarks/bench_engine.py [--repeats 5] [--long] [--blas-threads 1]

Targets (not asserted): median under 2 s, peak memory under 300 MB on a 2-core machine; with
``--long``, a refit on 3 x 5000 outputs under twice the cost of one on 3 x 50 (the ratio line,
from pairs timed back to back).
CPU seconds (`time.process_time`, all threads) are printed beside wall seconds: on a shared
machine they move less with what else runs. Refits run with one BLAS thread, as a refit worker
runs them (`honing.api.server.one_blas_thread_unless_set`); ``--blas-threads 0`` leaves the
libraries' own default (one thread per core).
"""

from __future__ import annotations

import argparse
import json
import time
import tracemalloc

import numpy as np
from threadpoolctl import threadpool_limits

from honing.engine.rounds import refit, start
from honing.engine.spec import CalibrationSpec
from honing.engine.state import RunTable


def scenario(dim: int, channels: int, length: int, seed: int = 0):
    """A smooth invented model: per channel, a sum of modes driven by the parameters, with a
    quadratic interaction; every parameter is informed, and the posterior sd is near 0.02."""
    rng = np.random.default_rng(seed)
    t = np.linspace(0.0, 1.0, length)
    modes = np.stack(
        [np.sin((i + 1) * np.pi * t[None, :] + np.arange(channels)[:, None]) for i in range(dim)]
    )  # (dim, channels, length)
    mix = rng.normal(scale=1.0 / np.sqrt(dim), size=(channels, dim))
    truth = rng.normal(scale=0.3, size=dim)

    def model(theta: np.ndarray) -> np.ndarray:
        theta = np.atleast_2d(theta)
        linear = np.einsum("ni,icl->ncl", theta, modes)
        bend = 0.3 * (theta @ mix.T) ** 2  # (n, channels)
        return (linear + bend[:, :, None] * t[None, None, :]).reshape(theta.shape[0], -1)

    sd = 0.2
    data = model(truth)[0] + sd * rng.normal(size=channels * length)
    spec = CalibrationSpec.from_dict(
        {
            "name": "bench",
            "parameters": [
                {"name": f"p{i}", "prior": {"kind": "normal", "mean": 0.0, "sd": 1.0}}
                for i in range(dim)
            ],
            "observations": [
                {"name": f"ch{c}", "values": data[c * length : (c + 1) * length].tolist(), "sd": sd}
                for c in range(channels)
            ],
            "design": {"initial_runs": 64, "batch_size": 32},
            "surrogate": {"max_degree": 4},
            "budget": {"max_runs": 5000},
        }
    )
    return spec, model, truth


def runs_near(model, truth, n: int, spread: float, seed: int = 1) -> RunTable:
    """Finished runs scattered around the truth, as a calibration's later rounds leave them."""
    rng = np.random.default_rng(seed)
    theta = truth + spread * rng.normal(size=(n, truth.size))
    outputs = model(theta)
    return RunTable(theta, outputs, np.zeros(n, bool), np.ones(n))


def timed_refit(spec, state, runs) -> tuple[float, float]:
    """Wall and CPU seconds of one refit."""
    t0, c0 = time.perf_counter(), time.process_time()
    refit(spec, state, runs)
    return time.perf_counter() - t0, time.process_time() - c0


def time_refit(spec, runs, repeats: int) -> dict:
    state = refit(spec, start(spec), runs)  # a warm state, as later rounds have
    times, cpu = np.array([timed_refit(spec, state, runs) for _ in range(repeats)]).T
    tracemalloc.start()
    new = refit(spec, state, runs)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    diag = new.summary["diagnostics"]
    return {
        "runs": runs.n_runs,
        "outputs": spec.output_size,
        "median_s": float(np.median(times)),
        "min_s": float(np.min(times)),
        "median_cpu_s": float(np.median(cpu)),
        "peak_traced_mb": peak / 2**20,
        "terms": diag["surrogate_terms"],
        "components": diag["surrogate_components"],
        "chain_steps": diag["chain_steps"],
        "tau_max": diag["tau_max"],
        "ess_min": diag["ess_min"],
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--long", action="store_true", help="also 3 x 5000 outputs")
    parser.add_argument(
        "--blas-threads", type=int, default=1, help="BLAS threads (0: the libraries' default)"
    )
    args = parser.parse_args()
    if args.blas_threads > 0:
        threadpool_limits(args.blas_threads)
    print(f"BLAS threads: {args.blas_threads or 'library default'}", flush=True)
    rows = []
    for n_runs, length in [(1000, 200), (500, 200), (2000, 200), (1000, 50)] + (
        [(1000, 5000)] if args.long else []
    ):
        spec, model, truth = scenario(15, 3, length)
        rows.append(time_refit(spec, runs_near(model, truth, n_runs, 0.05), args.repeats))
        print(json.dumps(rows[-1]), flush=True)
    print(
        "\n| runs | outputs | median s | min s | median CPU s | peak MB | terms | comps | steps "
        "| tau | ess |"
    )
    print("| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |")
    for r in rows:
        print(
            f"| {r['runs']} | {r['outputs']} | {r['median_s']:.2f} | {r['min_s']:.2f} | "
            f"{r['median_cpu_s']:.2f} | "
            f"{r['peak_traced_mb']:.0f} | {r['terms']} | {r['components']} | "
            f"{r['chain_steps']} | {r['tau_max']:.1f} | {r['ess_min']:.0f} |"
        )
    if args.long:
        ratios = paired_ratios(args.repeats)
        print(
            f"\nlong/short (3 x 5000 vs 3 x 50 outputs, 1000 runs), median of {args.repeats} "
            f"interleaved pairs: wall {np.median(ratios[:, 0]):.2f} "
            f"(range {ratios[:, 0].min():.2f}-{ratios[:, 0].max():.2f}), "
            f"CPU {np.median(ratios[:, 1]):.2f} (target < 2)"
        )


def paired_ratios(repeats: int) -> np.ndarray:
    """Per pair, the long refit's wall and CPU time over the short one's, timed back to back.

    A shared machine's load drifts over the minutes the table takes; timing the two cases
    alternately and taking the median of the per-pair ratios keeps the drift out of the ratio.
    """
    cases = []
    for length in (50, 5000):
        spec, model, truth = scenario(15, 3, length)
        runs = runs_near(model, truth, 1000, 0.05)
        cases.append((spec, refit(spec, start(spec), runs), runs))
    out = np.empty((repeats, 2))
    for i in range(repeats):
        short, long = (np.array(timed_refit(*case)) for case in cases)
        out[i] = long / short
    return out


if __name__ == "__main__":
    main()
