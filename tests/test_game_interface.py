"""Conformance of every registered game to the Game interface (selfplay/games/base.py).

The same checks run on each game: random games to the end with the legal mask and play in
agreement, illegal moves refused, compact boards and network planes in the documented shapes,
symmetries consistent between boards and actions, Zobrist keys that follow the position, move
text that round-trips, and bad options refused with a message naming the field.
"""

from __future__ import annotations

import itertools
import re
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from selfplay.errors import ConfigError, IllegalMoveError, UnknownGameError
from selfplay.games.base import Game
from selfplay.games.registry import game_names, make_game

REGISTERED = set(game_names())
GAMES_DOC = Path(__file__).resolve().parents[1] / "docs" / "games.md"

#: (registry name, options); "docs:NAME" is the example game of docs/games.md
_CASES = [
    ("tictactoe", {}),
    ("mnk", {"m": 9, "n": 9, "k": 5}),
    ("mnk", {"m": 5, "n": 4, "k": 4}),  # a non-square board: the mirror only
    ("gomoku", {}),
    ("fourinrow", {}),
    ("fourinrow", {"columns": 5, "rows": 4, "k": 3}),
    ("go", {"size": 5}),
    ("go", {"size": 9}),
    ("docs:clusters", {}),
    ("docs:clusters", {"rows": 4, "cols": 4}),
]
# any other registered game is checked with its default options
_CASES += [(name, {}) for name in sorted(REGISTERED - {c[0] for c in _CASES})]


def load_docs_example() -> type:
    """Run the example game's code block from docs/games.md and return its Game class."""
    blocks = re.findall(r"```python\n(.*?)```", GAMES_DOC.read_text(encoding="utf-8"), re.S)
    code = next(b for b in blocks if "class ClustersGame" in b)
    namespace: dict = {"__name__": "games_doc_example"}
    exec(compile(code, str(GAMES_DOC), "exec"), namespace)
    return namespace["ClustersGame"]


def _case_id(case: tuple[str, dict]) -> str:
    name, options = case
    return name.replace("docs:", "docs-") + "".join(f"-{k}{v}" for k, v in options.items())


def _available(name: str) -> bool:
    return name.startswith("docs:") or name in REGISTERED


CASES = [
    pytest.param(case, id=_case_id(case),
                 marks=() if _available(case[0]) else pytest.mark.skip(reason=f"{case[0]} is not registered"))
    for case in _CASES
]

#: random games played per case (more for the small games, fewer for the large)
GAMES_PER_CASE = {"tictactoe": 20, "fourinrow": 6}


@pytest.fixture(params=CASES)
def game(request) -> Game:
    name, options = request.param
    if name.startswith("docs:"):
        return load_docs_example()(**options)
    return make_game(name, **options)


def random_game(game: Game, rng: np.random.Generator) -> tuple[list, list[int]]:
    """States (first to last, the terminal one included) and actions of one random game."""
    state = game.initial_state()
    states, actions = [state], []
    while not game.is_terminal(state):
        a = int(rng.choice(game.legal_actions(state)))
        state = game.play(state, a)
        states.append(state)
        actions.append(a)
    return states, actions


def test_builtin_games_are_registered():
    assert {"tictactoe", "mnk", "gomoku", "fourinrow", "go"} <= REGISTERED


def test_docs_example_plays_and_registers():
    cls = load_docs_example()
    game = make_game("clusters", rows=3, cols=4)  # registered by the example's last line
    assert type(game).__name__ == cls.__name__
    # the usage shown on the page
    state = game.play_sequence(["b2", "a1", "c2", "d1"])
    assert game.render(state) == "....\n.XX.\nO..O"
    assert game.legal_mask(state).sum() == 8 and game.to_play(state) == 0
    assert game.encode(state).shape == (3, 3, 4)
    # the scoring rule, counted by hand: X holds the top row and a2, a1 (3 + 2 = 5 pairs), O the
    # 2x3 block below right (4 horizontal + 3 vertical = 7 pairs): O wins
    full = game.play_sequence(["a3", "b2", "b3", "c2", "c3", "d2", "d3", "b1", "a2", "c1", "a1", "d1"])
    assert game.is_terminal(full)
    assert (game.pairs(full, 0), game.pairs(full, 1)) == (5, 7) and game.outcome(full) == -1.0
    # X: top row + c2-d2 + c3-c2, d3-d2 = 6; O: bottom row + a2-b2 + a2-a1, b2-b1 = 6: a draw
    drawn = game.play_sequence(["a3", "a2", "b3", "b2", "c3", "a1", "d3", "c1", "d2", "b1", "c2", "d1"])
    assert (game.pairs(drawn, 0), game.pairs(drawn, 1)) == (6, 6) and game.outcome(drawn) == 0.0
    with pytest.raises(ConfigError, match="rows=9"):
        make_game("clusters", rows=9)


