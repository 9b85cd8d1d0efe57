"""SGF export of Go records and import of SGF games as supervised records (SGF FF[4])."""

from __future__ import annotations

import json

import numpy as np
import pytest

from selfplay.cli import main
from selfplay.games.registry import make_game
from selfplay.games.sgf import read_sgf, write_sgf
from selfplay.replay import synthetic
from selfplay.replay.buffer import ReplayBuffer
from selfplay.replay.reader import RunReader
from selfplay.replay.sgf_records import (IMPORT_WORKER, NoResultError, import_sgf_files,
                                         record_to_sgf, result_from_re, sgf_to_record)
from selfplay.replay.store import RecordStore

GO9 = make_game("go", size=9, komi=7.5)


def pt(r: int, c: int) -> int:
    return r * 9 + c


PASS = 81
# Black captures the white stone on the top edge at move 5, both pass at the end
CAPTURE_GAME = [pt(0, 0), pt(0, 1), pt(1, 1), pt(5, 5), pt(0, 2), pt(6, 6), PASS, PASS]


def test_result_from_re_follows_the_sgf_standard():
    # SGF FF[4] RE: "B+..." Black wins, "W+..." White wins, "0" or "Draw" a draw
    assert result_from_re("B+R", "x") == 1 and result_from_re("W+12.5", "x") == -1
    assert result_from_re("0", "x") == 0 and result_from_re("Draw", "x") == 0
    for bad in (None, "", "?", "Void"):
        with pytest.raises(NoResultError):
            result_from_re(bad, "x")


def test_imported_game_with_captures_and_passes():
    state = GO9.play_sequence(CAPTURE_GAME)
    assert GO9.is_terminal(state) and GO9.compact(state)[0, 1] == 0  # the capture happened
    text = write_sgf(GO9, CAPTURE_GAME, result=GO9.result_text(state), black="Ann", white="Bo")
    rec = sgf_to_record(text, "capture.sgf")
    assert rec.worker_id == IMPORT_WORKER and rec.game == "go"
    assert rec.game_options == GO9.options()
    np.testing.assert_array_equal(rec.actions, CAPTURE_GAME)
    expected = int(GO9.outcome(state))
    assert rec.result == expected
    np.testing.assert_array_equal(rec.outcomes, [expected if t % 2 == 0 else -expected for t in range(8)])
    assert rec.full_search.all() and (rec.snapshot == -1).all() and np.isnan(rec.root_values).all()
    s = GO9.initial_state()
    for t, a in enumerate(CAPTURE_GAME):
        np.testing.assert_array_equal(rec.boards[t], GO9.compact(s))
        np.testing.assert_array_equal(rec.legal_mask(t, 82), GO9.legal_mask(s))
        onehot = np.zeros(82, dtype=np.float32)
        onehot[a] = 1
        np.testing.assert_array_equal(rec.policy_target(t, 82), onehot)
        s = GO9.play(s, a)
    assert rec.boards[5][0, 1] == 0 and rec.boards[4][0, 1] == 2  # White's stone, then gone
    assert rec.extra["black"] == "Ann" and rec.extra["white"] == "Bo"
    # the same game gives the same id (a second import is a duplicate)
    assert sgf_to_record(text, "again.sgf").game_id == rec.game_id
    # and a learner's buffer takes it: one-hot targets, values from the result
    buf = ReplayBuffer(GO9, 100, seed=0)
    buf.add(rec)
    batch = buf.sample(64, policy_targets_only=True)
    assert (batch["policy"].max(axis=1) == 1.0).all()
    assert set(batch["value"].tolist()) <= {float(expected), float(-expected)}


HANDWRITTEN = "(;GM[1]FF[4]SZ[9]KM[6.5]PB[Kim]PW[Lee]RE[W+2.5]\n;B[ee];W[gc];B[cg]\n;W[];B[])"
HANDICAP = "(;GM[1]FF[4]SZ[9]HA[2]AB[cc][gg]KM[0.5]RE[B+R];W[ee];B[ce];W[ec])"


def test_handwritten_sgf_and_handicap_setup():
    rec = sgf_to_record(HANDWRITTEN, "hand.sgf")
    assert rec.game_options["komi"] == 6.5 and rec.result == -1
    np.testing.assert_array_equal(rec.actions, [pt(4, 4), pt(2, 6), pt(6, 2), PASS, PASS])
    np.testing.assert_array_equal(rec.outcomes, [-1, 1, -1, 1, -1])
    h = sgf_to_record(HANDICAP, "ha.sgf")
    assert h.to_play[0] == 1 and h.outcomes[0] == -1  # White moves first after the setup
    assert h.boards[0][2, 2] == 1 and h.boards[0][6, 6] == 1 and h.boards[0].sum() == 2
    assert sgf_to_record(HANDWRITTEN, "k.sgf", komi=7.5).game_options["komi"] == 7.5


