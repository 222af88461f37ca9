"""Benchmark of the recursive estimator against a textbook RLS and statsmodels RecursiveLS.

Run from the repository root:

    PYTHONPATH=daemon python bench/estimator.py            # full run, about 4 minutes
    PYTHONPATH=daemon python bench/estimator.py --quick    # 10x fewer rows, for a smoke test

It prints, side by side in one run:
1. µs per update for p = 2, 6, 12: zeroline's `update` and a plain numpy textbook update
   (k = Pφ/(λ + φᵀPφ); θ += k·e; P ← (P − kφᵀP)/λ) on the same rows;
2. replay throughput for 1e6 samples at p = 6: `replay_batch` by its compiled kernel (with
   and without forgetting), by its numpy block path (the fallback without numba; with
   forgetting) and statsmodels `RecursiveLS(...).filter()` (its recursive coefficients and
   residuals need only the filter; `fit()` also runs the smoother twice and is slower), 7
   rounds after one untimed run of each, with the minimum and median of the per-round
   ratios; before them, the kernel's first-call time (numba's import and compile, once with
   an empty cache in a child process and once in this process);
3. the relative error of the fitted baseline after 1e6 per-sample updates, for both forms,
   against the weighted batch least-squares fit over the same rows (scipy lstsq of the
   √weight-scaled rows plus the prior's pseudo-rows).

Timings on a shared machine move by tens of percent from one second to the next, so both
sides of every ratio are measured in interleaved rounds (the order alternating) and the
script prints each side's best and median and the per-round ratios (their minimum and
median): a round sees about the same load on both sides, which makes that ratio the
steadiest figure.

OpenBLAS threads are limited to one unless the caller set them: every matrix here is at most
13 wide, where threads only add hand-over cost (on a busy 2-core machine they made LAPACK
calls several times slower).
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse
import math
import platform
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable

import numpy as np
import scipy.linalg
from statsmodels.regression.recursive_ls import RecursiveLS

from zeroline import estimator_replay
from zeroline.estimator import RecursiveEstimator, replay_batch

MINUTE = 60.0
DAY = 86400.0
HALF_LIFE = 7 * DAY


def random_basis(n: int, p: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A well-conditioned basis: a constant and p−1 standard-normal inputs, 1-min samples."""
    rng = np.random.default_rng(seed)
    phi = np.column_stack([np.ones(n), rng.standard_normal((n, p - 1))])
    y = phi @ np.linspace(1.0, 2.0, p) + 0.01 * rng.standard_normal(n)
    return phi, y, np.arange(n) * MINUTE


