#!/usr/bin/env python
"""Load test of the head node: many synthetic self-play workers against the buffer and the
snapshot fan-out, to tell how many CPU workers one head serves.

A synthetic worker makes records without search (random legal 9x9 Go games with made-up visit
counts, :mod:`selfplay.replay.synthetic`) at a set rate of positions per second, and behaves as
a real :class:`cluster.actors.SelfPlayActor` does on the wire: every ``--report-seconds`` it
sends the games it finished in one ``add_games`` call to its buffer shard and waits for the
answer before it sends again (so a slow buffer slows it down, as it would a real worker), and
every ``--poll-seconds`` it asks the snapshot actor for a newer version and fetches the weights
from the object store when there is one. The driver publishes a reference-size (6 x 64) snapshot
every ``--publish-seconds``.

The synthetic workers are simulated many to a process (``--generators`` processes), since 500
real processes do not fit on one machine; the buffer sees the same calls, sizes and rate.

Figures (one run): offered and achieved positions/s, their ratio, add_games latency (median,
95th percentile), snapshot pickup lag (publish -> every worker has the new version: median and
max over publishes), and snapshot polls per second. Run with several ``--buffer-shards`` to see
where one buffer process stops keeping up.

    python scripts/load_test.py --workers 500 --rate 100 --seconds 30 --buffer-shards 1
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from cluster import session  # noqa: E402


def _generator_class():
    import ray

    @ray.remote(num_cpus=1)
    class SyntheticWorkers:
        """``count`` synthetic workers in one process, each with its own send and poll schedule."""

        def __init__(self, index: int, count: int, config_data: dict[str, Any], buffers: Any, snapshots: Any,
                     rate: float, report_seconds: float, poll_seconds: float, pool_size: int, max_moves: int) -> None:
            from selfplay.config import config_from_dict
            from selfplay.games.registry import make_game
            from selfplay.replay.synthetic import random_record

            cfg = config_from_dict(config_data)
            game = make_game(cfg.game.name, **cfg.game.options)
            rng = np.random.default_rng(index)
            self.pool = [random_record(game, rng, f"pool{i}", max_moves=max_moves) for i in range(pool_size)]
            self.positions_per_game = float(np.mean([r.num_positions for r in self.pool]))
            self.index, self.count = index, count
            self.buffers, self.snapshots = buffers, snapshots
            self.rate, self.report_seconds, self.poll_seconds = rate, report_seconds, poll_seconds

        def pool_positions(self) -> float:
            return self.positions_per_game

        def run(self, seconds: float, start_at: float) -> dict[str, Any]:
            import ray

            from selfplay.replay.synthetic import with_id

            while time.time() < start_at:
                time.sleep(0.01)
            t0 = time.monotonic()
            n = self.count
            rng = np.random.default_rng(1000 + self.index)
            next_send = t0 + rng.uniform(0, self.report_seconds, size=n)
            next_poll = t0 + rng.uniform(0, self.poll_seconds, size=n)
            owed = np.zeros(n)  # positions finished but not sent yet
            last_credit = np.full(n, t0)
            version = np.zeros(n, dtype=np.int64)
            pickups: list[tuple[int, int, float]] = []  # (worker, version, time)
            inflight: dict[Any, tuple[int, float, int]] = {}  # ref -> (worker, sent at, positions)
            polls: dict[Any, int] = {}
            fetches: dict[Any, list[tuple[int, int]]] = {}  # weights ref -> workers fetching it
            busy = np.zeros(n, dtype=bool)
            latencies: list[float] = []
            sent_positions = 0
            acked_positions = 0
            polls_done = 0
            game_counter = 0
            end = t0 + seconds
            while True:
                now = time.monotonic()
                if now >= end and not inflight:
                    break
                if now < end:
                    # credit production since the last look (a worker that waits produces anyway:
                    # its games keep finishing while its previous send is answered)
                    owed += (now - last_credit) * self.rate
                    last_credit[:] = now
                    due = np.flatnonzero((next_send <= now) & ~busy)
                    for w in due:
                        games = int(owed[w] // self.positions_per_game)
                        next_send[w] = now + self.report_seconds
                        if games <= 0:
                            continue
                        recs = []
                        for _ in range(games):
                            src = self.pool[game_counter % len(self.pool)]
                            recs.append(with_id(src, f"g{self.index}-{w}-{game_counter}", worker_id=f"s{self.index}-{w}"))
                            game_counter += 1
                        pos = sum(r.num_positions for r in recs)
                        owed[w] -= games * self.positions_per_game
                        ref = self.buffers[w % len(self.buffers)].add_games.remote(recs)
                        inflight[ref] = (int(w), now, pos)
                        busy[w] = True
                        sent_positions += pos
                    for w in np.flatnonzero(next_poll <= now):
                        next_poll[w] = now + self.poll_seconds
                        polls[self.snapshots.current.remote(int(version[w]))] = int(w)
                refs = list(inflight) + list(polls) + list(fetches)
                if not refs:
                    time.sleep(0.005)
                    continue
                ready, _ = ray.wait(refs, num_returns=len(refs), timeout=0.01)
                for ref in ready:
                    if ref in inflight:
                        w, sent, pos = inflight.pop(ref)
                        ray.get(ref)
                        busy[w] = False
                        latencies.append(time.monotonic() - sent)
                        acked_positions += pos
                    elif ref in polls:
                        w = polls.pop(ref)
                        polls_done += 1
                        v, wrapped = ray.get(ref)
                        if wrapped and v > version[w]:
                            fetches.setdefault(wrapped[0], []).append((w, v))
                    else:
                        for w, v in fetches.pop(ref):
                            weights = ray.get(ref)  # each worker reads the weights from the object store
                            assert weights
                            if v > version[w]:
                                version[w] = v
                                pickups.append((int(w), int(v), time.time()))
            return {"latencies": latencies, "sent_positions": sent_positions, "acked_positions": acked_positions,
                    "polls": polls_done, "pickups": pickups,
                    "workers": n, "elapsed": time.monotonic() - t0}

    return SyntheticWorkers


def run(args: argparse.Namespace) -> dict[str, Any]:
    import ray

    from cluster.actors import BufferActor, BufferClient, SnapshotActor
    from selfplay.config import load_preset, with_overrides
    from selfplay.games.registry import make_game
    from selfplay.network import build_network
    from selfplay.snapshots import SnapshotStore

    config = with_overrides(load_preset("go9"), {"run.buffer_shards": args.buffer_shards})
    run_dir = Path(args.run_dir or tempfile.mkdtemp(prefix="plyfoundry-load-"))
    remove_after = args.run_dir is None
    data = config.model_dump(mode="json")
    session.start_local(num_cpus=args.generators + 1)
    try:
        handles = [BufferActor.options(max_restarts=0).remote(str(run_dir), data, i, args.buffer_shards)
                   for i in range(args.buffer_shards)]
        client = BufferClient(handles)
        snaps = SnapshotActor.remote(str(run_dir), data)
        client.stats(timeout=300)
        ray.get(snaps.refresh.remote())
        gen_cls = _generator_class()
        per = [args.workers // args.generators + (1 if i < args.workers % args.generators else 0)
               for i in range(args.generators)]
        gens = [gen_cls.remote(i, per[i], data, handles, snaps, args.rate, args.report_seconds, args.poll_seconds,
                               args.pool, args.max_moves) for i in range(args.generators)]
        ppg = float(np.mean(ray.get([g.pool_positions.remote() for g in gens])))
        game = make_game(config.game.name, **config.game.options)
        net = build_network(game, config.network, seed=1)
        store = SnapshotStore(run_dir, source="load-test")
        start_at = time.time() + 2.0
        refs = [g.run.remote(args.seconds, start_at) for g in gens]
        warmup = min(args.seconds / 3, 2 * args.report_seconds)  # every worker has sent once or twice
        while time.time() < start_at + warmup:
            time.sleep(0.01)
        before = client.stats()
        t_before = time.time()
        publishes: dict[int, float] = {}
        refresh_seconds: list[float] = []
        next_pub = time.time() + args.publish_seconds / 2
        samples = []
        while time.time() < start_at + args.seconds:
            if time.time() >= next_pub:
                next_pub += args.publish_seconds
                with __import__("torch").no_grad():
                    for p in net.parameters():
                        p.add_(0.001)
                t_pub = time.time()
                v = store.publish(net)
                publishes[v] = t_pub
                ray.get(snaps.refresh.remote())
                refresh_seconds.append(time.time() - t_pub)
            if args.learner_samples:
                samples.append(len(client.sample(256)["value"]))
            time.sleep(0.2)
        mid = client.stats()
        t_mid = time.time()
        results = ray.get(refs)
        after = client.flush()
        lat = np.array(sum((r["latencies"] for r in results), []))
        offered = args.workers * args.rate
        achieved = (mid["positions_total"] - before["positions_total"]) / (t_mid - t_before)
        # pickup lag of version v: publish -> the moment the last worker plays v or newer
        first_at: dict[tuple[int, int], float] = {}  # (generator, worker) -> times by version
        per_worker: dict[tuple[int, int], list[tuple[int, float]]] = {}
        for g, r in enumerate(results):
            for w, v, t in r["pickups"]:
                per_worker.setdefault((g, w), []).append((v, t))
        lags = []
        for v, t_pub in publishes.items():
            reached = []
            for key in ((g, w) for g, r in enumerate(results) for w in range(r["workers"])):
                times = [t for ver, t in per_worker.get(key, []) if ver >= v]
                if not times:
                    break
                reached.append(min(times))
            else:
                lags.append(max(reached) - t_pub)
        del first_at
        out = {
            "workers": args.workers, "rate_per_worker": args.rate, "buffer_shards": args.buffer_shards,
            "generators": args.generators, "seconds": args.seconds, "positions_per_game": round(ppg, 1),
            "offered_positions_per_second": offered,
            "achieved_positions_per_second": round(achieved, 1),
            "achieved_over_offered": round(achieved / offered, 3),
            "workers_served_at_rate": int(achieved // args.rate),
            "add_games_calls": int(lat.size),
            "add_games_latency_median_ms": round(float(np.median(lat)) * 1000, 1) if lat.size else None,
            "add_games_latency_p95_ms": round(float(np.percentile(lat, 95)) * 1000, 1) if lat.size else None,
            "snapshot_polls_per_second": round(sum(r["polls"] for r in results) / args.seconds, 1),
            "snapshots_published": len(publishes),
            "publish_to_object_store_median_s": round(float(np.median(refresh_seconds)), 3) if refresh_seconds else None,
            "snapshot_pickup_lag_median_s": round(float(np.median(lags)), 2) if lags else None,
            "snapshot_pickup_lag_max_s": round(float(max(lags)), 2) if lags else None,
            "snapshot_versions_reaching_every_worker": f"{len(lags)}/{len(publishes)}",
            "games_stored": after["games_durable"], "positions_stored": after["positions_durable"],
        }
        if not remove_after:
            out["run_dir"] = str(run_dir)
        return out
    finally:
        session.shutdown()
        if remove_after:
            shutil.rmtree(run_dir, ignore_errors=True)


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--workers", type=int, default=500, help="synthetic workers (default 500)")
    p.add_argument("--rate", type=float, default=100.0, help="positions per second per worker (default 100)")
    p.add_argument("--seconds", type=float, default=30.0, help="measured seconds (default 30)")
    p.add_argument("--buffer-shards", type=int, default=1, help="buffer shards (default 1)")
    p.add_argument("--generators", type=int, default=2, help="processes that host the synthetic workers")
    p.add_argument("--report-seconds", type=float, default=2.0, help="a worker sends its games this often (s)")
    p.add_argument("--poll-seconds", type=float, default=2.0, help="a worker asks for a new snapshot this often (s)")
    p.add_argument("--publish-seconds", type=float, default=10.0, help="a new snapshot every ... s")
    p.add_argument("--pool", type=int, default=16, help="distinct synthetic games per generator")
    p.add_argument("--max-moves", type=int, default=100, help="moves per synthetic 9x9 game (positions per game)")
    p.add_argument("--learner-samples", action="store_true", help="also draw batches of 256 as a learner would")
    p.add_argument("--run-dir", help="run directory (default: a new temporary one)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    args = p.parse_args()
    out = run(args)
    if args.json:
        print(json.dumps(out))
    else:
        for k, v in out.items():
            print(f"{k:32s} {v}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
