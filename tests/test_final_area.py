"""The final area of Go games (ownership per point and score margin): Tromp–Taylor scoring on
hand-built positions and against an independent flood fill, GNU Go's ``final_score`` on
played-out games, the record fields and their backward reading, and the mover's-view arrays of
the export, the batches and the replay buffer.

Reference for scoring: J. Tromp and B. Taylor, *The Logical Rules of Go*
(https://tromp.github.io/go.html): "A player's score is the number of points of her color, plus
the number of empty points that reach only her color", where an empty point reaches a colour
when a path of adjacent empty points leads from it to a point of that colour.
"""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import msgpack
import numpy as np
import torch
import pytest

from selfplay.errors import FormatError
from selfplay.evaluators import UniformEvaluator
from selfplay.games.go import GoGame
from selfplay.games.registry import make_game
from selfplay.records import GameRecord
from selfplay.replay import codec, synthetic
from selfplay.replay.batch import BatchBuilder
from selfplay.replay.buffer import ReplayBuffer
from selfplay.replay.export import export_npz
from selfplay.replay.shards import scan_shard
from selfplay.replay.store import RecordStore
from selfplay.search import SearchConfig
from selfplay.worker import SelfPlayWorker

OLD_SHARD = Path(__file__).parent / "data" / "go9-before-final-area.plyrec"
GNUGO = "/usr/games/gnugo"


def setup(game: GoGame, picture: str):
    """A position from rows of ``.``/``X``/``O`` (top row first), Black to move."""
    rows = picture.split()
    black = [r * game.size + c for r, row in enumerate(rows) for c, ch in enumerate(row) if ch == "X"]
    white = [r * game.size + c for r, row in enumerate(rows) for c, ch in enumerate(row) if ch == "O"]
    return game.state_from_setup(black, white)


def flood_fill_owner(board: np.ndarray) -> np.ndarray:
    """Tromp–Taylor owner of each point, written from the rules' text with a plain breadth-first
    search (independent of the kernel): (H, W) int8, +1 Black, -1 White, 0 nobody."""
    h, w = board.shape
    owner = np.where(board == 1, 1, np.where(board == 2, -1, 0)).astype(np.int8)
    seen = np.zeros_like(board, dtype=bool)
    for r0 in range(h):
        for c0 in range(w):
            if board[r0, c0] != 0 or seen[r0, c0]:
                continue
            region, reached, todo = [], set(), [(r0, c0)]
            seen[r0, c0] = True
            while todo:
                r, c = todo.pop()
                region.append((r, c))
                for rr, cc in ((r - 1, c), (r + 1, c), (r, c - 1), (r, c + 1)):
                    if 0 <= rr < h and 0 <= cc < w:
                        if board[rr, cc] == 0 and not seen[rr, cc]:
                            seen[rr, cc] = True
                            todo.append((rr, cc))
                        elif board[rr, cc] != 0:
                            reached.add(int(board[rr, cc]))
            if reached == {1} or reached == {2}:
                for r, c in region:
                    owner[r, c] = 1 if reached == {1} else -1
    return owner


# ---- Tromp–Taylor area on hand-built positions (the rules' text) ----------------------------------

HAND_BUILT = [
    # (picture, expected owner map as text: B black, W white, - nobody)
    ("""
     .XO..
     XXO..
     .XOOO
     XXO..
     .XO..""",
     """
     BBWWW
     BBWWW
     BBWWW
     BBWWW
     BBWWW"""),
    # the empty middle column touches both colours: nobody's (dame)
    ("""
     .X.O.
     XX.OO
     .X.O.
     XX.OO
     .X.O.""",
     """
     BB-WW
     BB-WW
     BB-WW
     BB-WW
     BB-WW"""),
    # the empty board: the one empty region reaches no colour
    ("""
     .....
     .....
     .....
     .....
     .....""",
     """
     -----
     -----
     -----
     -----
     -----"""),
    # one stone: the whole board reaches only Black
    ("""
     .....
     .....
     ..X..
     .....
     .....""",
     """
     BBBBB
     BBBBB
     BBBBB
     BBBBB
     BBBBB"""),
    # a white stone inside Black's area makes the region it touches shared; Black's corner eye stays Black's
    ("""
     .X...
     XX...
     ...O.
     .....
     .....""",
     """
     BB---
     BB---
     ---W-
     -----
     -----"""),
]


