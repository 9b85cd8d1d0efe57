"""SGF FF[4] reading and writing for Go.

Source: the SGF FF[4] standard (https://www.red-bean.com/sgf/): the grammar (collection, game
tree, sequence, node, property), value escapes ("\\]" and "\\\\", soft line breaks), the main
line being the first variation, Go properties (SZ, KM, HA, AB/AW with compressed point lists,
PL, B/W with "aa" = top-left, pass as "" or "tt" on boards up to 19x19).
"""

from __future__ import annotations

import numpy as np
import pytest

from selfplay.errors import FormatError, IllegalMoveError
from selfplay.games.go import GoGame
from selfplay.games.sgf import point_to_sgf, read_sgf, sgf_to_point, write_sgf


def _random_game(game: GoGame, seed: int) -> tuple[list[int], int, int]:
    """Moves of a seeded random game with its number of passes and captured stones."""
    rng = np.random.default_rng(seed)
    s = game.initial_state()
    moves, passes, captured = [], 0, 0
    while not game.is_terminal(s):
        legal = np.flatnonzero(game.legal_mask(s)[:-1])
        if legal.size == 0 or rng.random() < 0.05:
            a = game.pass_action
            passes += 1
        else:
            a = int(legal[rng.integers(legal.size)])
        before = int((s.board != 0).sum())
        s = game.play(s, a)
        if a != game.pass_action:
            captured += before + 1 - int((s.board != 0).sum())
        moves.append(a)
    return moves, passes, captured


def test_round_trip_of_a_game_with_passes_and_captures() -> None:
    game = GoGame(size=9, komi=6.5)
    moves, passes, captured = _random_game(game, seed=5)
    assert passes >= 2 and captured >= 5  # the game really has passes and captures
    state = game.play_sequence(moves)
    result = game.result_text(state)
    text = write_sgf(game, moves, result=result, black="Ada [the first]", white="Brook\\2",
                     extra={"GN": "demo match", "C": ["note one", "note ]two["]})
    assert text.startswith("(;FF[4]GM[1]") and "SZ[9]" in text and "KM[6.5]" in text
    assert "PB[Ada [the first\\]]" in text and "PW[Brook\\\\2]" in text
    back = read_sgf(text)
    assert back.size == 9 and back.komi == 6.5 and back.moves == moves
    assert back.result == result and back.first_player == 0
    assert back.black_name == "Ada [the first]" and back.white_name == "Brook\\2"
    assert back.properties["GN"] == ["demo match"]
    assert back.properties["C"] == ["note one", "note ]two["]


def test_round_trip_19x19_and_tiny_board() -> None:
    for size in (19, 3):
        game = GoGame(size=size, komi=7.5, tiny=size < 5)
        moves, _, _ = _random_game(game, seed=size)
        back = read_sgf(write_sgf(game, moves, result=None))
        assert back.moves == moves and back.size == size and back.result is None


def test_coordinate_helpers() -> None:
    # SGF FF[4] Go: first letter the column from the left, second the row from the top.
    assert point_to_sgf(0, 9) == "aa" and point_to_sgf(8, 9) == "ia" and point_to_sgf(80, 9) == "ii"
    assert sgf_to_point("cd", 9) == 3 * 9 + 2
    assert sgf_to_point("", 9) == 81 and sgf_to_point("tt", 9) == 81 and sgf_to_point("tt", 19) == 361
    with pytest.raises(IllegalMoveError, match="'jj'"):
        sgf_to_point("jj", 9)


def test_main_line_of_variations_escapes_and_whitespace() -> None:
    text = r"""
    (;GM[1]FF[4]SZ[9]KM[0.5]C[a comment with \] and \\ and a soft\
break]
      ;B[ee]
      (;W[cc]  ;B[gg]
         (;W[gc];B[cg])
         (;W[dd]))
      (;W[dd];B[cc]))
    (;GM[1]SZ[19];B[aa])
    """
    g = read_sgf(text)
    to = lambda s: sgf_to_point(s, 9)  # noqa: E731
    assert g.moves == [to("ee"), to("cc"), to("gg"), to("gc"), to("cg")]
    assert g.properties["C"] == ["a comment with ] and \\ and a softbreak"]
    assert g.komi == 0.5 and g.size == 9


