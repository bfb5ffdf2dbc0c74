"""Wall time of one precision sweep on 1 worker, on all cores, and on a local Ray instance.

The sweep: a 5 x 5 grid over two precisions of the arm agent x 5 seeds (125 episodes of the
planar two-link arm, 2 s each). The reference is the same sweep run in this process (one
worker, imports already loaded); the ratios are reference time / engine time, measured in the
same run. Engine times include starting the worker processes (and, reported separately, Ray).
On a shared machine the 1-worker and pool runs alternate and each keeps its best round.

    python scripts/bench_sweep.py [--episode-s 2.0] [--seeds 5] [--no-ray]
"""

from __future__ import annotations

import argparse
import os
import shutil
import tempfile
import time
from pathlib import Path

from blanket.scenario import Scenario
from blanket.tune import parse_vary, run_sweep

VARY = (
    "agent.joint_velocity_precision=log:4..400:5",
    "agent.camera_precision=log:0.01..1:5",
)


def _same(a, b) -> bool:
    """Every metric equal (NaN where the other is NaN)."""
    x, y = a.filter(like="metric."), b.filter(like="metric.")
    return bool(((x == y) | (x.isna() & y.isna())).all().all())


def _load() -> str:
    one, five, fifteen = os.getloadavg()
    return f"load average {one:.2f} {five:.2f} {fifteen:.2f} on {os.cpu_count()} cores"


def _warm_up(scenario: Scenario, out_dir: Path) -> None:
    """Load the imports and compiled kernels of this process with a one-trial sweep."""
    run_sweep(
        scenario,
        [parse_vary("agent.order=2")],
        seeds=[0],
        out_dir=out_dir,
        progress=False,
        plots=False,
        workers=1,
    )


def _timed_alone(barrier, results, name: str, episode_s: float, n_seeds: int) -> None:
    """In a fresh process: warm up, wait for the others, time one 1-worker sweep."""
    os.environ.update({"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1"})
    scenario = Scenario(
        env="blanket/planar-2link-v0", env_options={"episode_s": episode_s}, name="ceiling"
    )
    tmp = Path(tempfile.mkdtemp(prefix="blanket-bench-ceiling-"))
    try:
        _warm_up(scenario, tmp / "warm")
        barrier.wait()
        t0 = time.perf_counter()
        run_sweep(
            scenario,
            [parse_vary(v) for v in VARY],
            seeds=list(range(n_seeds)),
            out_dir=tmp / "run",
            progress=False,
            plots=False,
            workers=1,
        )
        results[name] = time.perf_counter() - t0
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def machine_ceiling(episode_s: float, n_seeds: int, cores: int) -> float:
    """The most ``cores`` processes can gain on this machine for this very work: the same
    1-worker sweep alone, then in ``cores`` processes at once (no pool, no start-up in the
    timed part); returns ``cores * t_alone / t_slowest_of_the_group``."""
    import multiprocessing

    ctx = multiprocessing.get_context("spawn")
    with ctx.Manager() as manager:
        times = manager.dict()

        def run(names: list[str]) -> list[float]:
            barrier = ctx.Barrier(len(names))
            procs = [
                ctx.Process(target=_timed_alone, args=(barrier, times, n, episode_s, n_seeds))
                for n in names
            ]
            for p in procs:
                p.start()
            for p in procs:
                p.join()
            return [times[n] for n in names]

        alone = run(["alone"])[0]
        together = run([f"together-{k}" for k in range(cores)])
    return cores * alone / max(together)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--episode-s", type=float, default=2.0)
    ap.add_argument("--seeds", type=int, default=5)
    ap.add_argument("--repeat", type=int, default=3, help="rounds; the best time is kept")
    ap.add_argument("--no-ray", action="store_true")
    ap.add_argument("--no-ceiling", action="store_true", help="skip the machine-ceiling run")
    args = ap.parse_args()

    scenario = Scenario(
        env="blanket/planar-2link-v0",
        env_options={"episode_s": args.episode_s},
        name="potting-bench-planar",
    )
    specs = [parse_vary(v) for v in VARY]
    seeds = list(range(args.seeds))
    cores = os.cpu_count() or 1
    tmp = Path(tempfile.mkdtemp(prefix="blanket-bench-sweep-"))
    print(f"sweep: 5 x 5 grid x {len(seeds)} seeds, planar arm, {args.episode_s:g} s episodes")
    print(f"before: {_load()}")

    def sweep(name: str, **kw) -> tuple[float, object]:
        t0 = time.perf_counter()
        res = run_sweep(
            scenario,
            specs,
            seeds=seeds,
            out_dir=tmp / name,
            progress=False,
            plots=False,
            objective="max:success_rate",
            **kw,
        )
        return time.perf_counter() - t0, res

    try:
        # warm the imports and compiled kernels of this process (the 1-worker reference)
        _warm_up(scenario, tmp / "warm")
        # the machine may be shared: alternate the two runs and keep each one's best time
        t1s, tns = [], []
        for k in range(args.repeat):
            t, r1 = sweep(f"one-{k}", workers=1)
            t1s.append(t)
            t, rn = sweep(f"pool-{k}", workers=cores)
            tns.append(t)
            print(
                f"  round {k + 1}: 1 worker {t1s[-1]:.1f} s, {cores} workers {t:.1f} s ({_load()})"
            )
        t1, tn = min(t1s), min(tns)
        print(f"1 worker (this process):      {t1:7.1f} s")
        print(f"{cores} workers (process pool):    {tn:7.1f} s   speed-up {t1 / tn:.2f}x")
        same = _same(r1.table, rn.table)
        print(f"  identical metrics to 1 worker: {same}")
        per_round = sorted(a / b for a, b in zip(t1s, tns, strict=True))
        print(f"  per-round speed-ups: {', '.join(f'{r:.2f}' for r in per_round)}")
        if not args.no_ceiling:
            ceiling = machine_ceiling(args.episode_s, args.seeds, cores)
            print(
                f"machine ceiling for this work: {ceiling:.2f}x ({cores} independent 1-worker "
                f"sweeps at once vs one alone); the pool reaches {t1 / tn / ceiling:.0%} of it"
            )
        if not args.no_ray:
            try:
                import ray
            except ImportError:
                print("ray: not installed (pip install 'blanket[cluster]'), skipped")
            else:
                import logging

                t0 = time.perf_counter()
                ray.init(
                    num_cpus=cores,
                    include_dashboard=False,
                    log_to_driver=False,
                    logging_level=logging.WARNING,
                    runtime_env={
                        "env_vars": {
                            "OMP_NUM_THREADS": "1",
                            "OPENBLAS_NUM_THREADS": "1",
                            "MKL_NUM_THREADS": "1",
                        }
                    },
                )
                t_init = time.perf_counter() - t0
                try:
                    tr, rr = sweep("ray", engine="ray", workers=cores)
                finally:
                    ray.shutdown()
                print(
                    f"ray local ({cores} CPUs, ray {ray.__version__}): {tr:7.1f} s   "
                    f"speed-up {t1 / tr:.2f}x (+{t_init:.1f} s to start Ray: "
                    f"{t1 / (tr + t_init):.2f}x with it)"
                )
                same = _same(r1.table, rr.table)
                print(f"  identical metrics to 1 worker: {same}")
        print(f"after: {_load()}")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
