"""``selfplay bench replay``: replay storage speed and size, measured in this run on one core.

Figures (medians of ``--repeats`` timed runs) on synthetic random legal games of the chosen
game (9x9 Go by default) with made-up sparse visit counts:

- ``ingest_ram_positions_per_second``: :meth:`ReplayBuffer.add` into the RAM window;
- ``ingest_disk_positions_per_second``: :meth:`RecordStore.add_games` + flush (encode, deflate,
  CRC, write, fsync, rename, catalog commit);
- ``read_positions_per_second``: :class:`RunReader` decoding the shards back (every check on);
- ``sample_positions_per_second``: :meth:`ReplayBuffer.sample` at ``--batch`` (256) with
  symmetry augmentation and input planes built;
- ``disk_bytes_per_position``, ``ram_bytes_per_position`` and ``ram_bytes_for_fill`` (the
  buffer's arrays after a fill of ``--fill`` positions, default 1,000,000), beside the RSS growth
  of the process during that fill.

The issue's targets on one core: ingest >= 100,000 positions/s, sampling >= 50,000 positions/s,
1,000,000 positions of 9x9 Go in <= 1 GiB.
"""

from __future__ import annotations

import argparse
import json
import shutil
import statistics
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

from selfplay.errors import ConfigError
from selfplay.games.registry import make_game
from selfplay.replay import synthetic
from selfplay.replay.buffer import ReplayBuffer
from selfplay.replay.reader import RunReader
from selfplay.replay.store import RecordStore

BENCH_GAMES: dict[str, tuple[str, dict[str, Any]]] = {
    "go9": ("go", {"size": 9}),
    "mnk9": ("mnk", {"m": 9, "n": 9, "k": 5}),
    "tictactoe": ("tictactoe", {}),
}
TARGET_INGEST = 100_000
TARGET_SAMPLE = 50_000
TARGET_RAM_BYTES_1M = 2**30


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--game", choices=sorted(BENCH_GAMES), default="go9", help="game of the synthetic records (go9)")
    p.add_argument("--distinct-games", dest="games", type=int, default=150, metavar="N",
                   help="distinct random games generated, then repeated to fill --positions (150)")
    p.add_argument("--positions", type=int, default=200_000, help="positions ingested per timed run (200,000)")
    p.add_argument("--batch", type=int, default=256, help="sampling batch size (256)")
    p.add_argument("--batches", type=int, default=200, help="batches per timed sampling run (200)")
    p.add_argument("--repeats", type=int, default=3, help="timed runs per figure; the median is reported (3)")
    p.add_argument("--fill", type=int, default=1_000_000, help="positions of the RAM fill (1,000,000; 0 skips)")
    p.add_argument("--entries", type=int, default=24, help="most visit entries per position (24)")


def _rss_bytes() -> int:
    try:
        with open("/proc/self/statm") as f:
            return int(f.read().split()[1]) * 4096
    except OSError:
        return 0


