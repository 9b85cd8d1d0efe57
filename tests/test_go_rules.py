"""Hand-built Go cases: captures, ko and superko, suicide both ways, Tromp–Taylor scoring,
game end, Zobrist keys, symmetry, encoding, coordinates and bad input.

Rules source: J. Tromp and B. Taylor, "The Logical Rules of Go" (https://tromp.github.io/go.html):
removal of opponent groups without liberties, then of the mover's own (suicide), positional
superko, area scoring (stones plus empty points reaching only that colour), game end after two
consecutive passes.
"""

from __future__ import annotations

import numpy as np
import pytest

from selfplay.errors import ConfigError, IllegalMoveError
from selfplay.games import go_kernel as K
from selfplay.games.go import GoGame, GoState, position_is_legal
from selfplay.games.registry import make_game


def setup(game: GoGame, diagram: str, to_play: int = 0) -> GoState:
    """State from a diagram: rows top to bottom, X black, O white, . empty."""
    rows = [r.split() for r in diagram.strip().splitlines()]
    assert len(rows) == game.size and all(len(r) == game.size for r in rows)
    black = [r * game.size + c for r, row in enumerate(rows) for c, v in enumerate(row) if v == "X"]
    white = [r * game.size + c for r, row in enumerate(rows) for c, v in enumerate(row) if v == "O"]
    return game.state_from_setup(black, white, to_play)


def stones(game: GoGame, state: GoState, colour: int) -> set[str]:
    board = game.compact(state).reshape(-1)
    return {game.action_to_text(p) for p in np.flatnonzero(board == colour)}


def play(game: GoGame, state: GoState, *moves: str) -> GoState:
    return game.play_sequence(list(moves), state)


# ---- captures -----------------------------------------------------------------------------------

def test_single_stone_capture() -> None:
    # Tromp–Taylor: after a play, opponent groups without liberties are removed.
    g = GoGame(size=5)
    s = play(g, g.initial_state(), "C3", "C4", "pass", "B3", "pass", "D3", "pass")
    assert g.liberties(s, g.text_to_action("C3")) == 1
    s = play(g, s, "C2")
    assert stones(g, s, 1) == set()
    assert stones(g, s, 2) == {"C4", "B3", "D3", "C2"}
    assert g.liberties(s, g.text_to_action("C4")) == 4  # C3 is a liberty again


def test_multi_stone_capture() -> None:
    g = GoGame(size=5)
    s = setup(g, """
        . . . . .
        . . O O .
        . O X X O
        . . O . .
        . . . . .""", to_play=1)
    s = play(g, s, "D2")
    assert stones(g, s, 1) == set()
    assert {"C3", "D3"} & stones(g, s, 2) == set()


def test_capture_in_the_corner() -> None:
    g = GoGame(size=5)
    s = play(g, g.initial_state(), "A1", "A2", "pass", "B1")
    assert stones(g, s, 1) == set()
    assert stones(g, s, 2) == {"A2", "B1"}


def test_two_groups_captured_at_once() -> None:
    g = GoGame(size=5)
    s = setup(g, """
        . . . . .
        . . . . .
        X . . . .
        O X . . .
        . O X . .""", to_play=0)
    s = play(g, s, "A1")
    assert stones(g, s, 2) == set()
    assert stones(g, s, 1) == {"A3", "B2", "C1", "A1"}


def test_looks_like_suicide_but_captures_is_legal() -> None:
    # A stone with no liberty of its own is legal when it captures (removal comes first).
    g = GoGame(size=5)
    s = setup(g, """
        . . . . .
        . . . . .
        X . . . .
        O X . . .
        . O X . .""", to_play=0)
    a1 = g.text_to_action("A1")
    assert g.legal_mask(s)[a1]


# ---- suicide ------------------------------------------------------------------------------------

CORNER = """
    . . . . .
    . . . . .
    . . . . .
    O O . . .
    X . O . ."""