def test_bad_files_are_skipped_with_a_reason(tmp_path):
    files = {"ok.sgf": HANDWRITTEN, "nores.sgf": "(;GM[1]SZ[9];B[ee])",
             "unknown.sgf": "(;GM[1]SZ[9]RE[?];B[ee])", "illegal.sgf": "(;SZ[9]RE[B+R];B[ee];W[ee])",
             "junk.sgf": "this is not sgf"}
    for name, text in files.items():
        (tmp_path / name).write_text(text)
    rep = import_sgf_files([tmp_path / n for n in files] + [tmp_path / "missing.sgf"])
    assert [r.extra["source"] for r in rep.records] == [str(tmp_path / "ok.sgf")]
    reasons = dict(rep.skipped)
    assert "no result" in reasons[str(tmp_path / "nores.sgf")]
    assert "gives no winner" in reasons[str(tmp_path / "unknown.sgf")]
    assert "illegal" in reasons[str(tmp_path / "illegal.sgf")]
    assert "no such file" in reasons[str(tmp_path / "missing.sgf")]
    assert len(rep.skipped) == 5


def test_export_of_a_played_go_game_reads_back():
    rec = synthetic.random_record(GO9, np.random.default_rng(4), "sp-1", snapshot=7)
    text = record_to_sgf(rec)
    back = read_sgf(text)
    assert back.size == 9 and back.komi == 7.5 and back.moves == [int(a) for a in rec.actions]
    final = GO9.play_sequence(back.moves)
    assert back.result == GO9.result_text(final)
    assert "snapshot 7" in back.black_name and back.properties["GN"] == ["sp-1"]
    rec.resigned, rec.result = True, -1
    rec.outcomes = np.where(rec.to_play == 0, -1, 1).astype(np.int8)
    resigned = read_sgf(record_to_sgf(rec))
    assert resigned.result == "W+R"
    # The worker keeps the resigning position with the move its search chose, never played:
    # the SGF game ends before it.
    assert resigned.moves == [int(a) for a in rec.actions[:-1]]


def test_sgf_commands_round_trip(tmp_path, capsys):
    text = write_sgf(GO9, CAPTURE_GAME, result=GO9.result_text(GO9.play_sequence(CAPTURE_GAME)))
    (tmp_path / "a.sgf").write_text(text)
    (tmp_path / "b.sgf").write_text(HANDWRITTEN)
    (tmp_path / "c.sgf").write_text("(;SZ[9];B[ee])")
    run = tmp_path / "run"
    assert main(["sgf", "import", str(tmp_path / "a.sgf"), str(tmp_path / "b.sgf"),
                 str(tmp_path / "c.sgf"), "--out", str(run)]) == 0
    out = capsys.readouterr()
    assert "imported 2 game(s), 13 positions" in out.out and "no result" in out.err
    assert main(["sgf", "import", str(tmp_path / "a.sgf"), "--out", str(run)]) == 0
    assert "1 already there" in capsys.readouterr().out
    recs = list(RunReader(run).records())
    assert len(recs) == 2
    assert main(["sgf", "export", str(run), "--out", str(tmp_path / "sgf"),
                 "--game", recs[0].game_id]) == 0
    (path,) = (tmp_path / "sgf").glob("*.sgf")
    assert read_sgf(path.read_text()).moves == CAPTURE_GAME
    assert main(["sgf", "export", str(tmp_path / "nope"), "--out", str(tmp_path / "x")]) == 2
    assert "does not exist" in capsys.readouterr().err
    assert main(["sgf", "import", str(tmp_path / "c.sgf"), "--out", str(tmp_path / "r2")]) == 2
    with RecordStore(run) as store:
        assert store.totals().games == 2  # nothing lost or doubled


def test_import_into_a_configured_run_takes_its_go_options(tmp_path, capsys):
    run = tmp_path / "run"
    run.mkdir()
    (run / "run.toml").write_text('[game]\nname = "go"\noptions = { size = 9, komi = 5.5, history = 2 }\n')
    text = write_sgf(GO9, CAPTURE_GAME, result="B+R")
    (tmp_path / "a.sgf").write_text(text)
    (tmp_path / "b.sgf").write_text(HANDWRITTEN)
    (tmp_path / "big.sgf").write_text("(;SZ[19]KM[6.5]RE[B+R];B[pd])")
    assert main(["sgf", "import", str(tmp_path / "a.sgf"), str(tmp_path / "b.sgf"),
                 str(tmp_path / "big.sgf"), "--out", str(run)]) == 0
    err = capsys.readouterr().err
    assert "19x19 game, but the run plays on 9x9" in err
    recs = list(RunReader(run).records())
    want = make_game("go", size=9, komi=5.5, history=2).options()
    assert [r.game_options for r in recs] == [want, want]
    buf = ReplayBuffer(make_game("go", **want), 50)  # the run's own buffer takes them
    buf.add_many(recs)
    assert len(buf) == 13
    (tmp_path / "c4").mkdir()
    (tmp_path / "c4" / "run.toml").write_text('[game]\nname = "fourinrow"\n')
    assert main(["sgf", "import", str(tmp_path / "a.sgf"), "--out", str(tmp_path / "c4")]) == 2
    assert "not go" in capsys.readouterr().err