def measure(args: argparse.Namespace) -> dict[str, Any]:
    for name in ("games", "positions", "batch", "batches", "repeats", "entries"):
        if getattr(args, name) < 1:
            raise ConfigError(f"--{name} {getattr(args, name)} must be >= 1")
    if args.fill < 0:
        raise ConfigError(f"--fill {args.fill} must be >= 0")
    gname, opts = BENCH_GAMES[args.game]
    game = make_game(gname, **opts)
    rng = np.random.default_rng(0)
    base = [synthetic.random_record(game, rng, f"base{i}", game_name=gname, game_options=opts,
                                    snapshot=i, max_entries=args.entries) for i in range(args.games)]
    mean_len = float(np.mean([r.num_positions for r in base]))

    def stream(n_positions: int, tag: str) -> list:
        out, total, i = [], 0, 0
        while total < n_positions:
            r = base[i % len(base)]
            out.append(synthetic.with_id(r, f"{tag}-{i}"))
            total += r.num_positions
            i += 1
        return out

    # ingest into RAM
    ram_rates = []
    for rep in range(args.repeats):
        recs = stream(args.positions, f"ram{rep}")
        buf = ReplayBuffer(game, args.positions, seed=rep)
        t0 = time.perf_counter()
        n = buf.add_many(recs)
        ram_rates.append(n / (time.perf_counter() - t0))
    ram_bytes_per_position = buf.nbytes / len(buf)

    # ingest to disk, then read back
    disk_rates, read_rates, disk_bpp = [], [], []
    for rep in range(args.repeats):
        recs = stream(min(args.positions, 100_000), f"disk{rep}")
        n = sum(r.num_positions for r in recs)
        tmp = Path(tempfile.mkdtemp(prefix="plyfoundry-bench-"))
        try:
            t0 = time.perf_counter()
            with RecordStore(tmp / "run") as store:
                for i in range(0, len(recs), 32):
                    store.add_games(recs[i:i + 32])
                store.flush()
            disk_rates.append(n / (time.perf_counter() - t0))
            shard_bytes = sum(p.stat().st_size for p in (tmp / "run" / "shards").glob("*.plyrec"))
            disk_bpp.append(shard_bytes / n)
            t0 = time.perf_counter()
            got = sum(r.num_positions for r in RunReader(tmp / "run", on_corrupt="raise").records())
            read_rates.append(got / (time.perf_counter() - t0))
        finally:
            shutil.rmtree(tmp, ignore_errors=True)

    # sampling with augmentation and planes
    sample_rates, sample_pt_rates = [], []
    for rep in range(args.repeats):
        t0 = time.perf_counter()
        for _ in range(args.batches):
            buf.sample(args.batch)
        sample_rates.append(args.batches * args.batch / (time.perf_counter() - t0))
        t0 = time.perf_counter()
        for _ in range(args.batches):
            buf.sample(args.batch, policy_targets_only=True)
        sample_pt_rates.append(args.batches * args.batch / (time.perf_counter() - t0))
    del buf

    fill: dict[str, Any] = {}
    if args.fill:
        rss0 = _rss_bytes()
        big = ReplayBuffer(game, args.fill, seed=0)
        i = 0
        t0 = time.perf_counter()
        while len(big) < args.fill:
            big.add(synthetic.with_id(base[i % len(base)], f"fill{i}"))
            i += 1
        fill = {"fill_positions": len(big), "fill_seconds": time.perf_counter() - t0,
                "ram_bytes_for_fill": big.nbytes, "ram_bytes_for_fill_worst_case": big.max_nbytes(),
                "rss_growth_bytes_for_fill": _rss_bytes() - rss0}
        if args.fill == 1_000_000:
            fill["ram_target_ratio"] = TARGET_RAM_BYTES_1M / big.nbytes
        del big

    out = {
        "game": gname, "options": game.options(), "mean_game_length": mean_len,
        "ingest_ram_positions_per_second": statistics.median(ram_rates),
        "ingest_disk_positions_per_second": statistics.median(disk_rates),
        "read_positions_per_second": statistics.median(read_rates),
        "sample_positions_per_second": statistics.median(sample_rates),
        "sample_policy_targets_positions_per_second": statistics.median(sample_pt_rates),
        "batch_size": args.batch,
        "disk_bytes_per_position": statistics.median(disk_bpp),
        "ram_bytes_per_position": ram_bytes_per_position,
        **fill,
        "targets": {"ingest_positions_per_second": TARGET_INGEST,
                    "sample_positions_per_second": TARGET_SAMPLE,
                    "ram_bytes_for_1m_positions": TARGET_RAM_BYTES_1M},
        "repeats": {"ingest_ram": ram_rates, "ingest_disk": disk_rates, "read": read_rates,
                    "sample": sample_rates},
    }
    out["ratios"] = {
        "ingest_ram_over_target": out["ingest_ram_positions_per_second"] / TARGET_INGEST,
        "ingest_disk_over_target": out["ingest_disk_positions_per_second"] / TARGET_INGEST,
        "sample_over_target": out["sample_positions_per_second"] / TARGET_SAMPLE,
    }
    return out


def run(args: argparse.Namespace) -> int:
    figs = measure(args)
    if getattr(args, "json", False):
        print(json.dumps(figs, indent=2))
        return 0
    r = figs["ratios"]
    print(f"replay storage, {figs['game']} {figs['options']}, mean game {figs['mean_game_length']:.0f} positions")
    print(f"  ingest to RAM     {figs['ingest_ram_positions_per_second']:>12,.0f} positions/s  ({r['ingest_ram_over_target']:.1f}x target)")
    print(f"  ingest to disk    {figs['ingest_disk_positions_per_second']:>12,.0f} positions/s  ({r['ingest_disk_over_target']:.1f}x target)")
    print(f"  read back         {figs['read_positions_per_second']:>12,.0f} positions/s")
    print(f"  sample (B={figs['batch_size']})    {figs['sample_positions_per_second']:>12,.0f} positions/s  ({r['sample_over_target']:.1f}x target)")
    print(f"  sample, targets   {figs['sample_policy_targets_positions_per_second']:>12,.0f} positions/s")
    print(f"  disk              {figs['disk_bytes_per_position']:>12.1f} bytes/position")
    print(f"  RAM               {figs['ram_bytes_per_position']:>12.1f} bytes/position")
    if "ram_bytes_for_fill" in figs:
        print(f"  RAM for {figs['fill_positions']:,} positions: {figs['ram_bytes_for_fill'] / 2**20:,.0f} MiB "
              f"(worst case {figs['ram_bytes_for_fill_worst_case'] / 2**20:,.0f} MiB, "
              f"RSS grew {figs['rss_growth_bytes_for_fill'] / 2**20:,.0f} MiB)")
    return 0
