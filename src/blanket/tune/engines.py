"""Where trials run: this process, a local process pool, or Ray.

Every engine runs the same pure function on the same plain-dict payloads -- a sweep's
:func:`evaluate_trial`, or another importable task such as the benchmark's
:func:`blanket.bench.suite.evaluate_cell` (``imap(payloads, task)``) -- so a trial gives the
same numbers whatever the engine: the env is reset with each seed (``env.reset(seed=s)``) and
the agent is built fresh for each trial.

The process pool uses the ``forkserver`` start method (``spawn`` where there is none): forking
a process that holds a pybullet connection is unsafe, while the fork server imports the heavy
modules once and never connects. Each worker runs with one BLAS/OpenMP thread, so ``K`` workers use
``K`` cores and not ``K`` times the machine's thread count.
"""

from __future__ import annotations

import json
import os
import socket
import time
from collections.abc import Callable, Iterable, Iterator, Mapping
from pathlib import Path
from typing import Any

from blanket.errors import ConfigError

__all__ = [
    "ENGINES",
    "SINGLE_THREAD_ENV",
    "evaluate_trial",
    "condition_parts",
    "condition_names",
    "InProcessEngine",
    "LocalEngine",
    "RayEngine",
    "make_engine",
    "cached_env",
    "add_engine_arguments",
]

ENGINES = ("local", "ray")
#: A trial function: a plain-dict payload in, a plain dict out (module level, so that worker
#: processes and Ray can import it).
Task = Callable[[Mapping[str, Any]], dict[str, Any]]
SINGLE_THREAD_ENV = {
    "OMP_NUM_THREADS": "1",
    "OPENBLAS_NUM_THREADS": "1",
    "MKL_NUM_THREADS": "1",
    "NUMBA_NUM_THREADS": "1",
}
RAY_CONNECT_TIMEOUT_S = 3.0
# imported once by the fork server of the process pool (no pybullet connection is made)
_PRELOAD = (
    "numpy",
    "scipy.linalg",
    "pandas",
    "gymnasium",
    "blanket.sim.bullet",  # pybullet, imported quietly
    "pinocchio",
    "numba",
    "blanket.runner",
    "blanket.agent",
    "blanket.agent.arm",
    "blanket.wrappers",
    "blanket_envs.arm_reach",
    "blanket.tune.engines",
    "blanket.tune.space",
    "blanket.conditions",
    "blanket.tune._preload",  # loads the compiled kernel once, for every worker
)


# -- perturbation conditions ---------------------------------------------------------------


def condition_names() -> list[str]:
    """Names ``--condition`` accepts: the presets of :mod:`blanket.conditions` (``nominal``
    first); ``NAME=VALUE[,NAME=VALUE...]`` in the parameter vocabulary is accepted too."""
    from blanket.conditions import PRESETS

    return ["nominal"] + [n for n in PRESETS if n != "nominal"]


def condition_parts(
    name: str | None, scenario_conditions: Mapping[str, Any] | None = None
) -> tuple[dict[str, Any], Callable[[Any], Any], dict[str, Any]]:
    """The one hook between sweeps and the conditions of :mod:`blanket.conditions`.

    ``name`` is a preset (``payload-1.5kg``) or ``NAME=VALUE[,NAME=VALUE...]`` of condition
    parameters (``payload_kg=0.3``); ``scenario_conditions`` is the scenario's
    ``[conditions]`` table, applied together with it. Returns the extra env options, the
    wrapper chain (``env -> env``; wrappers draw from generators seeded at ``reset(seed)``)
    and the body-model options for the agent. ``None`` / ``"nominal"`` and no scenario
    conditions change nothing.

    Raises
    ------
    ConfigError
        An unknown name or parameter, a value out of range, or a parameter set by both the
        condition and the scenario (one line).
    """
    from blanket.conditions import (
        apply_conditions,
        check_conditions,
        condition_env_options,
        condition_model_options,
        parse_condition,
    )

    condition = parse_condition(name, "--condition")
    own = check_conditions(scenario_conditions, "scenario conditions")
    both = sorted(set(own) & set(condition.parameters))
    if both:
        raise ConfigError(
            f"--condition {name}: sets {', '.join(both)}, which the scenario's [conditions] "
            "also sets; keep one"
        )
    values = {**own, **condition.parameters}
    return (
        condition_env_options(values),
        lambda env: apply_conditions(env, values)[0],
        condition_model_options(values),
    )


# -- one trial -----------------------------------------------------------------------------

