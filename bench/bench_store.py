"""Benchmark of the demonstration store: append, load, metadata queries.

A 60 s demonstration of 7 joints at 1 kHz with all four channels is appended through the store
API in recorder-sized chunks, then loaded back. Baselines measured in the same run: the same
samples stored one row per sample and fetched with plain ``sqlite3`` into a numpy array (the
row layout the store avoids), and the floor of reading the store's own blobs with one plain
``SELECT`` plus ``numpy.frombuffer``. Finally one metadata query over a store of 10,000
demonstrations. Prints one JSON object per line; the last line is ``{"bench": "store", ...}``.

Run: ``python bench/bench_store.py [--quick]``
"""

from __future__ import annotations

import argparse
import sqlite3
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
from _timing import emit, median_ms

from compliant_demo.store import DemoStore

JOINTS = [f"joint{i}" for i in range(1, 8)]
RATE_HZ = 1000.0


def _samples(duration_s: float, seed: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    t = np.arange(int(duration_s * RATE_HZ)) / RATE_HZ
    phase = rng.uniform(0, 2 * np.pi, len(JOINTS))
    position = 0.5 * np.sin(2 * np.pi * 0.2 * t[:, None] + phase)
    return {
        "t": t,
        "position": position,
        "velocity": np.gradient(position, t, axis=0),
        "torque": 3.0 * position + rng.normal(0, 0.05, position.shape),
        "stiffness": 50.0 + 20.0 * np.cos(2 * np.pi * 0.1 * t[:, None] + phase),
    }


def _append(
    path: Path, data: dict[str, np.ndarray], chunk: int, durable: bool
) -> tuple[str, float]:
    with DemoStore(path, durable=durable) as store:
        start = time.perf_counter()
        demo_id = store.begin_demonstration(skill="cork_seat", joints=JOINTS, operator="operator_a")
        for i in range(0, data["t"].size, chunk):
            part = slice(i, i + chunk)
            store.append_chunk(
                demo_id, data["t"][part], data["position"][part], data["velocity"][part],
                data["torque"][part], data["stiffness"][part],
            )  # fmt: skip
        store.finish_demonstration(demo_id)
        elapsed = time.perf_counter() - start
    return demo_id, elapsed


def _rows_baseline(path: Path, data: dict[str, np.ndarray]) -> Callable[[], np.ndarray]:
    columns = ["t"] + [f"{c}_{j}" for c in ("q", "dq", "tau", "k") for j in range(len(JOINTS))]
    conn = sqlite3.connect(path)
    conn.execute(f"CREATE TABLE samples (demo_id TEXT, {', '.join(c + ' REAL' for c in columns)})")
    conn.execute("CREATE INDEX idx_samples ON samples (demo_id, t)")
    table = np.hstack([data["t"][:, None], data["position"], data["velocity"], data["torque"],
                       data["stiffness"]])  # fmt: skip
    conn.executemany(
        f"INSERT INTO samples VALUES ('demo', {', '.join('?' for _ in columns)})", table.tolist()
    )
    conn.commit()

    def fetch() -> np.ndarray:
        rows = conn.execute(
            f"SELECT {', '.join(columns)} FROM samples WHERE demo_id = 'demo' ORDER BY t"
        ).fetchall()
        return np.array(rows, dtype=np.float64)

    return fetch


def _floor(path: Path, demo_id: str) -> Callable[[], list[np.ndarray]]:
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)

    def read() -> list[np.ndarray]:
        rows = conn.execute(
            "SELECT t, position, velocity, torque, stiffness FROM chunks WHERE demo_id = ? "
            "ORDER BY seq",
            (demo_id,),
        ).fetchall()
        return [np.frombuffer(blob, dtype="<f8") for row in rows for blob in row]

    return read