def test_suicide_forbidden_by_default() -> None:
    g = GoGame(size=5)
    s = setup(g, CORNER)
    b1 = g.text_to_action("B1")
    assert not g.legal_mask(s)[b1]
    with pytest.raises(IllegalMoveError, match="B1 by B is illegal: it is suicide"):
        g.play(s, b1)
    # single-stone suicide, too
    s2 = setup(g, """
        . . . . .
        . . . . .
        . . . . .
        O . . . .
        . O . . .""")
    assert not g.legal_mask(s2)[g.text_to_action("A1")]


def test_suicide_allowed_removes_own_group() -> None:
    # Tromp–Taylor original: after opponent removal, the mover's own group without liberties goes.
    g = GoGame(size=5, allow_suicide=True)
    s = setup(g, CORNER)
    b1 = g.text_to_action("B1")
    assert g.legal_mask(s)[b1]
    after = g.play(s, b1)
    assert stones(g, after, 1) == set()
    assert stones(g, after, 2) == {"A2", "B2", "C1"}
    assert g.to_play(after) == 1 and g.move_count(after) == 1
    # the keys agree with a board built from scratch
    grp, key = K.build_groups(after.board, g._nbr, g._zob, g._nwords)
    assert key == after.key


def test_single_stone_suicide_with_suicide_allowed() -> None:
    # A single-stone suicide leaves the board unchanged: under positional superko that recreates
    # the current (an earlier) position, so it is illegal; with the plain ko rule it is legal.
    diagram = """
        . . . . .
        . . . . .
        . . . . .
        O . . . .
        . O . . ."""
    a1 = GoGame(size=5).text_to_action("A1")
    g = GoGame(size=5, allow_suicide=True)
    s = setup(g, diagram)
    assert not g.legal_mask(s)[a1]
    with pytest.raises(IllegalMoveError, match="superko"):
        g.play(s, a1)
    g2 = GoGame(size=5, allow_suicide=True, superko=False)
    s2 = setup(g2, diagram)
    assert g2.legal_mask(s2)[a1]
    after = g2.play(s2, a1)
    assert np.array_equal(after.board, s2.board) and g2.to_play(after) == 1


# ---- ko and superko -----------------------------------------------------------------------------

KO = """
    . . . . .
    . X O . .
    X O . O .
    . X O . .
    . . . . ."""


@pytest.mark.parametrize("superko", [True, False])
def test_ko_immediate_recapture_forbidden(superko: bool) -> None:
    # Tromp–Taylor positional superko (and the plain ko rule) forbid retaking at once.
    g = GoGame(size=5, superko=superko)
    s = setup(g, KO)
    s = play(g, s, "C3")  # black takes the ko, capturing B3
    assert "B3" not in stones(g, s, 2)
    b3 = g.text_to_action("B3")
    assert not g.legal_mask(s)[b3]
    with pytest.raises(IllegalMoveError, match="B3 by W is illegal"):
        g.play(s, b3)
    # after an exchange elsewhere the board differs, so White may retake
    s = play(g, s, "E5", "E1")
    assert g.legal_mask(s)[b3]
    s = play(g, s, "B3")
    assert "C3" not in stones(g, s, 1)


def test_superko_forbids_a_longer_cycle_that_plain_ko_allows() -> None:
    # On a 2x2 board (points a b / c d): B a, W d, B b, W c (takes a b), B a, W b (takes a),
    # then B a would take b c d and recreate the board after move 1 — a 6-move cycle.
    # Positional superko (Tromp–Taylor) forbids it; the plain ko rule does not.
    seq = ["A2", "B1", "B2", "A1", "A2", "B2"]
    g = GoGame(size=2, tiny=True, komi=0.0)
    s = play(g, g.initial_state(), *seq)
    assert stones(g, s, 2) == {"B2", "A1", "B1"}
    assert not g.legal_mask(s)[g.text_to_action("A2")]
    with pytest.raises(IllegalMoveError, match="superko"):
        g.play(s, g.text_to_action("A2"))
    g2 = GoGame(size=2, tiny=True, komi=0.0, superko=False)
    s2 = play(g2, g2.initial_state(), *seq)
    assert g2.legal_mask(s2)[g2.text_to_action("A2")]
    s2 = g2.play(s2, g2.text_to_action("A2"))
    assert stones(g2, s2, 1) == {"A2"} and stones(g2, s2, 2) == set()


