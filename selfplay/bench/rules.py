"""``selfplay bench rules``: how fast the rules run, measured in this run.

For each game: random playouts through the :class:`~selfplay.games.base.Game` interface (the
legal mask computed at every move, a uniformly random legal move chosen, played, until the game
ends, then a new game), reported as moves per second; and legal-mask computations per second over
positions taken from such playouts. Each figure is the median of ``--repeats`` timed runs of about
``--seconds`` each; moves per CPU second of this process are reported beside the wall-clock
rate, as the machine may be shared. Where a game also offers a compiled playout loop
(``benchmark_playouts(num_games, seed) -> moves played``), its figure is reported beside the
interface figure as ``kernel_moves_per_second``.

The issue's target for 9x9 Go is at least 100,000 moves per second on one core.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import time
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np

from selfplay.errors import ConfigError
from selfplay.games.base import Game
from selfplay.games.registry import make_game

#: benchmark name -> (game name, options, label)
BENCH_GAMES: dict[str, tuple[str, dict[str, Any], str]] = {
    "go9": ("go", {"size": 9}, "Go 9x9"),
    "go19": ("go", {"size": 19}, "Go 19x19"),
    "fourinrow": ("fourinrow", {"columns": 7, "rows": 6}, "four-in-a-row 7x6"),
    "gomoku15": ("gomoku", {"m": 15, "n": 15, "k": 5}, "gomoku 15x15"),
}

#: the issue's target: random-playout moves per second for 9x9 Go on one core
GO9_TARGET_MOVES_PER_SECOND = 100_000


@dataclass
class GameFigures:
    """Figures of one game: rates are medians over the repeats."""

    label: str
    game: str
    options: dict[str, Any]
    moves_per_second: float
    moves_per_cpu_second: float
    legal_masks_per_second: float
    mean_game_length: float
    games_finished: int
    moves_per_second_repeats: list[float] = field(default_factory=list)
    legal_masks_per_second_repeats: list[float] = field(default_factory=list)
    kernel_moves_per_second: float | None = None
    kernel_moves_per_cpu_second: float | None = None
    kernel_moves_per_second_repeats: list[float] = field(default_factory=list)

    def as_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "label": self.label,
            "game": self.game,
            "options": self.options,
            "moves_per_second": self.moves_per_second,
            "moves_per_cpu_second": self.moves_per_cpu_second,
            "microseconds_per_move": 1e6 / self.moves_per_second,
            "legal_masks_per_second": self.legal_masks_per_second,
            "mean_game_length": self.mean_game_length,
            "games_finished": self.games_finished,
            "moves_per_second_repeats": self.moves_per_second_repeats,
            "legal_masks_per_second_repeats": self.legal_masks_per_second_repeats,
        }
        if self.kernel_moves_per_second is not None:
            out["kernel_moves_per_second"] = self.kernel_moves_per_second
            out["kernel_moves_per_cpu_second"] = self.kernel_moves_per_cpu_second
            out["kernel_moves_per_second_repeats"] = self.kernel_moves_per_second_repeats
        return out


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--seconds", type=float, default=1.0,
                        help="duration of one timed run in seconds (default 1.0)")
    parser.add_argument("--repeats", type=int, default=3,
                        help="timed runs per figure; the median is reported (default 3)")
    parser.add_argument("--game-names", dest="games", metavar="NAMES", default=",".join(BENCH_GAMES),
                        help=f"comma-separated subset of {', '.join(BENCH_GAMES)} (default: all)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the random playouts (default 0)")


def _parse_games(text: str) -> list[str]:
    names = [t.strip() for t in text.split(",") if t.strip()]
    if not names:
        raise ConfigError("--game-names is empty; give one or more of " + ", ".join(BENCH_GAMES))
    unknown = [n for n in names if n not in BENCH_GAMES]
    if unknown:
        raise ConfigError(f"--game-names: unknown benchmark game(s) {', '.join(unknown)}; "
                          f"known: {', '.join(BENCH_GAMES)}")
    return names


def random_playouts(game: Game, seconds: float, rng: np.random.Generator) -> tuple[int, int, float, float]:
    """Play random games for about ``seconds``; return (moves, games finished, elapsed wall-clock
    seconds, elapsed CPU seconds of this process).

    Every move computes the legal mask, picks a uniformly random legal action and plays it;
    a finished game is replaced by a new one. The clock is read every 64 moves."""
    legal_mask, play, is_terminal = game.legal_mask, game.play, game.is_terminal
    flatnonzero = np.flatnonzero
    uniforms = rng.random(4096).tolist()
    u_index = 0
    moves = games = 0
    state = game.initial_state()
    cpu_start = time.process_time()
    start = time.perf_counter()
    deadline = start + seconds
    while True:
        for _ in range(64):
            if is_terminal(state):
                games += 1
                state = game.initial_state()
            legal = flatnonzero(legal_mask(state))
            state = play(state, legal[int(uniforms[u_index] * len(legal))])
            u_index = (u_index + 1) & 4095
            moves += 1
        now = time.perf_counter()
        if now >= deadline:
            return moves, games, now - start, time.process_time() - cpu_start


def sample_positions(game: Game, count: int, rng: np.random.Generator, min_games: int = 8) -> list[Any]:
    """``count`` non-terminal positions drawn at random from at least ``min_games`` random
    games, so that openings, middle games and endings all appear."""
    pool: list[Any] = []
    games = 0
    while games < min_games or len(pool) < count:
        state = game.initial_state()
        while not game.is_terminal(state):
            pool.append(state)
            legal = game.legal_actions(state)
            state = game.play(state, legal[rng.integers(len(legal))])
        games += 1
    picks = rng.choice(len(pool), size=count, replace=False)
    return [pool[int(i)] for i in picks]


def legal_mask_rate(game: Game, positions: list[Any], seconds: float) -> float:
    """Legal-mask computations per second, cycling over ``positions``."""
    legal_mask = game.legal_mask
    done = 0
    start = time.perf_counter()
    deadline = start + seconds
    while True:
        for state in positions:
            legal_mask(state)
        done += len(positions)
        now = time.perf_counter()
        if now >= deadline:
            return done / (now - start)


def kernel_calibrate(game: Any, seconds: float, seed: int) -> int:
    """Number of games for which the game's compiled playout loop runs about ``seconds``."""
    game.benchmark_playouts(1, seed)  # warm-up: compilation or cache load is not timed
    num_games = 1
    while True:
        start = time.perf_counter()
        game.benchmark_playouts(num_games, seed)
        elapsed = time.perf_counter() - start
        if elapsed >= 0.5 * seconds or num_games >= 1 << 24:
            return max(1, int(num_games * seconds / max(elapsed, 1e-9)))
        num_games = int(num_games * min(8.0, max(2.0, 0.5 * seconds / max(elapsed, 1e-9)))) + 1


