"""Benchmark: what the geometry's mask sampling alone costs, measured in place, against the speed targets.

Run from the repository root: ``python benchmarks/bench_floor.py [--ladder 10000] [--no-network]``.

Recentring averages the interpolated mask over a disc of sample points normal to the tangent at every
centreline point, on every pass (``Settings.recentre_passes``), and the free ends are followed along rays;
all of these samples go through :func:`scipy.ndimage.map_coordinates`. This script wraps that function
while the pipeline runs (in the pipeline's own threads), counts the samples and records each call's
interval and the CPU time of its thread during the call (``time.thread_time``; the call releases the GIL,
so this is the interpolation's own work).

- *Sampling floor*: the calls' CPU time divided by the cores (2 here), i.e. the wall time sampling would
  take with the cores doing nothing else and perfectly shared. Waiting for the GIL or for a core is not
  in it, so it is below what sampling costs in any schedule.
- *Observed sampling time*: the union of the calls' intervals in this run (time during which some
  sampling was running); it includes such waiting, and is reported beside the floor.
- *The rest*: the geometry's time minus the observed sampling time, i.e. the time during which no
  sampling was running.

From these, against the targets of the speed issue:

- the geometry ladder (branches of ``bench_pipeline``'s ladder, traced as the pipeline does): sampling
  floor and the rest, per branch x 10^5, each against the 30 s target for 10^5 branches;
- the 400 x 512 x 512 network (``bench_pipeline``'s, same seed): (thinning alone + the sampling floor) /
  thinning alone, against the 1.5x target. Sampling cannot overlap the thinning of the component it
  samples, and nearly all branches are in one component. One ``scipy.ndimage.label`` of the mask is timed
  too (the components step needs at least that much), but left out of the floor.

It also times map_coordinates against a plain numpy trilinear interpolation on the same coordinates (the
hand-written alternative). Results are printed and appended to ``benchmarks/results.md`` (or ``--out``).
"""

from __future__ import annotations

import argparse
import os
import threading
import time
import warnings
from pathlib import Path

import bench_pipeline as bp
import numpy as np
import scipy.ndimage

HERE = Path(__file__).resolve().parent


class SamplingClock:
    """Wraps scipy.ndimage.map_coordinates while active: samples counted, calls' intervals and CPU timed.

    ``keep``: also keep the (data, coordinates) of the first few large calls, for the per-sample timing.
    """

    def __init__(self, keep: bool = False) -> None:
        self.calls: list[tuple[float, float, float, int]] = []  # (start, end, thread CPU s, samples)
        self.kept: list[tuple[np.ndarray, np.ndarray]] = []
        self._keep = keep
        self._real = scipy.ndimage.map_coordinates
        self._lock = threading.Lock()

    def __enter__(self) -> SamplingClock:
        real = self._real

        def timed(data, coordinates, *args, **kwargs):
            c0, t0 = time.thread_time(), time.perf_counter()
            out = real(data, coordinates, *args, **kwargs)
            t1, c1 = time.perf_counter(), time.thread_time()
            n = int(np.asarray(coordinates).size // 3)
            with self._lock:
                self.calls.append((t0, t1, c1 - c0, n))
                if self._keep and len(self.kept) < 8 and n >= 20_000:
                    self.kept.append((data, np.array(coordinates, float).reshape(3, -1)))
            return out

        scipy.ndimage.map_coordinates = timed
        return self

    def __exit__(self, *exc) -> None:
        scipy.ndimage.map_coordinates = self._real

    @property
    def samples(self) -> int:
        return sum(c[3] for c in self.calls)

    def floor_seconds(self, cores: int) -> float:
        """The calls' CPU time shared perfectly among ``cores``."""
        return sum(c[2] for c in self.calls) / cores

    def busy_seconds(self) -> float:
        """Length of the union of the calls' intervals."""
        total, end = 0.0, -np.inf
        for t0, t1, _, _ in sorted(self.calls):
            if t1 <= end:
                continue
            total += t1 - max(t0, end)
            end = t1
        return total


def _numpy_trilinear(data: np.ndarray, ijk: np.ndarray) -> np.ndarray:
    """Trilinear interpolation of ``data`` at (3, n) index coordinates inside the array (numpy only)."""
    s1, s2 = data.shape[1], data.shape[2]
    flat = data.ravel()
    i = np.clip(np.floor(ijk).astype(np.intp), 0, np.array(data.shape)[:, None] - 2)
    f = ijk - i  # from the clipped corner: a point on the last plane takes all of that plane
    base = (i[0] * s1 + i[1]) * s2 + i[2]
    fx, fy, fz = f
    gx, gy, gz = 1.0 - fx, 1.0 - fy, 1.0 - fz

    def v(o: int) -> np.ndarray:
        return flat.take(base + o)

    a = s1 * s2
    return gx * (gy * (gz * v(0) + fz * v(1)) + fy * (gz * v(s2) + fz * v(s2 + 1))) + fx * (
        gy * (gz * v(a) + fz * v(a + 1)) + fy * (gz * v(a + s2) + fz * v(a + s2 + 1))
    )


def _per_sample_ns(kept: list[tuple[np.ndarray, np.ndarray]]) -> tuple[float, float]:
    """ns per sample, one thread: map_coordinates (order 1) and the numpy trilinear, same coordinates."""
    if not kept:
        return float("nan"), float("nan")
    mc = tri = 0.0
    n = 0
    for data, ijk in kept:
        inside = np.all((ijk >= 0) & (ijk <= np.array(data.shape)[:, None] - 1), axis=0)
        c = np.ascontiguousarray(ijk[:, inside])
        out = np.empty(c.shape[1], np.float32)
        t = time.perf_counter()
        scipy.ndimage.map_coordinates(data, c, order=1, mode="constant", cval=0.0, output=out)
        mc += time.perf_counter() - t
        t = time.perf_counter()
        ref = _numpy_trilinear(data, c)
        tri += time.perf_counter() - t
        assert np.allclose(ref, out, atol=1e-6)  # the same interpolation
        n += c.shape[1]
    return 1e9 * mc / n, 1e9 * tri / n


CORES = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)