# ---- scoring and the end of the game ------------------------------------------------------------

def test_tromp_taylor_area_score() -> None:
    # Tromp–Taylor: a player's score is the number of points of their colour plus empty points
    # that reach only their colour.
    g = GoGame(size=5, komi=0.5)
    s = setup(g, """
        . . X O .
        . . X O .
        . . X O .
        . . X O .
        . . X O .""")
    assert g.score(s) == (15, 10)
    s = play(g, s, "pass", "pass")
    assert g.is_terminal(s)
    assert g.outcome(s) == 1.0
    assert g.result_text(s) == "B+4.5"


def test_area_score_with_dame_and_seki_like_shared_region() -> None:
    # Empty points reaching both colours count for nobody (Tromp–Taylor).
    g = GoGame(size=5, komi=7.5)
    s = setup(g, """
        . X . O .
        . X . O .
        . X . O .
        . X . O .
        . X . O .""")
    assert g.score(s) == (10, 10)  # column C is dame
    s = play(g, s, "pass", "pass")
    assert g.outcome(s) == -1.0 and g.result_text(s) == "W+7.5"


def test_empty_board_scores_nothing_and_integer_komi_can_draw() -> None:
    # An empty region reaching no stone belongs to nobody (Tromp–Taylor).
    g = GoGame(size=5, komi=0)
    s = play(g, g.initial_state(), "pass", "pass")
    assert g.score(s) == (0, 0)
    assert g.outcome(s) == 0.0 and g.result_text(s) == "0"
    g5 = GoGame(size=5, komi=5)
    s = setup(g5, """
        . . X O .
        . . X O .
        . . X O .
        . . X O .
        . . X O .""")
    s = play(g5, s, "pass", "pass")
    assert g5.outcome(s) == 0.0 and g5.result_text(s) == "0"


def test_two_passes_end_the_game() -> None:
    g = GoGame(size=5)
    s = play(g, g.initial_state(), "C3", "pass")
    assert not g.is_terminal(s)
    s = play(g, s, "D3", "pass")  # a stone in between resets the count
    assert not g.is_terminal(s)
    s = play(g, s, "pass")
    assert g.is_terminal(s)
    assert not g.legal_mask(s).any()
    with pytest.raises(IllegalMoveError, match="game is over"):
        g.play(s, g.pass_action)
    assert g.result_text(s) == "B+17.5"  # black owns all 25 points, komi 7.5


def test_move_cap_ends_the_game_and_it_is_scored() -> None:
    g = GoGame(size=5, max_moves=3, komi=0.5)
    s = play(g, g.initial_state(), "C3", "D3", "B3")
    assert g.is_terminal(s) and g.move_count(s) == 3
    assert not g.legal_mask(s).any()
    with pytest.raises(IllegalMoveError, match="game is over"):
        g.play(s, 0)
    # every empty point reaches both colours, so only stones count (Tromp–Taylor)
    assert g.score(s) == (2, 1)
    assert g.outcome(s) == 1.0 and g.result_text(s) == "B+0.5"
    assert GoGame(size=9).max_moves == 162  # default 2 * size * size


# ---- Zobrist keys -------------------------------------------------------------------------------

def test_zobrist_same_position_by_different_move_orders() -> None:
    g = GoGame(size=9)
    a = play(g, g.initial_state(), "C3", "G7", "D4", "F6")
    b = play(g, g.initial_state(), "D4", "F6", "C3", "G7")
    assert g.zobrist(a) == g.zobrist(b)
    assert g.board_key(a) == g.board_key(b)
    c = play(g, g.initial_state(), "C3", "F6", "D4", "G7")
    assert g.zobrist(c) == g.zobrist(a)
    d = play(g, a, "pass")
    assert g.board_key(d) == g.board_key(a) and g.zobrist(d) != g.zobrist(a)  # side to move
    e = play(g, g.initial_state(), "C3", "G7", "D4", "F5")
    assert g.zobrist(e) != g.zobrist(a)
    # stable: a fresh game object gives the same keys
    assert GoGame(size=9).zobrist(b) == g.zobrist(a)
    assert 0 <= g.zobrist(a) < 2**64