def drift_basis(n: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A drift basis as a channel would use it: 1, t/30d, (t/30d)², daily sin/cos, input."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) * MINUTE
    days = t / DAY
    temperature = 20.0 + 5.0 * np.sin(2 * np.pi * days) + rng.standard_normal(n)
    phi = np.column_stack(
        [
            np.ones(n),
            days / 30.0,
            (days / 30.0) ** 2,
            np.sin(2 * np.pi * days),
            np.cos(2 * np.pi * days),
            temperature - 20.0,
        ]
    )
    y = phi @ [3.0, 0.4, -0.02, 0.3, 0.1, 0.05] + 0.05 * rng.standard_normal(n)
    return phi, y, t


class Textbook:
    """The covariance-form RLS update with exponential forgetting, as in the textbooks."""

    def __init__(self, p: int, decay: float, prior_sd: float = 1e3) -> None:
        self.decay = decay
        self.theta = np.zeros(p)
        self.cov = np.eye(p) * prior_sd**2

    def update(self, phi: np.ndarray, y: float) -> float:
        cov_phi = self.cov @ phi
        gain = cov_phi / (self.decay + phi @ cov_phi)  # k = Pφ / (λ + φᵀPφ)
        error = y - phi @ self.theta
        self.theta = self.theta + gain * error  # θ ← θ + k·e
        self.cov = (self.cov - np.outer(gain, cov_phi)) / self.decay  # P ← (P − kφᵀP)/λ
        return float(error)


def seconds(run: Callable[[], object]) -> float:
    start = time.perf_counter()
    run()
    return time.perf_counter() - start


def interleaved(rounds: int, runs: list[Callable[[], object]]) -> np.ndarray:
    """Seconds of each run in each round, shape (rounds, len(runs)); the order alternates."""
    table = np.empty((rounds, len(runs)))
    for r in range(rounds):
        order = range(len(runs)) if r % 2 == 0 else reversed(range(len(runs)))
        for index in order:
            table[r, index] = seconds(runs[index])
    return table


def run_zeroline(p: int, rows: list[np.ndarray], ys: list[float], ts: list[float]) -> None:
    est = RecursiveEstimator(p, half_life=HALF_LIFE)
    for phi, y, t in zip(rows, ys, ts, strict=True):
        est.update(phi, y, 1.0, t)


def run_textbook(p: int, rows: list[np.ndarray], ys: list[float]) -> None:
    rls = Textbook(p, 2.0 ** (-MINUTE / HALF_LIFE))
    for phi, y in zip(rows, ys, strict=True):
        rls.update(phi, y)


def per_update_costs(n: int, rounds: int = 9) -> None:
    print(f"1. cost per update ({n} updates; {rounds} interleaved rounds), half_life 7d,")
    print("   1-min samples; zeroline's update also returns the innovation")
    print(
        f"   {'p':>3} {'zeroline µs best/median':>24} {'textbook µs best/median':>24}"
        f" {'ratio of bests':>15} {'median ratio':>13}"
    )
    for p in (2, 6, 12):
        phi, y, t = random_basis(n, p, seed=p)
        rows, ys, ts = list(phi), y.tolist(), t.tolist()
        table = interleaved(
            rounds,
            [
                lambda: run_zeroline(p, rows, ys, ts),  # noqa: B023 - called in this iteration
                lambda: run_textbook(p, rows, ys),  # noqa: B023
            ],
        )
        micro = table / n * 1e6
        ours, theirs = micro[:, 0], micro[:, 1]
        print(
            f"   {p:>3} {ours.min():>11.2f} / {np.median(ours):>10.2f}"
            f" {theirs.min():>11.2f} / {np.median(theirs):>10.2f}"
            f" {ours.min() / theirs.min():>15.2f} {np.median(ours / theirs):>13.2f}"
        )


def replay(
    half_life: float | None, kernel: bool, phi: np.ndarray, y: np.ndarray, t: np.ndarray
) -> None:
    """One replay_batch of all rows on a new estimator, by the kernel or the numpy path."""
    estimator_replay.USE_KERNEL = kernel
    try:
        replay_batch(RecursiveEstimator(6, half_life=half_life), phi, y, None, t)
    finally:
        estimator_replay.USE_KERNEL = True


_FIRST_CALL = """
import time
start = time.perf_counter()
import numpy as np
from zeroline.estimator import RecursiveEstimator, replay_batch
from zeroline import estimator_replay
t = 60.0 * np.arange(100.0)
replay_batch(RecursiveEstimator(6, half_life=7 * 86400.0), np.ones((100, 6)), np.ones(100), None, t)
assert estimator_replay._kernel_module is not None
print(time.perf_counter() - start)
"""


def first_call_seconds() -> tuple[float, float, bool]:
    """Seconds of the first replay in a process, by the kernel: with an empty numba cache
    (a child process; numba's import and the compile) and in this process (the import and
    the load from the cache, or the compile if this install has no cache yet), and whether
    this process loaded it from the cache."""
    with tempfile.TemporaryDirectory() as cache:
        child = subprocess.run(
            [sys.executable, "-c", _FIRST_CALL],
            capture_output=True,
            text=True,
            check=True,
            env={**os.environ, "NUMBA_CACHE_DIR": cache},
        )
    start = time.perf_counter()
    replay_batch(
        RecursiveEstimator(6, half_life=HALF_LIFE),
        np.ones((100, 6)),
        np.ones(100),
        None,
        MINUTE * np.arange(100.0),
    )
    here = time.perf_counter() - start
    kernel = estimator_replay._kernel_module
    if kernel is None:
        raise SystemExit("the compiled replay kernel did not load (see the warning above)")
    loaded = sum(kernel.replay_rows.stats.cache_hits.values()) > 0
    return float(child.stdout), here, loaded


def replay_throughput(n: int, rounds: int = 7) -> None:
    """Samples/s of the replay and of statsmodels, and the ratio in each round.

    Each side runs once untimed first: the first run in a process pays the page faults of
    its freshly mapped result arrays (statsmodels' filter keeps the k x k state covariances
    of every row, ~0.6 GB here, and its first run measured 1.7-4.5x slower than later ones),
    and the kernel's first call its compile or load (printed apart), which is not a cost of
    the method. The ratios are taken round by round (the order alternating), and both their
    minimum and median are printed: the target is about every round.
    """
    print(f"2. replay of {n} samples at p = 6 ({rounds} interleaved rounds after one")
    print("   untimed run of each; samples/s)")
    cold, warm, loaded = first_call_seconds()
    print(
        f"   kernel's first call (100 rows, numba imported): {cold:.2f} s with an empty cache"
        f" (the compile), {warm:.2f} s in this process"
        f" ({'loaded from the cache' if loaded else 'compiled: no cache yet'})"
    )
    phi, y, t = random_basis(n, 6, seed=60)
    labels = [
        "zeroline replay_batch kernel, half_life 7d",
        "zeroline replay_batch kernel, no forgetting",
        "zeroline replay_batch numpy path, half_life 7d",
        "statsmodels RecursiveLS.filter(), no forg.",
    ]
    runs: list[Callable[[], object]] = [
        lambda: replay(HALF_LIFE, True, phi, y, t),
        lambda: replay(None, True, phi, y, t),
        lambda: replay(HALF_LIFE, False, phi, y, t),
        lambda: RecursiveLS(y, phi).filter(),
    ]
    for run in runs:
        run()
    table = interleaved(rounds, runs)
    rates = n / table
    print(f"   {'path':<47} {'best':>11} {'median':>11}   ns/row (best)   per round")
    for index, label in enumerate(labels):
        per_round = " ".join(f"{rate:,.0f}" for rate in rates[:, index])
        print(
            f"   {label:<47} {rates[:, index].max():>11,.0f}"
            f" {np.median(rates[:, index]):>11,.0f}   {1e9 / rates[:, index].max():>8.0f}"
            f"        {per_round}"
        )
    for index, label in enumerate(labels[:3]):
        ratios = rates[:, index] / rates[:, 3]
        bests = rates[:, index].max() / rates[:, 3].max()
        short = label.removeprefix("zeroline replay_batch ")
        print(
            f"   ratio to statsmodels, {short:<28} best/best {bests:5.1f}"
            f"  per round min {ratios.min():5.1f} median {np.median(ratios):5.1f}  rounds "
            + " ".join(f"{r:.1f}" for r in ratios)
        )
    gain = rates[:, 0] / rates[:, 2]
    print(
        f"   kernel / numpy path, half_life 7d: per round min {gain.min():.1f}"
        f" median {np.median(gain):.1f}"
    )


def batch_baseline(
    phi: np.ndarray, y: np.ndarray, t: np.ndarray, prior_weight: float, prior_sd: float, last: int
) -> np.ndarray:
    """Fitted baseline on the last rows from the weighted batch fit over all rows."""
    weights = 2.0 ** (-(t[-1] - t) / HALF_LIFE)
    root = np.sqrt(weights)
    p = phi.shape[1]
    design = np.vstack([phi * root[:, None], math.sqrt(prior_weight) / prior_sd * np.eye(p)])
    target = np.concatenate([y * root, np.zeros(p)])
    coefficients = scipy.linalg.lstsq(design, target)[0]
    return np.asarray(phi[-last:] @ coefficients)


def accuracy(n: int) -> None:
    print(f"3. relative error of the fitted baseline after {n} updates (last 1000 rows,")
    print("   max |Δ| / max |batch|), half_life 7d, 1-min samples")
    print(f"   {'basis':<28} {'zeroline':>10} {'textbook':>10} {'textbook P min eig':>20}")
    decay = 2.0 ** (-MINUTE / HALF_LIFE)
    for label, (phi, y, t) in (
        ("random, p = 6", random_basis(n, 6, seed=6)),
        ("drift [1,t,t²,sin,cos,T]", drift_basis(n, seed=7)),
    ):
        est = RecursiveEstimator(6, half_life=HALF_LIFE)
        rls = Textbook(6, decay)
        rows = list(phi)
        for i in range(n):
            est.update(rows[i], y[i], 1.0, t[i])
            rls.update(rows[i], y[i])
        reference = batch_baseline(phi, y, t, est.prior_weight, 1e3, 1000)
        scale = np.max(np.abs(reference))
        ours = np.max(np.abs(phi[-1000:] @ est.coefficients - reference)) / scale
        with np.errstate(invalid="ignore"):
            theirs = np.max(np.abs(phi[-1000:] @ rls.theta - reference)) / scale
            smallest = (
                np.min(np.linalg.eigvalsh((rls.cov + rls.cov.T) / 2))
                if np.all(np.isfinite(rls.cov))
                else math.nan
            )
        print(f"   {label:<28} {ours:>10.2e} {theirs:>10.2e} {smallest:>20.3e}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="10x fewer rows")
    args = parser.parse_args()
    scale = 10 if args.quick else 1
    cpu = "unknown"
    with open("/proc/cpuinfo") as info:
        for line in info:
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    print(
        f"machine: {os.cpu_count()} cores, {cpu}; Python {platform.python_version()}, "
        f"numpy {np.__version__}, OPENBLAS_NUM_THREADS={os.environ['OPENBLAS_NUM_THREADS']}, "
        f"load average {os.getloadavg()[0]:.2f}"
    )
    per_update_costs(20_000 // scale)
    replay_throughput(1_000_000 // scale)
    accuracy(1_000_000 // scale)


if __name__ == "__main__":
    main()