def _ladder_floor(n: int) -> dict:
    with SamplingClock(keep=True) as clock:
        r = bp._ladder(n)
    return {
        "branches": n,
        "geometry_s": r["geometry_s"],
        "samples_per_branch": clock.samples / n,
        "sampling_s": clock.busy_seconds(),
        "floor_1e5_s": clock.floor_seconds(CORES) / n * 1e5,
        "rest_1e5_s": (r["geometry_s"] - clock.busy_seconds()) / n * 1e5,
        "per_sample_ns": _per_sample_ns(clock.kept),
    }


def _network_floor() -> dict:
    from skimage.morphology import skeletonize

    import vesselgeom as vg
    from vesselgeom.phantoms import network_phantom

    shape, n_trees, depth = bp.SIZES["400x512x512"]
    mask, affine = network_phantom(shape, n_trees=n_trees, depth=depth, seed=1)
    t = time.perf_counter()
    skeletonize(mask)
    thin = time.perf_counter() - t
    t = time.perf_counter()
    scipy.ndimage.label(mask, structure=np.ones((3, 3, 3)))
    label = time.perf_counter() - t
    with SamplingClock() as clock, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = time.perf_counter()
        res = vg.analyze(mask, affine=affine)
        whole = time.perf_counter() - t
    return {
        "branches": len(res.branches),
        "thinning_alone_s": thin,
        "label_s": label,
        "analyze_s": whole,
        "samples": clock.samples,
        "samples_per_branch": clock.samples / len(res.branches),
        "sampling_s": clock.busy_seconds(),
        "sampling_floor_s": clock.floor_seconds(CORES),
        "floor_ratio": (thin + clock.floor_seconds(CORES)) / thin,
        "ratio": whole / thin,
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ladder", type=int, default=10_000, help="branches of the ladder run")
    ap.add_argument("--no-network", action="store_true", help="skip the 400 x 512 x 512 network")
    ap.add_argument("--out", default=str(HERE / "results.md"))
    args = ap.parse_args()

    lines = [
        f"\n## {time.strftime('%Y-%m-%d %H:%M')} sampling floor (`benchmarks/bench_floor.py`)",
        f"Machine: {bp._machine()}.",
        "",
    ]
    lad = _ladder_floor(args.ladder)
    mc_ns, np_ns = lad["per_sample_ns"]
    lines += [
        f"- Geometry ladder, {lad['branches']} branches: {lad['geometry_s']:.2f} s of geometry; "
        f"{lad['samples_per_branch']:.0f} mask samples per branch; sampling observed running "
        f"{lad['sampling_s']:.2f} s ({100 * lad['sampling_s'] / lad['geometry_s']:.0f} %). For 10^5 "
        f"branches: sampling floor **{lad['floor_1e5_s']:.1f} s** (CPU time / {CORES} cores), the rest "
        f"(while no sampling runs) **{lad['rest_1e5_s']:.1f} s**; target for all of the geometry: 30 s.",
        f"- Per sample, one thread, on the pipeline's own coordinates: map_coordinates {mc_ns:.0f} ns, "
        f"numpy trilinear {np_ns:.0f} ns.",
    ]
    print("\n".join(lines[-2:]), flush=True)
    if not args.no_network:
        net = _network_floor()
        lines.append(
            f"- 400 x 512 x 512 network, {net['branches']} branches: thinning alone "
            f"{net['thinning_alone_s']:.2f} s, analyze {net['analyze_s']:.2f} s ({net['ratio']:.2f}x); "
            f"{net['samples_per_branch']:.0f} mask samples per branch; sampling floor "
            f"{net['sampling_floor_s']:.2f} s (observed running {net['sampling_s']:.2f} s); (thinning + "
            f"sampling floor) / thinning = **{net['floor_ratio']:.2f}x** (target for the whole analyze: "
            f"1.5x). One scipy.ndimage.label of the mask: {net['label_s']:.2f} s (not in the floor)."
        )
        print(lines[-1], flush=True)
    with Path(args.out).open("a") as fh:
        fh.write("\n".join(lines) + "\n")
    print(f"appended to {args.out}")


if __name__ == "__main__":
    main()
