"""Benchmark: generalized filter against white-noise Kalman filters on white and smooth noise.

For each test system and smoothness ``s`` (in samples), data are drawn from
``blanket.estimation.LinearSystem.simulate`` and filtered by

* the steady-state Kalman filter of the exactly discretised white-noise model, with the nominal
  ``Q`` ("nominal KF"; gain from ``scipy.linalg.solve_discrete_are``, Van Loan 1978 for ``Qd``),
* the same filter with its ``Q`` scaled by the best of a log-spaced scan on the same data
  ("best KF": an upper bound on what tuning a white-noise filter can reach),
* ``blanket.estimation.run_filter`` at embedding orders 0..6.

It prints the RMSE of the order-0 estimate of the first state (after a burn-in) as ratios to the
best KF, and writes a figure. Usage::

    python scripts/bench_estimation.py [--out bench-estimation.png] [--samples 6000] [--seeds 2]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from scipy.linalg import solve_discrete_are

from blanket.estimation import LinearSystem, run_filter, van_loan_discretisation

DT = 0.01
SMOOTHNESS_SAMPLES = [0, 1, 2, 5, 10]
ORDERS = list(range(7))
Q_SCALES = np.logspace(-3, 3, 31)

# Invented greenhouse-bench test systems: a bench-arm joint (damped 0.5 Hz oscillation, position
# measured, force noise only) and a tray-conveyor speed (first-order lag).
OMEGA = 2 * np.pi * 0.5
SYSTEMS = {
    "bench-arm joint (2 states)": dict(
        A=np.array([[0.0, 1.0], [-(OMEGA**2), -2 * 0.3 * OMEGA]]),
        C=np.array([[1.0, 0.0]]),
        Q=np.diag([0.0, 1.0]),
        R=np.array([[0.01]]),
    ),
    "conveyor speed (1 state)": dict(
        A=np.array([[-1.0]]),
        C=np.array([[1.0]]),
        Q=np.array([[1.0]]),
        R=np.array([[0.05]]),
    ),
}


def steady_state_kf(A, C, Q, R, dt, y):
    """Steady-state white-noise Kalman filter, exact discretisation (returns (T, n))."""
    Ad, Qd = van_loan_discretisation(A, Q, dt)
    P = solve_discrete_are(Ad.T, C.T, Qd, R)
    K = P @ C.T @ np.linalg.inv(C @ P @ C.T + R)
    L = (np.eye(A.shape[0]) - K @ C) @ Ad  # x_k = L x_{k-1} + K y_k
    x = K @ y[0]
    out = np.empty((y.shape[0], A.shape[0]))
    out[0] = x
    Ky = y @ K.T
    for k in range(1, y.shape[0]):
        x = L @ x + Ky[k]
        out[k] = x
    return out


def mse(est, x, burn):
    return float(np.mean((est[burn:, 0] - x[burn:, 0]) ** 2))


def run(samples: int, seeds: int, burn: int):
    results = {}
    for name, spec in SYSTEMS.items():
        table = {}
        for s_samples in SMOOTHNESS_SAMPLES:
            s = s_samples * DT
            system = LinearSystem(spec["A"], spec["C"], spec["Q"], spec["R"], DT, smoothness=s)
            nominal = 0.0
            scan = np.zeros(Q_SCALES.size)
            filt = np.zeros(len(ORDERS))
            for seed in range(seeds):
                x, y = system.simulate(samples, np.random.default_rng(1000 + seed))
                args = (spec["A"], spec["C"])
                nominal += mse(steady_state_kf(*args, spec["Q"], spec["R"], DT, y), x, burn)
                for i, f in enumerate(Q_SCALES):
                    scan[i] += mse(steady_state_kf(*args, f * spec["Q"], spec["R"], DT, y), x, burn)
                for i, p in enumerate(ORDERS):
                    filt[i] += mse(run_filter(system, y, order=p).means, x, burn)
            best = float(np.min(scan))
            table[s_samples] = dict(
                best_scale=float(Q_SCALES[int(np.argmin(scan))]),
                nominal_over_best=float(np.sqrt(nominal / best)),
                ratios=np.sqrt(filt / best),
                ratios_nominal=np.sqrt(filt / nominal),
            )
        results[name] = table
    return results


def print_tables(results) -> None:
    for name, table in results.items():
        print(f"\n{name}: RMSE ratio to the best-tuned white-noise KF (dt = {DT} s)")
        head = "  s [samples]  nominal KF  best Q scale | " + " ".join(f"order {p}" for p in ORDERS)
        print(head)
        for s_samples, row in table.items():
            cells = " ".join(f"{r:7.3f}" for r in row["ratios"])
            print(
                f"  {s_samples:11d}  {row['nominal_over_best']:10.3f}  {row['best_scale']:12.3g} "
                f"| {cells}"
            )
        print("  ratio to the nominal KF:")
        for s_samples, row in table.items():
            cells = " ".join(f"{r:7.3f}" for r in row["ratios_nominal"])
            print(f"  {s_samples:11d}  {'':10s}  {'':12s} | {cells}")


def plot(results, out: str) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, len(results), figsize=(5.2 * len(results), 4.0), sharey=True)
    axes = np.atleast_1d(axes)
    cmap = plt.get_cmap("viridis")
    for ax, (name, table) in zip(axes, results.items(), strict=True):
        s_axis = np.array(list(table))
        for i, p in enumerate(ORDERS):
            ax.plot(
                s_axis,
                [table[s]["ratios"][i] for s in s_axis],
                marker="o",
                ms=3,
                color=cmap(i / max(1, len(ORDERS) - 1)),
                label=f"order {p}",
            )
        ax.plot(
            s_axis,
            [table[s]["nominal_over_best"] for s in s_axis],
            color="0.4",
            ls="--",
            label="nominal KF",
        )
        ax.axhline(1.0, color="0.2", lw=0.8)
        ax.axhline(0.9, color="tab:red", lw=0.8, ls=":")
        ax.set_title(name, fontsize=10)
        ax.set_xlabel("noise smoothness s [samples]")
        ax.grid(alpha=0.3)
    axes[0].set_ylabel("RMSE / best-tuned white KF")
    axes[-1].legend(fontsize=7, ncol=2)
    fig.tight_layout()
    fig.savefig(out, dpi=120)
    plt.close(fig)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default="bench-estimation.png", help="PNG path")
    parser.add_argument("--samples", type=int, default=6000, help="samples per run")
    parser.add_argument("--seeds", type=int, default=2, help="runs per setting")
    parser.add_argument("--burn", type=int, default=500, help="samples dropped before scoring")
    args = parser.parse_args(argv)
    if args.samples <= args.burn + 100:
        parser.error("--samples must exceed --burn by at least 100")
    t0 = time.perf_counter()
    results = run(args.samples, args.seeds, args.burn)
    print_tables(results)
    print("\nACCEPTANCE (s = 10 samples, order >= 2, ratio to best KF <= 0.9):")
    for name, table in results.items():
        r = table[10]["ratios"][2:]
        verdict = "pass" if np.all(r <= 0.9) else ("partial" if np.any(r <= 0.9) else "FAIL")
        print(f"  {name}: orders 2-6 {np.round(r, 3).tolist()} -> {verdict}")
    print("WHITE NOISE (s = 0, ratio to best KF, should be ~1):")
    for name, table in results.items():
        print(f"  {name}: {np.round(table[0]['ratios'], 4).tolist()}")
    plot(results, args.out)
    print(f"\nwrote {args.out}  ({time.perf_counter() - t0:.0f} s)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
