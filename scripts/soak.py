"""Soak run: many control steps and resets on the planar arm, watching memory and pybullet clients.

Runs ``--steps`` control steps split over ``--resets`` episodes on ``blanket/planar-2link-v0``
behind :class:`blanket.wrappers.safety_limits.SafetyLimits`, with a cheap random policy (uniform
commands up to 1.5x the limit, a NaN command now and then to exercise the protective stop).
Every ``--recreate-every`` resets the env is dropped *without* ``close()``, ``gc.collect()``
runs, and the dropped env's pybullet client must be disconnected by then (envs close their
clients when garbage-collected); then a new env is made.

Prints, at intervals: steps, resets, resident memory (VmRSS from /proc/self/status) and its
growth since the warm-up, open pybullet clients, and steps per second. Acceptance (printed at
the end, exit code 1 on failure): RSS growth <= ``--max-growth-mb`` (50 MB) and, after the
env is dropped and ``gc.collect()``, no pybullet client left connected.

Usage::

    nice python scripts/soak.py --steps 1000000 --resets 10000
"""

from __future__ import annotations

import argparse
import gc
import sys
import time

import gymnasium as gym
import numpy as np
import pybullet

import blanket_envs  # noqa: F401  (registers the env ids)
from blanket.wrappers.safety_limits import SafetyLimits

#: Client ids scanned for open connections (pybullet hands out small integers).
CLIENT_ID_SCAN = 256


def rss_mb() -> float:
    """Resident set size of this process, MB (VmRSS of /proc/self/status)."""
    try:
        with open("/proc/self/status", encoding="ascii") as f:
            for line in f:
                if line.startswith("VmRSS:"):
                    return float(line.split()[1]) / 1024.0
    except OSError:
        pass
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # peak, as a fallback


def open_clients() -> list[int]:
    """Ids of connected pybullet clients (getConnectionInfo over 0..CLIENT_ID_SCAN-1)."""
    return [
        i
        for i in range(CLIENT_ID_SCAN)
        if pybullet.getConnectionInfo(physicsClientId=i)["isConnected"]
    ]


def make_env() -> SafetyLimits:
    return SafetyLimits(gym.make("blanket/planar-2link-v0"))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=1_000_000, help="control steps (1e6)")
    parser.add_argument("--resets", type=int, default=10_000, help="resets (1e4)")
    parser.add_argument(
        "--recreate-every",
        type=int,
        default=1000,
        metavar="N",
        help="drop the env without close() and make a new one every N resets",
    )
    parser.add_argument("--reports", type=int, default=20, help="progress lines")
    parser.add_argument("--max-growth-mb", type=float, default=50.0)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args(argv)
    if args.steps < 1 or args.resets < 1 or args.recreate_every < 1:
        parser.error("--steps, --resets and --recreate-every must be >= 1")

    rng = np.random.default_rng(args.seed)
    steps_per_episode = max(1, args.steps // args.resets)
    env = make_env()
    limit = env.command_limit
    env.reset(seed=args.seed)

    # Warm-up: first episodes allocate caches (pybullet, numpy).
    for _ in range(2000):
        env.step(rng.uniform(-1.5, 1.5, 2) * limit)
    env.reset(seed=args.seed)
    gc.collect()
    rss0 = rss_mb()
    clients0 = len(open_clients())
    print(
        f"soak: planar-2link-v0 + SafetyLimits, {args.steps} steps, {args.resets} resets, "
        f"{steps_per_episode} steps per episode, new env every {args.recreate_every} resets"
    )
    print(f"baseline RSS {rss0:.1f} MB, open pybullet clients {clients0}")
    print(
        f"{'steps':>10} {'resets':>7} {'RSS MB':>8} {'growth MB':>10} {'clients':>8} "
        f"{'steps/s':>9} {'stopped eps':>11}"
    )

    report_every = max(1, args.steps // args.reports)
    steps = resets = stops = envs_made = 0
    peak_growth = 0.0
    t0 = time.perf_counter()
    in_episode = 0
    stopped = False
    unfreed = 0
    last_steps, last_t = 0, t0
    while steps < args.steps or resets < args.resets:
        action = rng.uniform(-1.5, 1.5, 2) * limit
        if rng.random() < 1e-3:
            action[int(rng.integers(2))] = np.nan
        _, _, terminated, truncated, info = env.step(action)
        stopped = stopped or bool(info["safety"]["safe_stop"])
        steps += 1
        in_episode += 1
        if terminated or truncated or in_episode >= steps_per_episode:
            resets += 1
            stops += stopped
            stopped = False
            in_episode = 0
            if resets % args.recreate_every == 0:
                client_id = env.unwrapped.world.client._client
                del env  # no close(): the client must go with the garbage
                gc.collect()
                if pybullet.getConnectionInfo(physicsClientId=client_id)["isConnected"]:
                    unfreed += 1
                env = make_env()
                envs_made += 1
            env.reset(seed=args.seed + resets)
        if steps % report_every == 0:
            growth = rss_mb() - rss0
            peak_growth = max(peak_growth, growth)
            now = time.perf_counter()
            rate = (steps - last_steps) / (now - last_t)
            last_steps, last_t = steps, now
            print(
                f"{steps:>10} {resets:>7} {rss0 + growth:>8.1f} {growth:>10.1f} "
                f"{len(open_clients()):>8} {rate:>9.0f} {stops:>11}",
                flush=True,
            )

    elapsed = time.perf_counter() - t0
    growth = rss_mb() - rss0
    peak_growth = max(peak_growth, growth)
    del env
    gc.collect()
    left = open_clients()
    print(
        f"\ndone: {steps} steps, {resets} resets, {envs_made} envs dropped unclosed, "
        f"{elapsed:.0f} s ({steps / elapsed:.0f} steps/s)"
    )
    print(
        f"RSS growth: final {growth:.1f} MB, peak {peak_growth:.1f} MB "
        f"(limit {args.max_growth_mb:.0f} MB)"
    )
    print(f"dropped envs whose client stayed connected after gc.collect(): {unfreed}")
    print(
        f"pybullet clients connected after dropping the env and gc.collect(): {len(left)} "
        f"(ids {left})"
    )
    ok = peak_growth <= args.max_growth_mb and not left and unfreed == 0
    print("acceptance:", "PASS" if ok else "FAIL")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