def test_captures_update_the_key_like_a_board_built_from_scratch() -> None:
    g = GoGame(size=5)
    s = play(g, g.initial_state(), "C3", "C4", "pass", "B3", "pass", "D3", "pass", "C2")
    fresh = setup(g, """
        . . . . .
        . . O . .
        . O . O .
        . . O . .
        . . . . .""", to_play=0)
    assert g.zobrist(s) == g.zobrist(fresh)


def test_incremental_groups_match_rebuilt_groups_in_random_games() -> None:
    # Internal consistency: after every move of random games (many captures), each point's
    # liberty count equals a plain flood fill's, and the key equals a from-scratch key.
    rng = np.random.default_rng(3)
    for size, allow, cap in ((5, False, 100), (5, True, 100), (7, False, 150), (9, True, 200),
                             (19, False, 300)):
        g = GoGame(size=size, allow_suicide=allow, max_moves=cap)
        s = g.initial_state()
        while not g.is_terminal(s):
            legal = np.flatnonzero(g.legal_mask(s)[:-1])
            a = g.pass_action if legal.size == 0 else int(legal[rng.integers(legal.size)])
            s = g.play(s, a)
            board = s.board.reshape(size, size)
            _, key = K.build_groups(s.board, g._nbr, g._zob, g._nwords)
            assert key == s.key
            assert position_is_legal(board)
            for p in range(s.moves % 3, size * size, 3 if size < 19 else 11):
                assert g.liberties(s, p) == _flood_liberties(board, p)


def test_single_point_test_agrees_with_the_legal_mask() -> None:
    # The playout kernel judges one point at a time (move_result); the mask has the same logic
    # written out in its loop. Both must agree everywhere, keys included.
    rng = np.random.default_rng(8)
    for size, allow, superko in ((5, False, True), (5, True, True), (7, True, False),
                                 (9, False, False)):
        g = GoGame(size=size, allow_suicide=allow, superko=superko, max_moves=3 * size * size)
        s = g.initial_state()
        while not g.is_terminal(s):
            mask = g.legal_mask(s)
            for p in np.flatnonzero(s.board == 0):
                st, nk = K.move_result(s.board, s.groups, int(p), s.player + 1, s.key, allow,
                                       g._nbr, g._zob, g._nwords)
                repeat = (nk in set(s.seen.tolist())) if superko else nk == s.prev_key
                assert mask[p] == (st == K.OK and not repeat)
                if mask[p]:
                    assert g.play(s, int(p)).key == nk
            legal = np.flatnonzero(mask[:-1])
            s = g.play(s, g.pass_action if legal.size == 0 else int(legal[rng.integers(legal.size)]))


def _flood_liberties(board: np.ndarray, p: int) -> int:
    n = board.shape[0]
    r0, c0 = divmod(p, n)
    colour = board[r0, c0]
    if colour == 0:
        return 0
    seen, libs, todo = {(r0, c0)}, set(), [(r0, c0)]
    while todo:
        r, c = todo.pop()
        for rr, cc in ((r - 1, c), (r + 1, c), (r, c - 1), (r, c + 1)):
            if 0 <= rr < n and 0 <= cc < n:
                if board[rr, cc] == 0:
                    libs.add((rr, cc))
                elif board[rr, cc] == colour and (rr, cc) not in seen:
                    seen.add((rr, cc))
                    todo.append((rr, cc))
    return len(libs)


# ---- symmetry and encoding ----------------------------------------------------------------------