def test_shape_facts(game: Game):
    assert game.num_actions > 0
    h, w = game.board_shape
    assert h > 0 and w > 0
    c, ih, iw = game.input_shape
    assert c > 0 and (ih, iw) == (h, w)
    assert game.compact_shape[-2:] == (h, w)
    assert game.history_length >= 1
    assert game.max_moves > 0 and game.typical_legal_moves > 0
    assert game.num_symmetries >= 1
    # options are plain values and rebuild the same game
    again = make_game(game.name, **game.options())
    assert (again.num_actions, again.input_shape, again.options()) == (game.num_actions, game.input_shape, game.options())


def test_random_games_keep_mask_and_play_consistent(game: Game):
    rng = np.random.default_rng(7)
    for _ in range(GAMES_PER_CASE.get(game.name, 3)):
        states, actions = random_game(game, rng)
        assert len(actions) <= game.max_moves
        for i, state in enumerate(states):
            assert game.move_count(state) == i
            mask = game.legal_mask(state)
            assert mask.dtype == np.bool_ and mask.shape == (game.num_actions,)
            assert game.is_terminal(state) == (not mask.any())
            board_before, key_before = game.compact(state).copy(), game.zobrist(state)
            for a in range(game.num_actions):
                if mask[a]:
                    child = game.play(state, a)
                    assert game.move_count(child) == i + 1
                    assert game.to_play(child) == 1 - game.to_play(state)
                else:
                    with pytest.raises(IllegalMoveError):
                        game.play(state, a)
            # states are values: playing from one never changes it
            assert np.array_equal(game.compact(state), board_before) and game.zobrist(state) == key_before
        last = states[-1]
        assert game.is_terminal(last)
        assert game.outcome(last) in (-1.0, 0.0, 1.0)
        mover = game.to_play(last)
        assert game.value_for_mover(last, mover) == (game.outcome(last) if mover == 0 else -game.outcome(last))


def test_out_of_range_and_finished_game_moves_raise(game: Game):
    state = game.initial_state()
    for bad in (-1, game.num_actions, game.num_actions + 5, None, "x"):
        with pytest.raises(IllegalMoveError):
            game.play(state, bad)
    states, _ = random_game(game, np.random.default_rng(3))
    for a in range(game.num_actions):
        with pytest.raises(IllegalMoveError):
            game.play(states[-1], a)


def test_compact_boards_and_planes(game: Game):
    rng = np.random.default_rng(11)
    states, _ = random_game(game, rng)
    for state in states:
        board = game.compact(state)
        assert board.dtype == np.int8 and board.shape == game.compact_shape
        assert set(np.unique(board).tolist()) <= {0, 1, 2}
        history = game.compact_history(state)
        assert history.dtype == np.int8 and history.shape == (game.history_length, *game.compact_shape)
        assert np.array_equal(history[0], board)
        planes = game.encode(state)
        assert planes.dtype == np.float32 and planes.shape == game.input_shape
        again = game.planes_from_compact(history[None], np.array([game.to_play(state)], dtype=np.int8))
        assert again.shape == (1, *game.input_shape)
        assert np.array_equal(again[0], planes)
    # a batch gives the same planes as one state at a time
    batch = np.stack([game.compact_history(s) for s in states])
    to_play = np.array([game.to_play(s) for s in states], dtype=np.int8)
    assert np.array_equal(game.planes_from_compact(batch, to_play), np.stack([game.encode(s) for s in states]))
    # the stones counted on the board are the moves played, for games without captures or passes
    if game.name in ("tictactoe", "mnk", "gomoku", "fourinrow"):
        for i, state in enumerate(states):
            assert int((game.compact(state) != 0).sum()) == i


def test_symmetries_map_positions_masks_and_planes(game: Game):
    rng = np.random.default_rng(5)
    _, actions = random_game(game, rng)
    n = game.num_symmetries
    assert np.array_equal(game.action_permutation(0), np.arange(game.num_actions))
    perms = [game.action_permutation(k) for k in range(n)]
    for perm in perms:
        assert perm.shape == (game.num_actions,)
        assert sorted(perm.tolist()) == list(range(game.num_actions))
    # the permutations form a group: closed under composition
    as_tuples = {tuple(p.tolist()) for p in perms}
    for p, q in itertools.product(perms, perms):
        assert tuple(p[q].tolist()) in as_tuples
    for k in range(n):
        perm = perms[k]
        state = game.initial_state()
        image = game.initial_state()
        for a in actions:
            state = game.play(state, a)
            image = game.play(image, int(perm[a]))  # the transformed move on the transformed position
            assert np.array_equal(game.compact(image), game.transform_boards(game.compact(state), k))
            assert np.array_equal(game.compact_history(image), game.transform_boards(game.compact_history(state), k))
            assert np.array_equal(game.encode(image), game.transform_boards(game.encode(state), k))
            mask, mask_image = game.legal_mask(state), game.legal_mask(image)
            assert np.array_equal(mask_image[perm], mask)
            # a policy over actions moves the same way: p'[perm[a]] = p[a]
            policy = rng.random(game.num_actions) * mask
            moved = np.zeros_like(policy)
            moved[perm] = policy
            assert np.array_equal(moved * mask_image, moved)
            assert game.is_terminal(image) == game.is_terminal(state)
        assert game.outcome(image) == game.outcome(state)
    with pytest.raises(ValueError):
        game.action_permutation(n)
    with pytest.raises(ValueError):
        game.transform_boards(game.compact(game.initial_state()), n)


