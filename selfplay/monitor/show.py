"""``selfplay show``: one position of a recorded game, drawn three times side by side as a board
with a heatmap over the moves — the network's prior, the search's visit share and the search's Q
per move — with the move played marked, and the network's and the search's favourite moves named
(where they disagree is what the search added).

- visit share: from the record (the stored visit distribution, normalised);
- prior and Q: recomputed by loading the snapshot the record says played the move (snapshot
  store) and running the project's search on the position with the record's search settings
  (prior = the network's priors at the root before noise; Q = mean value of each root edge,
  from the mover's view, in [-1, 1]; unvisited moves have no Q).

Action layout on the board: games whose actions are the board's points (plus extras such as
Go's pass) colour each point; games whose actions are columns (four-in-a-row) colour the cell a
piece dropped in that column would land on. Extra actions are listed under each panel.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.patches import Circle, Rectangle  # noqa: E402

from selfplay.errors import ConfigError, SelfplayError, SnapshotError  # noqa: E402

PLAYER_COLOURS = {1: ("black", "white"), 2: ("white", "black")}  # compact value -> (fill, edge)


@dataclass
class PositionView:
    """What one drawing shows. Arrays are (A,) over the game's actions.

    board: int8 (H, W) compact board (0 empty, 1 player 0, 2 player 1), row 0 at the top;
    prior: the network's move probabilities (None when no snapshot could be loaded);
    visit_share: the search's visit distribution, summing to 1 over visited moves;
    q: mean value per root edge from the mover's view, NaN where unvisited (None: not searched);
    legal: bool legal-move mask; played: the move played; value: the network's value of the
    position (mover's view) if known; root_value: the search's root value from the record."""

    board: np.ndarray
    to_play: int
    prior: np.ndarray | None
    visit_share: np.ndarray
    q: np.ndarray | None
    legal: np.ndarray
    played: int
    action_text: Callable[[int], str]
    title: str = ""
    value: float | None = None
    root_value: float | None = None
    note: str = ""
    target_label: str = "search visit share"


def action_cells(board: np.ndarray, num_actions: int) -> tuple[dict[int, tuple[int, int]], list[int]]:
    """Where each action is drawn: ({action: (row, col)}, [actions drawn off the board]).

    Point games: action ``r * W + c`` is cell (r, c); actions past ``H * W`` (a pass) are off
    the board. Column games (``num_actions == W``): the lowest empty cell of the column."""
    h, w = board.shape
    cells: dict[int, tuple[int, int]] = {}
    extras: list[int] = []
    if num_actions >= h * w:
        for a in range(h * w):
            cells[a] = (a // w, a % w)
        extras = list(range(h * w, num_actions))
    elif num_actions == w:
        for c in range(w):
            empty = np.flatnonzero(board[:, c] == 0)
            if empty.size:
                cells[c] = (int(empty.max()), c)
            else:
                extras.append(c)
    else:
        raise ConfigError(f"cannot lay out {num_actions} actions on a {h}x{w} board")
    return cells, extras


def _panel(ax: Any, view: PositionView, values: np.ndarray | None, title: str, cmap: str,
           vmin: float, vmax: float, fmt: Callable[[float], str], fig: Any) -> str:
    board = view.board
    h, w = board.shape
    cells, extras = action_cells(board, len(view.legal))
    grid = np.full((h, w), np.nan)
    if values is not None:
        for a, (r, c) in cells.items():
            if view.legal[a] and np.isfinite(values[a]):
                grid[r, c] = values[a]
    ax.set_facecolor("#d8b878")  # board colour under unlit cells
    im = ax.imshow(np.ma.masked_invalid(grid), cmap=cmap, vmin=vmin, vmax=vmax,
                   extent=(-0.5, w - 0.5, h - 0.5, -0.5), interpolation="nearest")
    fig.colorbar(im, ax=ax, fraction=0.046, pad=0.04)
    for r in range(h + 1):
        ax.axhline(r - 0.5, color="0.3", linewidth=0.5)
    for c in range(w + 1):
        ax.axvline(c - 0.5, color="0.3", linewidth=0.5)
    for r in range(h):
        for c in range(w):
            v = int(board[r, c])
            if v in PLAYER_COLOURS:
                fill, edge = PLAYER_COLOURS[v]
                ax.add_patch(Circle((c, r), 0.4, facecolor=fill, edgecolor=edge, linewidth=1, zorder=3))
    small = h * w <= 100
    if values is not None and small:
        colours = plt.get_cmap(cmap)
        for a, (r, c) in cells.items():
            if view.legal[a] and np.isfinite(values[a]):
                rgb = colours((float(values[a]) - vmin) / (vmax - vmin))[:3]
                dark = 0.299 * rgb[0] + 0.587 * rgb[1] + 0.114 * rgb[2] < 0.5
                ax.text(c, r, fmt(float(values[a])), ha="center", va="center", fontsize=7, zorder=4,
                        color="white" if dark else "black")
    if view.played in cells:
        r, c = cells[view.played]
        ax.add_patch(Rectangle((c - 0.5, r - 0.5), 1, 1, fill=False, edgecolor="red", linewidth=2.5, zorder=5))
    ax.set_xlim(-0.5, w - 0.5)
    ax.set_ylim(h - 0.5, -0.5)
    xl, yl = _tick_labels(view, cells, h, w)
    ax.set_xticks(range(w), xl)
    ax.set_yticks(range(h), yl)
    ax.tick_params(labelsize=7)
    ax.set_title(title, fontsize=10)
    extra_text = []
    if values is not None:
        for a in extras:
            if view.legal[a] and np.isfinite(values[a]):
                extra_text.append(f"{view.action_text(a)}: {fmt(float(values[a])) or '~0'}")
    if values is None:
        ax.text(0.5, -0.12, "not available", transform=ax.transAxes, ha="center", fontsize=9, color="0.4")
    return ", ".join(extra_text)


_COORD = re.compile(r"^([A-Za-z]+)(\d+)$")


def _tick_labels(view: PositionView, cells: dict[int, tuple[int, int]], h: int, w: int
                 ) -> tuple[list[str], list[str]]:
    """Axis labels in the game's own move notation where it is letter+number (Go, m,n,k);
    column games label the columns with their move text; otherwise indices."""
    if len(view.legal) == w:
        return [view.action_text(c) for c in range(w)], [""] * h
    try:
        xs = [_COORD.match(view.action_text(c)) for c in range(w)]
        ys = [_COORD.match(view.action_text(r * w)) for r in range(h)]
    except Exception:  # a game whose move text needs a legal state: fall back to indices
        xs, ys = [None], [None]
    if all(xs) and all(ys):
        return [m.group(1) for m in xs], [m.group(2) for m in ys]  # type: ignore[union-attr]
    return [str(c) for c in range(w)], [str(r) for r in range(h)]


def _best(values: np.ndarray | None, legal: np.ndarray) -> int | None:
    if values is None:
        return None
    v = np.where(legal & np.isfinite(values), values, -np.inf)
    return int(np.argmax(v)) if np.isfinite(v).any() else None


def draw_position(view: PositionView, out: str | os.PathLike[str]) -> Path:
    """Draw prior, visit share and Q side by side into the PNG ``out``; returns its path."""
    out = Path(out)
    if view.board.ndim != 2:
        raise ConfigError(f"board of shape {view.board.shape} is not a 2-D board")
    fig, axes = plt.subplots(1, 3, figsize=(15, 5.6))
    pct = lambda x: f"{100 * x:.0f}" if x >= 0.005 else ""  # noqa: E731
    qfmt = lambda x: f"{x:+.2f}"  # noqa: E731
    ex = [
        _panel(axes[0], view, view.prior, "network prior (cells: %)", "Blues", 0.0,
               max(1e-6, float(np.nanmax(view.prior))) if view.prior is not None else 1.0, pct, fig),
        _panel(axes[1], view, view.visit_share, f"{view.target_label} (cells: %)", "Greens", 0.0,
               max(1e-6, float(np.nanmax(view.visit_share))), pct, fig),
        _panel(axes[2], view, view.q, "search Q per move (mover's view)", "RdBu", -1.0, 1.0, qfmt, fig),
    ]
    for ax, e in zip(axes, ex):
        if e:
            ax.set_xlabel(e, fontsize=8)
    net_best = _best(view.prior, view.legal)
    search_best = _best(view.visit_share, view.legal)
    txt = lambda a: "-" if a is None else view.action_text(a)  # noqa: E731
    mover = "player 0 (black)" if view.to_play == 0 else "player 1 (white)"
    line = (f"{mover} to move · played {txt(view.played)} (red square) · network's choice {txt(net_best)}"
            f" · search's choice {txt(search_best)}"
            + (" · they disagree" if net_best is not None and search_best is not None and net_best != search_best else ""))
    vals = []
    if view.value is not None:
        vals.append(f"network value {view.value:+.3f}")
    if view.root_value is not None:
        vals.append(f"search root value {view.root_value:+.3f}")
    fig.suptitle((view.title + "\n" if view.title else "") + line + ("\n" + " · ".join(vals) if vals else "")
                 + ("\n" + view.note if view.note else ""), fontsize=10)
    fig.tight_layout()
    try:
        fig.savefig(out, dpi=100)
    except OSError as exc:
        raise SelfplayError(f"cannot write {str(out)!r}: {exc}") from exc
    finally:
        plt.close(fig)
    return out


# ---- from a run directory -----------------------------------------------------------------------

def _network_config_from_tensors(tensors: dict[str, Any]) -> Any:
    """NetworkConfig of the residual net whose state_dict is ``tensors`` (sizes read off shapes)."""
    from selfplay.network import NetworkConfig

    try:
        channels = int(tensors["stem.0.weight"].shape[0])
        blocks = len({k.split(".")[1] for k in tensors if k.startswith("tower.")})
        return NetworkConfig(blocks=blocks, channels=channels,
                             policy_channels=int(tensors["policy_conv.0.weight"].shape[0]),
                             value_channels=int(tensors["value_conv.0.weight"].shape[0]),
                             value_hidden=int(tensors["value_fc1.weight"].shape[0]),
                             area_heads="ownership_conv.weight" in tensors)
    except (KeyError, IndexError) as exc:
        raise SnapshotError(f"snapshot weights do not look like the project's policy-value network ({exc})") from exc


def position_view(run: str | os.PathLike[str], game_id: str, move: int, *,
                  simulations: int | None = None) -> PositionView:
    """Gather what :func:`draw_position` needs for position ``move`` (moves played before it,
    0 = the initial position) of game ``game_id``."""
    from selfplay.games.registry import make_game
    from selfplay.monitor.data import find_record
    from selfplay.rundir import RunDir

    rd = RunDir.open(run)
    rec = find_record(rd, game_id)
    n = rec.num_positions
    if isinstance(move, bool) or not isinstance(move, int) or not 0 <= move < n:
        raise ConfigError(f"--move {move} is out of range: game {game_id!r} has {n} positions, "
                          f"numbered 0..{n - 1} (moves played before the position)")
    game = make_game(rec.game, **rec.game_options)
    A = game.num_actions
    state = game.initial_state()
    for a in rec.actions[:move]:
        state = game.play(state, int(a))
    board = np.asarray(game.compact(state), dtype=np.int8)
    stored = np.asarray(rec.boards[move])
    if stored.shape == board.shape and not np.array_equal(stored, board):
        raise SelfplayError(f"game {game_id!r}: replaying its moves does not give the stored board at move {move}")
    legal = rec.legal_mask(move, A)
    visit_share = rec.policy_target(move, A)
    played = int(rec.actions[move])
    version = int(rec.snapshot[move])
    options = " ".join(f"{k}={v:g}" if isinstance(v, float) else f"{k}={v}"
                       for k, v in (rec.game_options or {}).items())
    title = (f"game {game_id} · {rec.game} {options} · move {move} of {n}"
             f" · snapshot {version} · worker {rec.worker_id}")
    prior = q = None
    value = None
    note = ""
    try:
        prior, q, value = _search_position(rd, game, state, version, rec.search, rec.seed, simulations)
    except SnapshotError as exc:
        note = f"prior and Q not shown: {exc}"
    gumbel = str((rec.search or {}).get("algorithm", "")) == "gumbel"
    if not bool(rec.full_search[move]):
        note = (note + " · " if note else "") + "a reduced search (playout cap): not a policy target"
    return PositionView(board=board, to_play=int(game.to_play(state)), prior=prior, visit_share=visit_share,
                        q=q, legal=legal, played=played, action_text=game.action_to_text, title=title,
                        value=value, root_value=float(rec.root_values[move]), note=note,
                        target_label="search's improved policy (Gumbel)" if gumbel else "search visit share")


def _search_position(rd: Any, game: Any, state: Any, version: int, search: dict[str, Any], seed: int,
                     simulations: int | None) -> tuple[np.ndarray, np.ndarray, float]:
    """Load snapshot ``version`` and search ``state``: (prior, Q, network value)."""
    from selfplay.evaluators import NetworkEvaluator
    from selfplay.network import build_network
    from selfplay.search import SearchConfig, search_states
    from selfplay.snapshots import SnapshotStore

    store = SnapshotStore(rd)
    if version not in store.versions():
        raise SnapshotError(f"snapshot {version} is not in {rd.snapshots}")
    tensors, _ = store.load(version, game=game.name)
    net = build_network(game, _network_config_from_tensors(tensors))
    store.load_into(net, version)
    settings = {k: v for k, v in (search or {}).items() if k in SearchConfig.model_fields}
    if simulations is not None:
        settings["simulations"] = simulations
        reduced = settings.get("reduced_simulations", SearchConfig.model_fields["reduced_simulations"].default)
        settings["reduced_simulations"] = min(int(reduced), simulations)
    try:
        config = SearchConfig(**settings)
    except ValueError as exc:
        raise ConfigError(f"the record's search settings are not valid now: {exc}") from exc
    evaluator = NetworkEvaluator(net, game=game)
    res = search_states(game, [state], evaluator, config, seed=int(seed), full=True)[0]
    legal = game.legal_mask(state)
    _, values = evaluator.forward_planes(game.encode(state)[None], legal[None])
    return np.asarray(res.prior, dtype=float), np.asarray(res.q, dtype=float), float(values[0])


def show_position(run: str | os.PathLike[str], game_id: str, move: int, out: str | os.PathLike[str], *,
                  simulations: int | None = None) -> Path:
    """Draw position ``move`` of ``game_id`` in ``run`` into the PNG ``out``."""
    return draw_position(position_view(run, game_id, move, simulations=simulations), out)