def test_symmetries_map_moves_and_legality_consistently() -> None:
    g = GoGame(size=7)
    rng = np.random.default_rng(11)
    s = g.initial_state()
    for _ in range(30):
        legal = np.flatnonzero(g.legal_mask(s)[:-1])
        s = g.play(s, int(legal[rng.integers(legal.size)]))
    board = g.compact(s)
    flat0 = board.reshape(-1)
    # compare setup states on both sides, so that the move history (superko) plays no part
    mask = g.legal_mask(g.state_from_setup(np.flatnonzero(flat0 == 1), np.flatnonzero(flat0 == 2),
                                           g.to_play(s)))
    seen = set()
    for k in range(g.num_symmetries):
        perm = g.action_permutation(k)
        assert sorted(perm) == list(range(g.num_actions)) and perm[g.pass_action] == g.pass_action
        tb = np.ascontiguousarray(g.transform_boards(board, k))
        flat = tb.reshape(-1)
        for p in range(g.size * g.size):  # the stone at p sits at perm[p] on the moved board
            assert flat[perm[p]] == board.reshape(-1)[p]
        moved = g.state_from_setup(np.flatnonzero(flat == 1), np.flatnonzero(flat == 2), g.to_play(s))
        moved_mask = g.legal_mask(moved)
        expect = np.zeros_like(mask)
        expect[perm] = mask
        assert np.array_equal(moved_mask, expect)
        seen.add(tb.tobytes())
    assert len(seen) == 8  # an irregular position has 8 distinct images


def test_network_planes_from_the_side_to_move() -> None:
    g = GoGame(size=5, history=2)
    assert g.input_shape == (6, 5, 5) and g.history_length == 2
    s = play(g, g.initial_state(), "C3")  # white to move
    h = g.compact_history(s)
    assert h.shape == (2, 5, 5) and h.dtype == np.int8
    assert h[0].sum() == 1 and h[1].sum() == 0  # current first, then the empty board
    x = g.encode(s)
    c3 = divmod(g.text_to_action("C3"), 5)
    assert x[0].sum() == 0 and x[1][c3] == 1  # white's own stones: none; opponent: C3
    assert x[4].sum() == 0 and x[5].min() == 1  # white to move: colour plane zero; ones plane
    s = play(g, s, "D3")  # black to move
    x = g.encode(s)
    assert x[0][c3] == 1 and x[1].sum() == 1 and x[2][c3] == 1 and x[3].sum() == 0
    assert x[4].min() == 1
    s = play(g, s, "B2", "pass")
    h = g.compact_history(s)
    assert np.array_equal(h[0], h[1])  # a pass repeats the board in the history


# ---- coordinates --------------------------------------------------------------------------------

def test_coordinates_letter_number_and_sgf() -> None:
    # Common practice (GTP, most boards): columns A..T without I, rows 1.. from the bottom;
    # SGF FF[4]: column then row letter from the top-left, "" or "tt" (boards <= 19) pass.
    g = GoGame(size=9)
    assert g.action_to_text(72) == "A1" and g.text_to_action("A1") == 72
    assert g.action_to_text(8) == "J9" and g.text_to_action("j9") == 8
    assert g.action_to_text(81) == "pass" and g.text_to_action("PASS") == 81
    assert g.text_to_action("aa") == 0 and g.text_to_action("ia") == 8
    assert g.text_to_action("ai") == 72
    assert g.text_to_action("tt") == 81 and g.text_to_action("") == 81
    for a in range(82):
        assert g.text_to_action(g.action_to_text(a)) == a
    g19 = GoGame(size=19)
    assert g19.action_to_text(18) == "T19" and g19.text_to_action("sa") == 18 and g19.text_to_action("ss") == 360
    for bad in ("I5", "K1", "A10", "A0", "jj", "Z", "D4x", "e 5", "A\u00b9", "\u0661\u0661"):
        with pytest.raises(IllegalMoveError):
            g.text_to_action(bad)


# ---- bad input ----------------------------------------------------------------------------------