def test_zobrist_follows_the_position(game: Game):
    rng = np.random.default_rng(13)
    seen: dict[tuple[bytes, int], int] = {}
    compared = 0
    for _ in range(GAMES_PER_CASE.get(game.name, 3)):
        states, actions = random_game(game, rng)
        for state in states:
            z = game.zobrist(state)
            assert isinstance(z, int) and 0 <= z < 2**64
            key = (game.compact(state).tobytes(), game.to_play(state))
            # same board and side to move -> same key; different -> different (no collision here)
            assert seen.setdefault(key, z) == z
        assert len(set(seen.values())) == len(seen)
        # the same moves of each player in another order reach the same position and key
        prefix = actions[: min(len(actions) - 1, 8) // 2 * 2]
        if len(prefix) < 4:
            continue
        for _ in range(5):
            first, second = list(prefix[0::2]), list(prefix[1::2])
            rng.shuffle(first)
            rng.shuffle(second)
            order = [m for pair in zip(first, second) for m in pair]
            try:
                other = game.play_sequence(order)
            except IllegalMoveError:
                continue  # a reordering may pass through an illegal or finished position
            target = game.play_sequence(prefix)
            if np.array_equal(game.compact(other), game.compact(target)):
                assert game.zobrist(other) == game.zobrist(target)
                compared += 1
    if game.name != "go":
        assert compared > 0
    # keys are stable across builds of the game
    _, actions = random_game(game, np.random.default_rng(17))
    rebuilt = make_game(game.name, **game.options())
    assert game.zobrist(game.play_sequence(actions[:6])) == rebuilt.zobrist(rebuilt.play_sequence(actions[:6]))


def test_move_text_round_trips(game: Game):
    texts = [game.action_to_text(a) for a in range(game.num_actions)]
    assert len(set(texts)) == game.num_actions
    assert [game.text_to_action(t) for t in texts] == list(range(game.num_actions))
    for bad in ("?!", "notamove", "x0y", "1234"):
        with pytest.raises(IllegalMoveError):
            game.text_to_action(bad)
    # play_sequence accepts the text form
    _, actions = random_game(game, np.random.default_rng(19))
    head = actions[:5]
    a = game.play_sequence(head)
    b = game.play_sequence([game.action_to_text(m) for m in head])
    assert game.zobrist(a) == game.zobrist(b)


def test_render_draws_the_board(game: Game):
    _, actions = random_game(game, np.random.default_rng(23))
    text = game.render(game.play_sequence(actions[:3]))
    assert isinstance(text, str) and len(text.splitlines()) >= game.board_shape[0]


# ---- bad input ---------------------------------------------------------------------------------

def test_unknown_game_is_named():
    with pytest.raises(UnknownGameError, match="'chekers'"):
        make_game("chekers")


@pytest.mark.parametrize("name", sorted(n for n in ("tictactoe", "mnk", "gomoku", "fourinrow", "go") if n in REGISTERED))
def test_unknown_option_is_named(name):
    with pytest.raises(ConfigError, match="boardsize"):
        make_game(name, boardsize=9)


BAD_SIZES = [
    ("mnk", {"m": 0}, "m"),
    ("mnk", {"n": 99}, "n"),
    ("mnk", {"m": 3, "n": 3, "k": 4}, "k"),
    ("gomoku", {"k": 16}, "k"),
    ("fourinrow", {"columns": 0}, "columns"),
    ("fourinrow", {"rows": 99}, "rows"),
    ("fourinrow", {"k": 9}, "k"),
    ("go", {"size": 0}, "size"),
    ("go", {"size": 3}, "size"),
    ("go", {"size": 20}, "size"),
    ("go", {"size": "9"}, "size"),
]


@pytest.mark.parametrize(
    "name, options, field",
    [pytest.param(*b, id=f"{b[0]}-{b[2]}",
                  marks=() if b[0] in REGISTERED else pytest.mark.skip(reason=f"{b[0]} is not registered"))
     for b in BAD_SIZES],
)
def test_out_of_range_options_name_the_field(name, options, field):
    with pytest.raises(ConfigError, match=rf"\b{field}="):
        make_game(name, **options)


@pytest.mark.parametrize("text", ["A\u00b9", "a\u00b2", "\u00b9", "\u0663", "1\x00", " ", "a-1", "pass pass"])
def test_tricky_move_text_is_an_action_or_a_clear_error(game: Game, text: str):
    # superscript and non-ASCII digits pass str.isdigit() but are not move numbers
    try:
        a = game.text_to_action(text)
    except IllegalMoveError as exc:
        assert str(exc)
    else:
        assert isinstance(a, int) and 0 <= a < game.num_actions
        assert text.isascii()


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(text=st.text(max_size=6))
def test_any_move_text_is_an_action_or_a_clear_error(game: Game, text: str):
    # fuzzing (common practice for readers): no text may end in anything but IllegalMoveError
    try:
        a = game.text_to_action(text)
    except IllegalMoveError as exc:
        assert str(exc)
    else:
        assert isinstance(a, int) and 0 <= a < game.num_actions