@pytest.mark.parametrize("picture,expected", HAND_BUILT)
def test_tromp_taylor_area_of_hand_built_positions(picture, expected):
    game = GoGame(size=5, komi=0.5)
    state = setup(game, picture)
    want = np.array([[{"B": 1, "W": -1, "-": 0}[ch] for ch in row] for row in expected.split()], dtype=np.int8)
    area = game.final_area(state)
    np.testing.assert_array_equal(area.ownership, want)
    b, w = game.score(state)
    assert (b, w) == (int((want == 1).sum()), int((want == -1).sum()))
    # the ownership sums to the area difference; the margin subtracts komi
    assert int(area.ownership.sum()) == b - w
    assert area.margin == b - w - 0.5 == game.score_margin(state)


def test_area_matches_an_independent_flood_fill_on_random_positions():
    rng = np.random.default_rng(5)
    for size in (5, 7, 9):
        game = GoGame(size=size, komi=6.5)
        for _ in range(15):
            state = game.initial_state()
            for _ in range(int(rng.integers(0, 3 * size * size))):
                if game.is_terminal(state):
                    break
                state = game.play(state, int(rng.choice(game.legal_actions(state))))
            area = game.final_area(state)
            np.testing.assert_array_equal(area.ownership, flood_fill_owner(game.compact(state)))
            b, w = game.score(state)
            assert int(area.ownership.sum()) == b - w and area.margin == b - w - 6.5


def test_games_without_area_have_none():
    for name in ("tictactoe", "fourinrow"):
        game = make_game(name)
        assert game.final_area(game.initial_state()) is None
        assert not BatchBuilder(game).has_area


# ---- GNU Go's final_score on played-out games (no dead stones) ----------------------------------

def _gtp(proc: subprocess.Popen, command: str) -> str:
    proc.stdin.write(command + "\n")
    proc.stdin.flush()
    lines = []
    while True:
        line = proc.stdout.readline()
        if line == "":
            raise RuntimeError(f"gnugo exited while answering {command!r}")
        if not line.strip() and lines:
            break
        if line.strip():
            lines.append(line.strip())
    reply = " ".join(lines)
    assert reply.startswith("="), f"gnugo refused {command!r}: {reply}"
    return reply[1:].strip()


def _played_out(game: GoGame, rng: np.random.Generator) -> list[int]:
    """A random game played to the end: never filling a point whose neighbours are all one's own
    stones, passing only when nothing else is left; so every remaining group has two eyes."""
    state, moves = game.initial_state(), []
    n = game.size * game.size
    while not game.is_terminal(state):
        board = game.compact(state).reshape(-1)
        own = 1 + game.to_play(state)
        cand = [p for p in game.legal_actions(state) if p < n and not all(
            board[q] == own for q in _neighbours(game.size, p))]
        a = int(rng.choice(cand)) if cand else game.pass_action
        state = game.play(state, a)
        moves.append(a)
    return moves


def _neighbours(size: int, p: int) -> list[int]:
    r, c = divmod(p, size)
    return [rr * size + cc for rr, cc in ((r - 1, c), (r + 1, c), (r, c - 1), (r, c + 1))
            if 0 <= rr < size and 0 <= cc < size]


@pytest.mark.skipif(shutil.which(GNUGO) is None,
                    reason=f"gnugo not found at {GNUGO}; install with apt-get install gnugo "
                           "(the area check against GNU Go's final_score did NOT run)")
