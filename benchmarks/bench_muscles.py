"""Hamstring model timings on one core: the issue's target is the Monte Carlo band for 5,000 frames x 200 samples
in under 1 s (printed, not asserted).

    python benchmarks/bench_muscles.py            # best of 5 repeats
    python benchmarks/bench_muscles.py --frames 20000 --samples 200 --repeats 3
"""
from __future__ import annotations

import argparse
import os
import time

# one core: keep any threaded BLAS out of the picture (the model is element-wise numpy anyway)
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import numpy as np  # noqa: E402

from hamstride import muscles as M  # noqa: E402

TARGET_S = 1.0


def sprint_like_angles(n_frames: int, rate_hz: float = 500.0) -> dict[str, np.ndarray]:
    """Invented periodic sprint-like angles (2.2 strides/s), rad."""
    t = np.arange(n_frames) / rate_hz
    w = 2 * np.pi * 2.2 * t
    return {"hip_flexion": np.deg2rad(32 + 42 * np.sin(w)), "hip_adduction": np.deg2rad(4 * np.sin(w)),
            "hip_rotation": np.deg2rad(5 * np.cos(w)), "knee_flexion": np.deg2rad(72 + 55 * np.sin(w + 1.0))}


def best_of(repeats: int, fun) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fun()
        times.append(time.perf_counter() - t0)
    return min(times)


def run(frames: int = 5000, samples: int = 200, repeats: int = 5) -> dict[str, float]:
    dims = M.MuscleDims.from_height(1.80)
    angles = sprint_like_angles(frames)
    M.monte_carlo_lengths(angles, dims, n_samples=4)  # warm-up
    results = {
        "monte_carlo_s": best_of(repeats, lambda: M.monte_carlo_lengths(angles, dims, n_samples=samples)),
        "states_s": best_of(repeats, lambda: M.muscle_states(angles, 500.0, dims)),
    }
    print(f"hamstring model, {frames} frames, {len(M.MUSCLES)} muscles, best of {repeats}:")
    print(f"  muscle_states (lengths, exact moment arms, velocities): {results['states_s'] * 1000:8.1f} ms")
    verdict = "OK" if results["monte_carlo_s"] < TARGET_S else "SLOWER THAN TARGET"
    print(f"  monte_carlo_lengths x {samples} samples:                 {results['monte_carlo_s'] * 1000:8.1f} ms"
          f"   (target < {TARGET_S * 1000:.0f} ms: {verdict})")
    return results


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--frames", type=int, default=5000)
    parser.add_argument("--samples", type=int, default=200)
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args()
    run(args.frames, args.samples, args.repeats)


if __name__ == "__main__":
    main()