_ENV_CACHE: dict[str, Any] = {}


def cached_env(key: Any, make: Callable[[], Any]) -> Any:
    """One env per worker process, rebuilt (``make()``) only when ``key`` (JSON-able) changes;
    the engines close it when they close."""
    text = json.dumps(key, sort_keys=True, default=str)
    env = _ENV_CACHE.get(text)
    if env is None:
        _drop_env_cache()
        env = make()
        _ENV_CACHE[text] = env
    return env


def _cached_env(env_id: str, env_options: Mapping[str, Any]) -> Any:
    """A sweep's env: :func:`cached_env` of the scenario's env id and options."""
    from blanket.scenario import make_env

    return cached_env([env_id, dict(env_options)], lambda: make_env(env_id, env_options))


def _drop_env_cache() -> None:
    """Close the env this process keeps for trials (its pybullet connection)."""
    for env in _ENV_CACHE.values():
        env.close()
    _ENV_CACHE.clear()


def with_safety(env: Any) -> Any:
    # the same wrapping as `blanket run`, so best.toml reproduces the sweep's numbers
    from blanket import runner

    return runner.with_safety(env)


def evaluate_trial(payload: Mapping[str, Any]) -> dict[str, Any]:
    """Run one trial: the scenario with its overrides, one episode per seed.

    Parameters
    ----------
    payload : mapping
        ``index``, ``key``, ``scenario`` (``env``, ``env_options``, ``agent``, ``name``),
        ``overrides`` (dotted keys), ``seeds`` (list of int), ``condition`` (str or None).

    Returns
    -------
    dict
        ``index``, ``key``, ``overrides``, ``metrics`` (``blanket.runner.summarize`` minus its
        timings), ``per_seed`` (lists over seeds), ``timing``
        (wall time and step medians, not reproducible) and ``error`` (a message or None).
    """
    from blanket.rollout import rollout
    from blanket.runner import agent_options_under, build_agent, summarize
    from blanket.scenario import Scenario
    from blanket.tune.space import apply_overrides

    t0, c0 = time.perf_counter(), time.process_time()
    out: dict[str, Any] = {
        "index": payload["index"],
        "key": payload["key"],
        "overrides": dict(payload["overrides"]),
        "error": None,
    }
    try:
        sc = payload["scenario"]
        scenario = apply_overrides(
            Scenario(
                env=sc["env"],
                env_options=dict(sc["env_options"]),
                agent=dict(sc["agent"]),
                name=sc.get("name", "scenario"),
            ),
            payload["overrides"],
        )
        extra_env, wrap, model_options = condition_parts(
            payload.get("condition"), sc.get("conditions")
        )
        raw = _cached_env(scenario.env, {**scenario.env_options, **extra_env})
        env = with_safety(wrap(raw))
        agent = build_agent(env, agent_options_under(scenario.agent, model_options, raw))
        results = rollout(env, agent, seeds=[int(s) for s in payload["seeds"]])
    except ValueError as exc:  # ConfigError included: a bad value for this trial
        out["error"] = str(exc).strip().splitlines()[0] if str(exc).strip() else repr(exc)
        return out
    summary = summarize(results)
    from blanket.tune.search import METRICS

    metrics = {k: summary.get(k) for k in METRICS}
    out["metrics"] = metrics
    out["per_seed"] = {
        "seed": [r.seed for r in results],
        "success": [bool(r.success) for r in results],
        "time_to_success_s": [r.time_to_success_s for r in results],
        "final_error_m": [r.final_error_m for r in results],
    }
    out["timing"] = {
        "wall_s": time.perf_counter() - t0,
        "cpu_s": time.process_time() - c0,
        "agent_step_us": summary.get("agent_step_us"),
        "sim_step_us": summary.get("sim_step_us"),
        "pid": os.getpid(),
        "started_unix_s": time.time() - (time.perf_counter() - t0),
    }
    return out


# -- engines -------------------------------------------------------------------------------


class InProcessEngine:
    """Trials one after another in this process (``--workers 1``)."""

    workers = 1
    name = "local"

    def imap(
        self, payloads: Iterable[Mapping[str, Any]], task: Task | None = None
    ) -> Iterator[dict[str, Any]]:
        task = task or evaluate_trial
        for p in payloads:
            yield task(p)

    def close(self) -> None:
        _drop_env_cache()

    def __enter__(self) -> InProcessEngine:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _init_worker() -> None:
    """Worker initializer: one BLAS thread (the env variables are set before spawning too)."""
    os.environ.update(SINGLE_THREAD_ENV)
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:
        return
    threadpool_limits(1)