def test_final_area_agrees_with_gnugo_final_score():
    rng = np.random.default_rng(2026)
    compared = 0
    for size, games in ((5, 6), (7, 4)):
        game = GoGame(size=size, komi=2.5, max_moves=4 * size * size)
        for _ in range(games):
            moves = _played_out(game, rng)
            state = game.play_sequence(moves)
            assert game.is_terminal(state) and state.passes >= 2
            proc = subprocess.Popen([GNUGO, "--mode", "gtp", "--chinese-rules", "--positional-superko"],
                                    stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                    stderr=subprocess.DEVNULL, text=True, bufsize=1)
            try:
                _gtp(proc, f"boardsize {size}")
                _gtp(proc, "clear_board")
                _gtp(proc, "komi 2.5")
                for i, a in enumerate(moves):
                    _gtp(proc, f"play {'BW'[i % 2]} {game.action_to_text(a)}")
                if _gtp(proc, "final_status_list dead"):
                    continue  # GNU Go sees dead stones: Tromp–Taylor would count them, skip
                score = _gtp(proc, "final_score")
                territory = {c: set(_gtp(proc, f"final_status_list {c}_territory").upper().split())
                             for c in ("black", "white")}
            finally:
                proc.stdin.write("quit\n")
                proc.stdin.flush()
                proc.wait(timeout=10)
            area = game.final_area(state)
            # the score (area difference minus komi) is GNU Go's
            assert game.result_text(state) == score, (moves, score)
            assert int(area.ownership.sum()) - 2.5 == area.margin
            # each point GNU Go lists as a colour's territory is that colour's area here. (Its
            # "dame" list is not compared: GNU Go 3.8 once listed a point whose every neighbour
            # was White as dame while its final_score counted the point for White.)
            for colour, sign in (("black", 1), ("white", -1)):
                for text in territory[colour]:
                    p = game.text_to_action(text)
                    assert area.ownership[divmod(p, size)] == sign, (text, moves)
            stones = np.where(game.compact(state) == 1, 1, np.where(game.compact(state) == 2, -1, 0))
            np.testing.assert_array_equal(area.ownership[stones != 0], stones[stones != 0])
            compared += 1
    assert compared >= 6, f"only {compared} games without dead stones were compared"


# ---- records from self-play ------------------------------------------------------------------------

def test_self_play_records_carry_the_scored_final_area():
    game = GoGame(size=5, komi=0.5, max_moves=30)
    w = SelfPlayWorker(game, UniformEvaluator(), SearchConfig(simulations=4, reduced_simulations=2),
                       games_in_parallel=2, worker_id="area", seed=3, clock=lambda: 0.0)
    for rec in w.play_games(4):
        state = game.play_sequence([int(a) for a in rec.actions])
        assert game.is_terminal(state) and not rec.resigned
        assert rec.final_area_scored
        np.testing.assert_array_equal(rec.final_ownership, flood_fill_owner(game.compact(state)))
        assert rec.final_margin == rec.final_ownership.sum() - 0.5
        assert rec.result == np.sign(rec.final_margin)
        back = codec.decode_record(codec.encode_record(rec))
        np.testing.assert_array_equal(back.final_ownership, rec.final_ownership)
        assert back.final_margin == rec.final_margin and back.final_area_scored


def test_resigned_game_keeps_the_area_at_resignation_flagged_as_not_scored():
    game = GoGame(size=5, komi=0.5)
    start = setup(game, """
        .X...
        XX...
        .....
        ...O.
        .....""")
    # a threshold above every root value: Black resigns before its first move
    cfg = SearchConfig(simulations=4, reduced_simulations=2, resign_threshold=0.99, resign_probe_fraction=0.0)
    w = SelfPlayWorker(game, UniformEvaluator(), cfg, games_in_parallel=1, worker_id="r", seed=1,
                       clock=lambda: 0.0, start_state=start)
    rec = w.play_games(1)[0]
    assert rec.resigned and rec.result == -1 and rec.num_positions == 1
    assert not rec.final_area_scored
    np.testing.assert_array_equal(rec.final_ownership, flood_fill_owner(game.compact(start)))
    assert rec.final_margin == 4 - 1 - 0.5  # the margin's sign need not agree with a resignation
    back = codec.decode_record(codec.encode_record(rec))
    assert not back.final_area_scored and back.final_margin == 2.5