def kernel_rate(game: Any, num_games: int, seed: int) -> tuple[float, float]:
    """(moves per wall-clock second, moves per CPU second) of the game's own compiled playout
    loop over ``num_games`` games."""
    cpu_start = time.process_time()
    start = time.perf_counter()
    moves = int(game.benchmark_playouts(num_games, seed))
    elapsed = time.perf_counter() - start
    cpu = time.process_time() - cpu_start
    if moves <= 0:
        raise ConfigError(f"{game.name}: benchmark_playouts reported {moves} moves for {num_games} games")
    return moves / elapsed, moves / max(cpu, 1e-9)


def _median(values: list[float]) -> float:
    return float(statistics.median(values))


def measure_game(key: str, seconds: float, repeats: int, seed: int,
                 progress: Callable[[str], None] | None = None) -> GameFigures:
    """Measure one entry of :data:`BENCH_GAMES`."""
    game_name, options, label = BENCH_GAMES[key]
    game = make_game(game_name, **options)
    rng = np.random.default_rng(seed)
    if progress:
        progress(f"{label}: random playouts")
    random_playouts(game, min(0.1, seconds), rng)  # warm-up
    move_rates: list[float] = []
    cpu_rates: list[float] = []
    total_moves = total_games = 0
    for _ in range(repeats):
        moves, games, elapsed, cpu = random_playouts(game, seconds, rng)
        move_rates.append(moves / elapsed)
        cpu_rates.append(moves / max(cpu, 1e-9))
        total_moves += moves
        total_games += games
    if progress:
        progress(f"{label}: legal masks")
    positions = sample_positions(game, 256, rng)
    mask_rates = [legal_mask_rate(game, positions, seconds) for _ in range(repeats)]
    figures = GameFigures(
        label=label, game=game_name, options=game.options() or dict(options),
        moves_per_second=_median(move_rates),
        moves_per_cpu_second=_median(cpu_rates),
        legal_masks_per_second=_median(mask_rates),
        mean_game_length=(total_moves / total_games) if total_games else float("nan"),
        games_finished=total_games,
        moves_per_second_repeats=move_rates,
        legal_masks_per_second_repeats=mask_rates,
    )
    if hasattr(game, "benchmark_playouts"):
        if progress:
            progress(f"{label}: compiled playouts")
        num_games = kernel_calibrate(game, seconds, seed)
        kernel = [kernel_rate(game, num_games, seed + 1 + i) for i in range(repeats)]
        figures.kernel_moves_per_second = _median([wall for wall, _ in kernel])
        figures.kernel_moves_per_cpu_second = _median([cpu for _, cpu in kernel])
        figures.kernel_moves_per_second_repeats = [wall for wall, _ in kernel]
    return figures