class LocalEngine:
    """A pool of ``workers`` spawned processes on this machine (default: all cores); this
    process runs trials too while the workers start (see :meth:`imap`).

    Parameters
    ----------
    workers : int or None
        Number of processes; None uses ``os.cpu_count()``.
    """

    name = "local"

    def __init__(self, workers: int | None = None) -> None:
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor

        self.workers = int(workers or os.cpu_count() or 1)
        if self.workers < 1:
            raise ConfigError(f"--workers must be >= 1, got {workers}")
        # spawned children read these at interpreter start, before anything imports numpy
        self._saved = {k: os.environ.get(k) for k in SINGLE_THREAD_ENV}
        os.environ.update(SINGLE_THREAD_ENV)
        if "forkserver" in multiprocessing.get_all_start_methods():
            # children fork from a server that has imported the heavy modules but never
            # connected to pybullet, so a worker starts in milliseconds and safely
            ctx = multiprocessing.get_context("forkserver")
            ctx.set_forkserver_preload(list(_PRELOAD))
        else:
            ctx = multiprocessing.get_context("spawn")
        self._pool = ProcessPoolExecutor(
            max_workers=self.workers, mp_context=ctx, initializer=_init_worker
        )

    def imap(
        self, payloads: Iterable[Mapping[str, Any]], task: Task | None = None
    ) -> Iterator[dict[str, Any]]:
        """Results of ``task`` (default :func:`evaluate_trial`; a module-level function) in the
        order trials finish.

        Starting the workers takes a second or two (the fork server imports numpy, pybullet
        and blanket before the first worker can fork). Until the workers exist, this process
        runs trials itself, so that time is not lost; from then on it only feeds the pool
        (``workers`` processes, as asked).
        Each trial is the same pure function wherever it runs, so the numbers do not depend
        on where it ran.
        """
        import threading
        from collections import deque
        from concurrent.futures import FIRST_COMPLETED, wait
        from concurrent.futures.process import BrokenProcessPool

        task = task or evaluate_trial
        queue = deque(dict(p) for p in payloads)
        pending: set[Any] = set()  # the start thread's until ``started``, then this thread's
        started = threading.Event()
        failure: list[BaseException] = []

        def top_up() -> None:  # a little ahead of the workers, so none waits for work
            while len(pending) < 2 * self.workers:
                try:
                    payload = queue.popleft()  # atomic: this process takes from the back
                except IndexError:
                    return
                pending.add(self._pool.submit(task, payload))

        def start() -> None:
            # The first submit blocks until the fork server has imported everything: do it
            # on a thread, so this process runs trials in the meantime.
            try:
                top_up()
            except BaseException as exc:  # re-raised below, on the caller's thread
                failure.append(exc)
            finally:
                started.set()

        threading.Thread(target=start, name="blanket-pool-start", daemon=True).start()
        try:
            while not started.is_set():
                try:
                    payload = queue.pop()
                except IndexError:
                    break
                yield task(payload)
            started.wait()
            if failure:
                raise failure[0]
            while pending:
                done, pending = wait(pending, return_when=FIRST_COMPLETED)
                for fut in done:
                    try:
                        yield fut.result()
                    except BrokenProcessPool:
                        raise RuntimeError(
                            "a sweep worker process died; a script that calls run_sweep must "
                            "guard its top level with `if __name__ == '__main__':`"
                        ) from None
                top_up()
        finally:
            started.wait()
            for fut in pending:
                fut.cancel()

    def close(self) -> None:
        self._pool.shutdown(wait=True, cancel_futures=True)
        _drop_env_cache()
        for k, v in self._saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v

    def __enter__(self) -> LocalEngine:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _ray_address(address: str) -> str:
    """Resolve ``auto`` and check the head's port answers within a short timeout."""
    addr = address.strip()
    if addr == "auto":
        addr = os.environ.get("RAY_ADDRESS", "")
        if not addr:
            current = Path(os.environ.get("RAY_TMPDIR", "/tmp")) / "ray" / "ray_current_cluster"
            addr = current.read_text().strip() if current.is_file() else ""
        if not addr:
            raise ConfigError(
                "--address auto: no running Ray cluster found on this machine; "
                "start one with `ray start --head` or give --address HOST:PORT"
            )
    hostport = addr.removeprefix("ray://")
    host, sep, port = hostport.rpartition(":")
    if not sep or not host or not port.isdigit():
        raise ConfigError(f"--address must be auto, HOST:PORT or ray://HOST:PORT, got {address!r}")
    try:
        with socket.create_connection((host, int(port)), timeout=RAY_CONNECT_TIMEOUT_S):
            pass
    except OSError as exc:
        reason = exc.strerror or type(exc).__name__
        raise ConfigError(
            f"--address {address}: no Ray cluster answers at {host}:{port} "
            f"({reason}; waited {RAY_CONNECT_TIMEOUT_S:g} s)"
        ) from None
    return addr