def test_export_keeps_an_imported_result_and_writes_handicap_games(tmp_path, capsys):
    # an imported game whose recorded result (a win for Black, e.g. on time) is not what the
    # Tromp-Taylor score of its final board says (White ahead by 5.5): RE stays as recorded
    on_time = "(;GM[1]FF[4]SZ[9]KM[6.5]RE[B+T];B[ee];W[gc];B[cg];W[];B[])"
    km65 = make_game("go", size=9, komi=6.5)  # the file's komi
    # Tromp-Taylor: Black 2 stones, White 1 stone + 6.5 komi, no territory → W+5.5
    assert km65.result_text(km65.play_sequence([pt(4, 4), pt(2, 6), pt(6, 2), PASS, PASS])) == "W+5.5"
    (tmp_path / "t.sgf").write_text(on_time)
    (tmp_path / "h.sgf").write_text(HANDICAP)
    run = tmp_path / "run"
    assert main(["sgf", "import", str(tmp_path / "t.sgf"), str(tmp_path / "h.sgf"), "--out", str(run)]) == 0
    capsys.readouterr()
    assert main(["sgf", "export", str(run), "--out", str(tmp_path / "out")]) == 0
    back = {p.name: read_sgf(p.read_text()) for p in (tmp_path / "out").glob("*.sgf")}
    assert len(back) == 2
    by_re = {b.result: b for b in back.values()}
    assert set(by_re) == {"B+T", "B+R"}
    # the handicap game as SGF FF[4] writes it: AB setup stones, HA, PL (White first)
    h = by_re["B+R"]
    assert sorted(h.setup_black) == [pt(2, 2), pt(6, 6)] and h.setup_white == []
    assert h.first_player == 1 and h.handicap == 2 and h.properties["PL"] == ["W"]
    assert h.moves == [pt(4, 4), pt(4, 2), pt(2, 4)]
    assert by_re["B+T"].moves == [pt(4, 4), pt(2, 6), pt(6, 2), PASS, PASS]


def test_export_skips_what_it_cannot_write_with_a_warning(tmp_path, capsys):
    run = tmp_path / "run"
    go = synthetic.random_record(GO9, np.random.default_rng(2), "go-1", snapshot=1)
    ttt = make_game("tictactoe")
    other = synthetic.random_record(ttt, np.random.default_rng(3), "ttt-1", game_name="tictactoe",
                                    game_options={})
    with RecordStore(run) as store:
        store.add_games([go, other])
    assert main(["sgf", "export", str(run), "--out", str(tmp_path / "out")]) == 0
    out = capsys.readouterr()
    assert "wrote 1 SGF file(s)" in out.out and "skipped 1 game(s)" in out.out
    assert "warning: skipped ttt-1" in out.err and "not Go" in out.err
    assert [p.name for p in (tmp_path / "out").glob("*.sgf")] == ["go-1.sgf"]
    # a second export does not replace files unasked, and writes nothing then
    before = (tmp_path / "out" / "go-1.sgf").read_bytes()
    assert main(["sgf", "export", str(run), "--out", str(tmp_path / "out")]) == 2
    assert "--overwrite" in capsys.readouterr().err
    assert main(["sgf", "export", str(run), "--out", str(tmp_path / "out"), "--overwrite"]) == 0
    assert (tmp_path / "out" / "go-1.sgf").read_bytes() == before


def test_a_self_play_result_the_score_disagrees_with_is_written_as_recorded():
    rec = synthetic.random_record(GO9, np.random.default_rng(4), "sp-2", snapshot=3)
    scored = GO9.result_text(GO9.play_sequence([int(a) for a in rec.actions]))
    # a record whose result is not the Tromp-Taylor winner (e.g. a game adjudicated at the move
    # cap): the SGF keeps the record's winner and notes the score, instead of failing
    rec.result = -1 if scored.startswith("B") else 1
    back = read_sgf(record_to_sgf(rec))
    assert back.result == ("W+" if rec.result == -1 else "B+")
    assert json.loads(back.properties["GC"][0])["tromp_taylor_score"] == scored