@pytest.mark.parametrize("options, field", [
    ({"size": 4}, "size=4"), ({"size": 20}, "size=20"), ({"size": "9"}, "size="),
    ({"size": 9, "komi": "7.5"}, "komi="), ({"size": 9, "komi": float("nan")}, "komi="),
    ({"size": 9, "history": 0}, "history=0"), ({"size": 9, "max_moves": 0}, "max_moves=0"),
    ({"size": 9, "superko": "yes"}, "superko="), ({"size": 9, "allow_suicide": 1}, "allow_suicide="),
])
def test_bad_options_name_the_field(options: dict, field: str) -> None:
    with pytest.raises(ConfigError, match=field):
        make_game("go", **options)


def test_unknown_option_and_tiny_boards() -> None:
    with pytest.raises(ConfigError, match="boardsize"):
        make_game("go", boardsize=9)
    with pytest.raises(ConfigError, match="tiny=True"):
        make_game("go", size=3)
    assert make_game("go", size=3, tiny=True).num_actions == 10
    g = make_game("go", size=9)
    assert isinstance(g, GoGame) and g.options()["size"] == 9 and g.num_actions == 82


def test_illegal_moves_name_move_and_reason() -> None:
    g = GoGame(size=9)
    s = play(g, g.initial_state(), "E5")
    with pytest.raises(IllegalMoveError, match="E5 by W is illegal: the point is occupied"):
        g.play(s, g.text_to_action("E5"))
    with pytest.raises(IllegalMoveError, match="off the 9x9 board"):
        g.play(s, 82)
    with pytest.raises(IllegalMoveError, match="off the 9x9 board"):
        g.play(s, -1)
    with pytest.raises(IllegalMoveError, match="not an action"):
        g.play(s, "E5x")  # type: ignore[arg-type]
    with pytest.raises(IllegalMoveError, match="more than one stone"):
        g.state_from_setup([3], [3])
    with pytest.raises(IllegalMoveError, match="without liberties"):
        GoGame(size=5).state_from_setup([0], [1, 5])


def test_benchmark_playouts_runs_in_compiled_code_and_is_seeded() -> None:
    g = GoGame(size=9)
    n1 = g.benchmark_playouts(5, seed=1)
    assert n1 == g.benchmark_playouts(5, seed=1)
    assert 5 * 20 < n1 <= 5 * g.max_moves
    assert g.benchmark_playouts(0, seed=1) == 0
    # the other rule variants run too (the kernel checks its predicted keys as it plays)
    for options in ({"allow_suicide": True}, {"superko": False}, {"size": 19}):
        g2 = GoGame(**{"size": 7, **options})
        assert g2.benchmark_playouts(3, seed=2) > 3 * 10


@pytest.mark.parametrize("options", [{"size": 5}, {"size": 4, "tiny": True, "max_moves": 120},
                                     {"size": 5, "allow_suicide": True}, {"size": 5, "superko": False}])
def test_legal_masks_skipping_impossible_repeats_equal_full_lookups(options: dict) -> None:
    """The legal mask skips the superko lookup for moves that capture nothing while the board
    holds the most stones the game has seen (such a board cannot have occurred before); over
    random games full of captures, every mask equals the one that looks up every point, and
    each state's peak is the largest stone count of its game's boards."""
    game = GoGame(**options)
    rng = np.random.default_rng(7)
    differs_from_no_skip = 0
    for _ in range(30):
        s = game.initial_state()
        most = 0
        while not game.is_terminal(s):
            most = max(most, int(np.count_nonzero(s.board)))
            assert s.peak == most
            full = np.zeros(game.num_actions, dtype=bool)
            K.legal_points(s.board, s.groups, s.seen, s.key, s.prev_key, s.player + 1, game.allow_suicide,
                           game.superko, game._nbr, game._zob, game._nwords, 10**9, full)
            full[-1] = True
            mask = game.legal_mask(s)
            assert np.array_equal(mask, full)
            differs_from_no_skip += int(s.peak > np.count_nonzero(s.board))
            moves = np.flatnonzero(mask)
            # prefer stones over passes so that games run long and capture a lot
            points = moves[moves < game.pass_action]
            s = game.play(s, int(rng.choice(points)) if points.size and rng.random() < 0.95 else game.pass_action)
    assert differs_from_no_skip > 100  # positions after captures, where the lookup must run