def test_deeply_nested_variations_follow_the_main_line() -> None:
    # Some editors write every move as a new variation: "(;B[..](;W[..](;B[..] ...)))".
    game = GoGame(size=19)
    moves, _, _ = _random_game(game, seed=9)
    coords = ["" if a == 361 else point_to_sgf(a, 19) for a in moves]
    text = "(;SZ[19]" + "".join(f"(;{'BW'[i % 2]}[{c}]" for i, c in enumerate(coords))
    text += ")" * len(coords) + "(;B[aa])" + ")"  # the root's second variation is not main line
    assert len(moves) > 300 and read_sgf(text).moves == moves


def test_handicap_setup_stones_and_multiple_values() -> None:
    text = ("(;GM[1]FF[4]SZ[9]HA[3]KM[0.5]AB[cc][gc][cg]PB[Ada]RE[W+R];W[gg];B[ee];W[tt];B[])")
    g = read_sgf(text)
    to = lambda s: sgf_to_point(s, 9)  # noqa: E731
    assert g.handicap == 3 and g.setup_black == [to("cc"), to("gc"), to("cg")]
    assert g.first_player == 1  # White moves first after handicap stones
    assert g.moves == [to("gg"), to("ee"), 81, 81] and g.result == "W+R"
    # compressed point list "aa:bb" is the rectangle a..b x a..b
    g2 = read_sgf("(;SZ[5]AB[aa:bb]AW[dd];B[cc])")
    assert g2.setup_black == [0, 1, 5, 6] and g2.setup_white == [18] and g2.size == 5
    assert g2.komi is None


def test_old_style_lowercase_identifiers_and_default_size() -> None:
    # FF[3] allowed lower-case letters in identifiers ("AddBlack"); FF[4] readers skip them.
    g = read_sgf("(;GaMe[1]SiZe[9]AddBlack[ee];White[cc])")
    assert g.setup_black == [40] and g.moves == [20] and g.size == 9
    assert read_sgf("(;B[pd])").size == 19  # SZ defaults to 19 for Go


def test_replay_applies_captures_and_suicide_rules() -> None:
    # W[ab] captures the corner stone; Black refilling the corner at once would be suicide.
    assert len(read_sgf("(;SZ[5];B[aa];W[ba];B[cc];W[ab])").moves) == 4
    with pytest.raises(FormatError, match=r"illegal move B\[aa\] \(move 5\).*suicide"):
        read_sgf("(;SZ[5];B[aa];W[ba];B[cc];W[ab];B[aa])")
    assert len(read_sgf("(;SZ[5];B[aa];W[ba];B[cc];W[ab];B[aa])", allow_suicide=True,
                        superko=False).moves) == 5


@pytest.mark.parametrize("text, message", [
    ("", "empty input"),
    ("   ", "empty input"),
    ("(;GM[1]SZ[9];B[ee]", "unbalanced '\\('"),
    ("(;GM[1]SZ[9];B[ee]))", "expected '\\('"),
    ("(GM[1])", "expected ';'"),
    ("(;GM[1]C[never closed)", "unterminated property value"),
    ("(;GM[2]SZ[8])", "GM\\[2\\] is not Go"),
    ("(;SZ[20])", "SZ\\[20\\] is out of range"),
    ("(;SZ[0])", "SZ\\[0\\] is out of range"),
    ("(;SZ[nine])", "SZ\\[nine\\] is not a number"),
    ("(;SZ[9:7])", "rectangular board"),
    ("(;SZ[9]KM[six])", "KM\\[six\\] is not a real number"),
    ("(;SZ[9];B[zz])", "illegal move B\\[zz\\]"),
    ("(;SZ[9];B[ee];W[ee])", "illegal move W\\[ee\\] \\(move 2\\).*occupied"),
    ("(;SZ[9];B[ee];B[cc])", "two moves by Black in a row"),
    ("(;SZ[9];B[ee]W[cc])", "both B and W"),
    ("(;SZ[9];B[ee][cc])", "must have one value"),
    ("(;SZ[9]GM)", "property GM has no value"),
    ("(;SZ[9]SZ[9])", "appears twice"),
    ("(;SZ[9];B[ee];AB[cc])", "setup property AB after the root"),
    ("(;SZ[9]AB[ee]AW[ee])", "more than one stone"),
    ("(;SZ[9]AB[zz])", "bad point in AB"),
    ("(;SZ[9]PL[X])", "PL\\[X\\]"),
    ("(;FF[7])", "FF\\[7\\]"),
    ("(;SZ[9]1[x])", "expected '\\(', '\\)' or ';'"),
    ("(;SZ[9](;B[aa]);W[bb])", "after a variation"),
    ("(" * 100000, "expected ';'"),
    ("(;" * 100000, "unbalanced"),
])
def test_malformed_sgf_is_refused_with_a_clear_error(text: str, message: str) -> None:
    with pytest.raises(FormatError, match=message):
        read_sgf(text)