def _target(figures: dict[str, GameFigures]) -> dict[str, Any] | None:
    go9 = figures.get("go9")
    if go9 is None:
        return None
    t = GO9_TARGET_MOVES_PER_SECOND
    out: dict[str, Any] = {
        "game": "go9",
        "moves_per_second_target": t,
        "interface_ratio": go9.moves_per_second / t,
        "interface_cpu_ratio": go9.moves_per_cpu_second / t,
    }
    best = go9.moves_per_second
    if go9.kernel_moves_per_second is not None and go9.kernel_moves_per_cpu_second is not None:
        out["kernel_ratio"] = go9.kernel_moves_per_second / t
        out["kernel_cpu_ratio"] = go9.kernel_moves_per_cpu_second / t
        best = max(best, go9.kernel_moves_per_second)
    # wall-clock figures decide: one process on one core
    out["reached"] = best >= t
    return out


def _load_average() -> float:
    """One-minute load average of the machine (nan where the OS does not report it)."""
    try:
        return float(os.getloadavg()[0])
    except (AttributeError, OSError):
        return float("nan")


def _fmt_rate(value: float | None) -> str:
    return "-" if value is None else f"{value:,.0f}"


def format_table(figures: dict[str, GameFigures], seconds: float, repeats: int) -> str:
    """The human-readable report."""
    header = ("game", "moves/s", "moves/CPU-s", "us/move", "legal masks/s", "kernel moves/s", "mean length")
    rows = [header]
    for f in figures.values():
        rows.append((f.label, _fmt_rate(f.moves_per_second), _fmt_rate(f.moves_per_cpu_second),
                     f"{1e6 / f.moves_per_second:.2f}",
                     _fmt_rate(f.legal_masks_per_second), _fmt_rate(f.kernel_moves_per_second),
                     f"{f.mean_game_length:.1f}"))
    widths = [max(len(r[i]) for r in rows) for i in range(len(header))]
    lines = [f"rules benchmark: median of {repeats} runs of {seconds:g} s each, one process; "
             f"load average at the end {_load_average():.2f} on {os.cpu_count()} CPUs"]
    for i, r in enumerate(rows):
        lines.append("  ".join(c.ljust(widths[0]) if j == 0 else c.rjust(widths[j]) for j, c in enumerate(r)))
        if i == 0:
            lines.append("  ".join("-" * w for w in widths))
    if any(f.kernel_moves_per_second is not None for f in figures.values()):
        lines.append("kernel moves/s: the game's own compiled random-playout loop (its playout policy, "
                     "no Python per move)")
    target = _target(figures)
    if target is not None:
        go9 = figures["go9"]
        lines.append("")
        lines.append(f"target for 9x9 Go: {GO9_TARGET_MOVES_PER_SECOND:,} moves/s on one core")
        lines.append(f"  through the game interface: {_fmt_rate(go9.moves_per_second)} moves/s "
                     f"({target['interface_ratio']:.2f}x the target; "
                     f"{target['interface_cpu_ratio']:.2f}x per CPU second)")
        if "kernel_ratio" in target:
            lines.append(f"  compiled playout loop:      {_fmt_rate(go9.kernel_moves_per_second)} moves/s "
                         f"({target['kernel_ratio']:.2f}x the target; "
                         f"{target['kernel_cpu_ratio']:.2f}x per CPU second)")
        lines.append(f"  target {'reached' if target['reached'] else 'NOT reached'}")
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    seconds = float(args.seconds)
    repeats = int(args.repeats)
    if not seconds > 0:
        raise ConfigError(f"--seconds={args.seconds} must be a positive number of seconds")
    if repeats < 1:
        raise ConfigError(f"--repeats={args.repeats} must be at least 1")
    keys = _parse_games(args.games)
    as_json = bool(getattr(args, "json", False))
    progress = None if as_json else (lambda msg: print(f"  measuring {msg} ...", flush=True))
    figures = {key: measure_game(key, seconds, repeats, int(args.seed), progress) for key in keys}
    if as_json:
        doc: dict[str, Any] = {
            "benchmark": "rules",
            "seconds": seconds,
            "repeats": repeats,
            "python": platform.python_version(),
            "cpus": os.cpu_count(),
            "load_average": _load_average(),
            "games": {key: f.as_json() for key, f in figures.items()},
        }
        target = _target(figures)
        if target is not None:
            doc["target"] = target
        print(json.dumps(doc, indent=2))
    else:
        print(format_table(figures, seconds, repeats))
    return 0