def _build_catalogue(path: Path, n_demos: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    skills = ["cork_seat", "cork_pull", "wipe"]
    operators = ["operator_a", "operator_b"]
    tag_pool = ["soft_approach", "stiff_press", "soft_retreat", "practice", "bench_2"]
    t = np.arange(20) / 100.0
    with DemoStore(path, durable=False) as store:
        for i in range(n_demos):
            q = rng.normal(0, 0.1, (t.size, 2))
            store.add_demonstration(
                t=t * rng.uniform(1, 40), position=q, velocity=q, torque=q, stiffness=q + 100,
                skill=skills[i % 3], operator=operators[i % 2], joints=["shoulder", "elbow"],
                tags=list(rng.choice(tag_pool, size=2, replace=False)),
                start_time=1.7e9 + 60.0 * i,
            )  # fmt: skip


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--quick", action="store_true", help="10 s demonstration, 1,000 demos")
    args = parser.parse_args()
    duration_s = 10.0 if args.quick else 60.0
    n_catalogue = 1000 if args.quick else 10_000
    data = _samples(duration_s, seed=7)
    with tempfile.TemporaryDirectory() as tmp:
        tmpdir = Path(tmp)
        results: dict[str, float | int | str] = {}
        for chunk, durable in ((100, True), (1000, True), (1000, False)):
            _, elapsed = _append(tmpdir / f"append_{chunk}_{durable}.sqlite", data, chunk, durable)
            record = {"bench": "store_append", "chunk_samples": chunk, "durable": durable,
                      "wall_s": elapsed, "realtime_factor": duration_s / elapsed}  # fmt: skip
            emit(record)
            results[f"append_realtime_factor_chunk{chunk}_{'durable' if durable else 'normal'}"] = (
                record["realtime_factor"]
            )
        # the headline: median of three appends into fresh files (fsync times vary on a busy disk)
        runs = [_append(tmpdir / f"store_{i}.sqlite", data, 1000, True) for i in range(3)]
        elapsed = sorted(wall for _, wall in runs)[1]
        demo_id, path = runs[-1][0], tmpdir / "store_2.sqlite"
        with DemoStore(path, read_only=True) as store:
            load_ms = median_ms(lambda: store.load_demonstration(demo_id), 15)
            loaded = store.load_demonstration(demo_id)
            assert np.array_equal(loaded.stiffness, data["stiffness"])
        floor_ms = median_ms(_floor(path, demo_id), 15)
        rows_ms = median_ms(_rows_baseline(tmpdir / "rows.sqlite", data), 5)
        emit({"bench": "store_load", "load_ms": load_ms, "floor_ms": floor_ms,
               "rows_ms": rows_ms, "megabytes": 8 * 29 * data["t"].size / 1e6})  # fmt: skip

        catalogue = tmpdir / "catalogue.sqlite"
        start = time.perf_counter()
        _build_catalogue(catalogue, n_catalogue, seed=11)
        emit({"bench": "store_catalogue", "demonstrations": n_catalogue,
               "build_s": time.perf_counter() - start})  # fmt: skip
        with DemoStore(catalogue, read_only=True) as store:
            query = {"skill": "cork_seat", "operator": "operator_a", "tag": "stiff_press",
                     "min_duration_s": 2.0, "order_by": "-start_time"}  # fmt: skip
            find_ms = median_ms(lambda: list(store.find_demonstrations(**query)), 15)
            n_found = len(list(store.find_demonstrations(**query)))
            find_all_ms = median_ms(lambda: list(store.find_demonstrations()), 5)
            count_ms = median_ms(lambda: store.count_demonstrations(status="complete"), 15)
        emit({"bench": "store_find", "query": query, "rows": n_found, "find_ms": find_ms,
               "find_all_ms": find_all_ms, "count_ms": count_ms})  # fmt: skip

        results.update(
            bench="store",
            duration_s=duration_s,
            joints=len(JOINTS),
            rate_hz=RATE_HZ,
            append_chunk_samples=1000,
            append_realtime_factor=duration_s / elapsed,
            load_ms=load_ms,
            load_vs_rows_speedup=rows_ms / load_ms,
            load_vs_floor_ratio=load_ms / floor_ms,
            find_ms_10k=find_ms,
            find_rows=n_found,
            find_all_ms=find_all_ms,
            catalogue_demonstrations=n_catalogue,
        )
        emit(results)


if __name__ == "__main__":
    main()