def test_error_names_line_and_column() -> None:
    text = "(;GM[1]SZ[5]\n;B[cc]\n;W[cc])"
    with pytest.raises(FormatError, match=r"line 3, column 2"):
        read_sgf(text)


def test_superko_violation_in_a_record_is_an_error() -> None:
    # The 6-move 2x2 cycle: the seventh move recreates the board after the first (positional
    # superko, Tromp–Taylor). Points: a b / c d = "aa" "ba" / "ab" "bb".
    text = "(;SZ[2];B[aa];W[bb];B[ba];W[ab];B[aa];W[ba];B[aa])"
    with pytest.raises(FormatError, match="superko"):
        read_sgf(text)
    assert len(read_sgf(text, superko=False).moves) == 7


def test_write_refuses_illegal_moves_and_bad_extra_properties() -> None:
    game = GoGame(size=9)
    with pytest.raises(IllegalMoveError, match="move 2"):
        write_sgf(game, [40, 40], result=None)
    with pytest.raises(FormatError, match="upper-case"):
        write_sgf(game, [40], result=None, extra={"bad1": "x"})
    with pytest.raises(FormatError, match="written by write_sgf"):
        write_sgf(game, [40], result=None, extra={"SZ": "9"})
    with pytest.raises(FormatError, match="no value"):
        write_sgf(game, [40], result=None, extra={"C": []})
    with pytest.raises(FormatError, match="expected text"):
        read_sgf(b"(;SZ[9])")  # type: ignore[arg-type]


# ---- fuzzing: any text either parses or raises FormatError ------------------------------------

from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

_SGF_CHARS = "();[]\\:ABWEHKMPLSZRGFCab cdefghijst0123456789.+-\n"
_VALID = "(;GM[1]FF[4]SZ[5]KM[0.5]AB[aa:bb]PB[x\\]y];W[cc](;B[dd];W[])(;B[ee]))"


@settings(max_examples=300, deadline=None)
@given(st.text(alphabet=_SGF_CHARS, max_size=80))
def test_fuzz_random_text_parses_or_raises_format_error(text: str) -> None:
    # Common practice (fuzzing readers): a reader never fails with anything but its own error.
    try:
        read_sgf(text)
    except FormatError:
        pass


@settings(max_examples=300, deadline=None)
@given(st.lists(st.tuples(st.integers(0, len(_VALID)), st.integers(0, 3),
                          st.sampled_from(_SGF_CHARS)), max_size=4))
def test_fuzz_mutated_record_parses_or_raises_format_error(edits: list) -> None:
    text = _VALID
    for pos, kind, ch in edits:
        pos = min(pos, len(text))
        if kind == 0:
            text = text[:pos] + text[pos + 1:]
        elif kind == 1:
            text = text[:pos] + ch + text[pos:]
        else:
            text = text[:pos] + ch + text[pos + 1:]
    try:
        g = read_sgf(text)
    except FormatError:
        return
    assert 1 <= g.size <= 19 and all(0 <= m <= g.size * g.size for m in g.moves)