# ---- codec: optional fields, old shards, hostile values ------------------------------------------

def test_shard_written_before_the_fields_still_reads():
    scan = scan_shard(OLD_SHARD)
    recs = [rec for _, rec in scan.records]
    assert not scan.damaged and scan.error is None and len(recs) == 3
    for rec in recs:
        assert rec.final_ownership is None and rec.final_margin is None and not rec.final_area_scored
        # and such records still make batches: the area targets weigh 0
        b = BatchBuilder(make_game("go", size=9)).from_record(rec)
        assert b["ownership"].shape == (rec.num_positions, 9, 9) and not b["ownership"].any()
        assert not b["ownership_weight"].any()
    buf = ReplayBuffer(make_game("go", size=9), 100, seed=0)
    buf.add_many(recs)
    assert not buf.sample(16)["ownership_weight"].any()


def test_other_games_write_no_area_fields():
    game = make_game("tictactoe")
    rec = synthetic.random_record(game, np.random.default_rng(0), "t", game_name="tictactoe", game_options={})
    doc = msgpack.unpackb(codec.encode_record(rec), raw=False)
    assert not set(codec.FINAL_AREA_FIELDS) & set(doc)


def _go_payload() -> dict:
    game = GoGame(size=5, komi=0.5)
    rec = synthetic.random_record(game, np.random.default_rng(4), "g", game_name="go", game_options=game.options())
    assert rec.final_area_scored  # played to the end
    return msgpack.unpackb(codec.encode_record(rec), raw=False)


@pytest.mark.parametrize("change,phrase", [
    (lambda d: d.pop("final_margin"), "come together"),
    (lambda d: d.pop("final_ownership"), "come together"),
    (lambda d: d["final_ownership"].update(data=b"\x02" * 25), "other than -1, 0 or 1"),
    (lambda d: d["final_ownership"].update(shape=[4, 4], data=b"\x00" * 16), "board shape"),
    (lambda d: d["final_ownership"].update(dtype="<i2"), "dtype"),
    (lambda d: d["final_ownership"].update(data=b"\x00" * 24), "25 bytes"),
    (lambda d: d.update(final_margin=float("inf")), "finite"),
    (lambda d: d.update(final_margin=1e12), "finite"),
    (lambda d: d.update(final_margin="3"), "final_margin"),
    (lambda d: d.update(final_area_scored=1), "final_area_scored"),
    (lambda d: d.update(final_margin=-d["final_margin"]), "disagrees with result"),
])
def test_hostile_area_fields_are_refused(change, phrase):
    doc = _go_payload()
    change(doc)
    with pytest.raises(FormatError, match=phrase):
        codec.decode_record(msgpack.packb(doc, use_bin_type=True))


# ---- export, batches, buffer: the mover's view -------------------------------------------------

def _go_records(game: GoGame, n: int, seed: int) -> list[GameRecord]:
    rng = np.random.default_rng(seed)
    recs = [synthetic.random_record(game, rng, f"g{seed}-{i}", game_name="go", game_options=game.options())
            for i in range(n)]
    recs[1].resigned, recs[1].final_area_scored = True, False  # as a resigned game is stored
    return recs