class RayEngine:
    """Trials as Ray tasks (one CPU each): on a cluster (``address``) or a local instance.

    Parameters
    ----------
    address : str or None
        ``auto``, ``HOST:PORT`` or ``ray://HOST:PORT`` of a running cluster (every node needs
        blanket installed); None starts a local Ray instance with ``workers`` CPUs.
    workers : int or None
        Most trials in flight at once (None: as many as the cluster takes).
    """

    name = "ray"

    def __init__(self, address: str | None = None, workers: int | None = None) -> None:
        try:
            import ray
        except ImportError:
            raise ConfigError(
                "--engine ray needs ray (pip install 'blanket[cluster]'); use --engine local"
            ) from None
        import logging

        self._ray = ray
        self.workers = workers
        self._started = False
        if not ray.is_initialized():
            runtime_env = {"env_vars": dict(SINGLE_THREAD_ENV)}
            if address is None:
                ray.init(
                    num_cpus=int(workers or os.cpu_count() or 1),
                    include_dashboard=False,
                    log_to_driver=False,
                    logging_level=logging.WARNING,
                    runtime_env=runtime_env,
                )
            else:
                resolved = _ray_address(address)
                try:
                    ray.init(
                        address=resolved,
                        log_to_driver=False,
                        logging_level=logging.WARNING,
                        runtime_env=runtime_env,
                    )
                except ConnectionError as exc:
                    raise ConfigError(f"--address {address}: {str(exc).splitlines()[0]}") from None
            self._started = True
        self._remotes: dict[Task, Any] = {}

    def imap(
        self, payloads: Iterable[Mapping[str, Any]], task: Task | None = None
    ) -> Iterator[dict[str, Any]]:
        """Results of ``task`` (default :func:`evaluate_trial`) in the order trials finish."""
        ray = self._ray
        task = task or evaluate_trial
        remote = self._remotes.get(task)
        if remote is None:
            remote = self._remotes[task] = ray.remote(num_cpus=1)(task)
        queue = [dict(p) for p in payloads]
        limit = self.workers or len(queue) or 1
        in_flight: list[Any] = []
        try:
            while queue or in_flight:
                while queue and len(in_flight) < limit:
                    in_flight.append(remote.remote(queue.pop(0)))
                done, in_flight = ray.wait(in_flight, num_returns=1)
                for ref in done:
                    yield ray.get(ref)
        finally:
            for ref in in_flight:
                ray.cancel(ref, force=True)

    def close(self) -> None:
        if self._started:
            self._ray.shutdown()
            self._started = False

    def __enter__(self) -> RayEngine:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def add_engine_arguments(parser: Any, workers_default: int | None, workers_help: str) -> None:
    """``--engine``, ``--address`` and ``--workers``: the engine options of ``blanket tune``
    and ``blanket bench`` (read by :func:`make_engine`)."""
    from blanket.cli_types import positive_int

    parser.add_argument(
        "--engine",
        default="local",
        choices=ENGINES,
        help="local: a process pool on this machine; ray: Ray tasks (default local)",
    )
    parser.add_argument(
        "--address",
        default=None,
        metavar="ADDR",
        help="Ray cluster: auto, HOST:PORT or ray://HOST:PORT (default: start a "
        "local Ray instance)",
    )
    parser.add_argument(
        "--workers", type=positive_int, default=workers_default, metavar="K", help=workers_help
    )


def make_engine(engine: str, workers: int | None = None, address: str | None = None) -> Any:
    """The engine named by ``--engine`` (``local`` with one worker runs in this process)."""
    if engine not in ENGINES:
        raise ConfigError(f"--engine must be one of {', '.join(ENGINES)}, got {engine!r}")
    if workers is not None and workers < 1:
        raise ConfigError(f"--workers must be >= 1, got {workers}")
    if engine == "ray":
        return RayEngine(address, workers)
    if address is not None:
        raise ConfigError("--address applies to --engine ray only")
    n = int(workers or os.cpu_count() or 1)
    return InProcessEngine() if n == 1 else LocalEngine(n)
