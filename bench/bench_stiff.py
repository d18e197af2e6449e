"""Stiff plant: cost per tick of ROS2 against RK4 with the substeps RK4 needs for the
same error (Robertson's kinetics from t = 1 to 11, reference solve_ivp Radau 1e-12).

    .venv/bin/python bench/bench_stiff.py [--tick 0.0625]

Prints markdown; the best of several repeats, and the ratio of the two in the same run.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from test_stiff import T_END, X1, plant, reference  # noqa: E402

from plantrig.sim import make_stepper  # noqa: E402


def run(tick: float, method: str, substeps: int) -> tuple[float, float]:
    """(relative error at T_END, best seconds per tick over 3 repeats)."""
    ticks = int(round((T_END - 1.0) / tick))
    ref = reference(1.0, T_END, X1)
    best, error = float("inf"), float("nan")
    for _ in range(3):
        stepper = make_stepper(plant(True), tick, X1, method, substeps)
        began = time.perf_counter()
        with np.errstate(all="ignore"):
            for k in range(ticks):
                stepper.output_and_advance(1.0 + k * tick)
        best = min(best, (time.perf_counter() - began) / ticks)
        error = float(np.max(np.abs(stepper.x - ref) / np.maximum(np.abs(ref), 1e-6)))
    return error, best


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--tick", type=float, default=0.0625)
    tick = parser.parse_args().tick
    ros2_error, ros2_time = run(tick, "ros2", 1)
    low, high = 1, 1
    while not run(tick, "rk4", high)[0] <= ros2_error:     # doubling, then bisection
        low, high = high, high * 2
    while low < high:
        mid = (low + high) // 2
        if run(tick, "rk4", mid)[0] <= ros2_error:
            high = mid
        else:
            low = mid + 1
    rk4_error, rk4_time = run(tick, "rk4", high)
    print(f"| method (tick {tick:g} s) | substeps | relative error at t = {T_END:g} | "
          "time per tick |")
    print("|---|---|---|---|")
    print(f"| ROS2 (model Jacobian) | 1 | {ros2_error:.3g} | {ros2_time * 1e6:.1f} us |")
    print(f"| RK4 | {high} | {rk4_error:.3g} | {rk4_time * 1e6:.1f} us |")
    print(f"\nRK4 / ROS2 time per tick: {rk4_time / ros2_time:.1f}x")


if __name__ == "__main__":
    main()