def test_export_gives_the_area_from_the_movers_view(tmp_path):
    game = GoGame(size=5, komi=0.5)
    recs = _go_records(game, 4, 1)
    with RecordStore(tmp_path / "run", max_games=3) as store:
        store.add_games(recs)
    export_npz(tmp_path / "run", tmp_path / "go.npz")
    z = np.load(tmp_path / "go.npz", allow_pickle=False)
    row = 0
    for rec in recs:
        for t in range(rec.num_positions):
            sign = 1 if rec.to_play[t] == 0 else -1
            np.testing.assert_array_equal(z["ownership"][row], sign * rec.final_ownership)
            assert z["score_margin"][row] == np.float32(sign * rec.final_margin)
            assert z["ownership_weight"][row] == (1.0 if rec.final_area_scored else 0.0)
            # the mover's view agrees with the value target where the game was scored
            if rec.final_area_scored:
                assert np.sign(z["score_margin"][row]) == z["value"][row]
            row += 1
    assert z["ownership"].dtype == np.int8 and z["score_margin"].dtype == np.float32
    # every exported array is documented
    root = Path(__file__).resolve().parents[1]
    doc = (root / "docs" / "record-format.md").read_text()
    export_doc, readme = doc[doc.index("## Export"):], (root / "README.md").read_text()
    for name in z.files:
        assert f"`{name}`" in export_doc and f"`{name}`" in readme, name


def test_buffer_samples_the_area_under_the_same_symmetry_as_the_board():
    game = GoGame(size=5, komi=0.5)
    recs = _go_records(game, 30, 2)
    # a small window: games leave it and the per-game ring wraps and grows
    buf = ReplayBuffer(game, 150, seed=0, augment=True)
    buf.add_many(recs)
    batch = buf.sample(400)
    assert np.unique(batch["symmetry"]).size > 1
    by_board = {}
    for rec in recs:
        for t in range(rec.num_positions):
            by_board.setdefault((rec.boards[t].tobytes(), int(rec.to_play[t])), []).append((rec, t))
    checked = 0
    for i in range(400):
        k = int(batch["symmetry"][i])
        # undo the symmetry on the mover's own-stones plane to find the stored position
        own_plane = batch["planes"][i, 0]
        opp_plane = batch["planes"][i, 1]
        mover = 0 if batch["planes"][i, 2 * game.history_length, 0, 0] == 1 else 1
        inverse = [kk for kk in range(8) if np.array_equal(
            game.transform_boards(game.transform_boards(np.arange(25).reshape(5, 5), k), kk),
            np.arange(25).reshape(5, 5))][0]
        board = np.zeros((5, 5), dtype=np.int8)
        board[game.transform_boards(own_plane, inverse) == 1] = 1 + mover
        board[game.transform_boards(opp_plane, inverse) == 1] = 2 - mover
        hits = by_board.get((board.tobytes(), mover), [])
        owners = {(r.final_ownership.tobytes(), r.final_margin, r.final_area_scored) for r, _ in hits}
        if len(owners) != 1:
            continue  # the same board in two games (e.g. the empty board): not identifiable
        rec, _ = hits[0]
        sign = 1 if mover == 0 else -1
        np.testing.assert_array_equal(batch["ownership"][i], game.transform_boards(sign * rec.final_ownership, k))
        assert batch["score_margin"][i] == np.float32(sign * rec.final_margin)
        assert batch["ownership_weight"][i] == (1.0 if rec.final_area_scored else 0.0)
        checked += 1
    assert checked > 200


def test_dataset_batches_carry_the_area_as_tensors(tmp_path):
    from selfplay.replay.dataset import ReplayDataset
    game = GoGame(size=5, komi=0.5)
    recs = _go_records(game, 3, 3)
    with RecordStore(tmp_path / "run", max_games=2) as store:
        store.add_games(recs)
    n = 0
    for batch in ReplayDataset(tmp_path / "run", batch_size=16, augment=False):
        rows = slice(n, n + batch["value"].shape[0])
        want = np.concatenate([np.where(r.to_play == 0, 1, -1)[:, None, None] * r.final_ownership[None]
                               for r in recs])[rows]
        np.testing.assert_array_equal(batch["ownership"].numpy(), want)
        assert batch["score_margin"].dtype == torch.float32 and batch["ownership_weight"].shape == batch["value"].shape
        n += batch["value"].shape[0]
    assert n == sum(r.num_positions for r in recs)
