"""Causal triggers: trigger frames a streaming system has (CTC greedy, the search), the
mapping of reference tokens onto them, and the oracle fallback, labelled everywhere."""

from __future__ import annotations

import csv

import numpy as np
import pytest

from peekalign import align_tokens, analyze
from peekalign.cli import main
from peekalign.exceptions import ParameterError
from peekalign.io.bundle import BundleWriter
from peekalign.model import Utterance
from peekalign.streaming import causal_triggers, match_triggers, sweep
from peekalign.vocab import Vocabulary, WordBoundary

VOCAB = ["-", "|", "a", "b", "c"]


def _posteriors() -> np.ndarray:
    """Twelve frames (40 ms, offset 0). CTC emits "c" on frames 2-5 and "|" on frame 8;
    "b" only peaks under "c" on frame 5, "a" never wins a frame (best on frame 9)."""
    p = np.tile([0.96, 0.01, 0.01, 0.01, 0.01], (12, 1))
    p[2:5] = [0.02, 0.01, 0.01, 0.01, 0.95]
    p[5] = [0.02, 0.01, 0.01, 0.30, 0.66]
    p[8] = [0.30, 0.68, 0.01, 0.005, 0.005]
    p[9] = [0.90, 0.01, 0.07, 0.01, 0.01]
    return np.log(p)


def _utt() -> Utterance:
    v = Vocabulary(VOCAB, boundary=WordBoundary("separator", "|"))
    return Utterance.from_arrays(
        _posteriors(), ref="b a", vocab=v, words=[("b", 0.05, 0.15), ("a", 0.30, 0.40)]
    )


def test_match_triggers_hand_worked():
    # reference: hand-worked edit-distance alignment of the token ids
    # ref b | a against the emitted c | : b/c substituted, | matched, a deleted
    t = match_triggers([3, 1, 2], [5, 8, 9], [4, 1], [2, 8])
    assert t.frames.tolist() == [2, 8, 9]
    assert t.oracle.tolist() == [False, False, True] and t.matched.tolist() == [0, 1, -1]
    assert t.label == "CTC greedy; 1 of 3 tokens oracle"
    # nothing emitted: every token keeps its oracle frame
    t = match_triggers([3, 1, 2], [5, 8, 9], [], [])
    assert t.frames.tolist() == [5, 8, 9] and t.oracle.all()
    # insertions take no reference token
    t = match_triggers([3], [5], [4, 3, 4], [1, 4, 7], source="search")
    assert t.frames.tolist() == [4] and t.label == "prefix search"
    with pytest.raises(ParameterError, match="one frame per token"):
        match_triggers([3, 1], [5], [4], [2])
    with pytest.raises(ParameterError, match="'source' parameter of match_triggers"):
        match_triggers([3], [5], [4], [2], source="oracle")


def test_causal_triggers_follow_the_greedy_path_not_the_forced_alignment():
    u = _utt()
    a = align_tokens(u.log_probs, u.ref_tokens)
    # reference: hand-worked Viterbi of "b | a": b only on frame 5 (its one frame above
    # blank-relative 1), | on 8, a on 9
    assert a.first.tolist() == [5, 8, 9]
    # reference: hand-worked greedy path: c on 2-5 (first 2, spike 2), | on 8
    g = causal_triggers(u, a)
    assert g.frames.tolist() == [2, 8, 9] and g.oracle.tolist() == [False, False, True]
    assert causal_triggers(u, a, rule="spike").frames.tolist() == [2, 8, 9]
    o = causal_triggers(u, a, source="oracle")
    assert o.frames.tolist() == [5, 8, 9] and o.oracle.all() and o.label == "oracle"
    with pytest.raises(ParameterError, match="trigger source 'search' without a search"):
        causal_triggers(u, a, source="search")


def test_analyze_uses_causal_triggers_and_labels_the_oracle_ones():
    u = _utt()
    a = analyze(u, lookahead=0)
    # reference: hand-worked. heard until = (trigger + look-ahead) * 40 ms (no encoder or
    # front-end look-ahead); margin = heard until - word end
    assert a.windows.trigger.tolist() == [2, 8, 9]
    assert a.windows.trigger_label == "CTC greedy; 1 of 3 tokens oracle"
    rows = a.word_table()
    assert [r["trigger_source"] for r in rows] == ["greedy", "oracle"]
    np.testing.assert_allclose([r["margin_s"] for r in rows], [0.08 - 0.15, 0.36 - 0.40])
    assert a.summary()["triggers"] == "greedy" and a.summary()["oracle_triggers"] == 1
    o = analyze(u, lookahead=0, triggers="oracle")
    assert o.windows.trigger.tolist() == [5, 8, 9]
    assert [r["trigger_source"] for r in o.word_table()] == ["oracle", "oracle"]
    np.testing.assert_allclose([r["margin_s"] for r in o.word_table()], [0.05, -0.04])
    assert o.summary()["oracle_triggers"] == 2
    with pytest.raises(ParameterError, match="'triggers' parameter of analyze"):
        analyze(u, triggers="viterbi")
    with pytest.raises(ParameterError, match="no search was asked for"):
        analyze(u, triggers="search")
    # the search's own trigger frames: its best hypothesis "c |" created c on frame 2
    s = analyze(u, lookahead=0, triggers="search", search=True)
    assert s.windows.trigger_source == "search"
    assert s.windows.trigger.tolist()[0] == int(s.search.best.trigger_frames[0])


def test_sweep_reach_with_causal_and_oracle_triggers():
    u = _utt()
    # reference: hand-worked from the margins above, each + 40 ms per frame of
    # look-ahead: greedy -70/-40 ms -> words reached from e = 2 / e = 1; oracle +50/-40
    g = sweep([u], max_lookahead=3, target=1.0)
    assert [r.reach for r in g.rows] == [0.0, 0.5, 1.0, 1.0] and g.recommended == 2
    assert g.triggers == "greedy" and g.n_oracle_words == 1
    assert g.triggers_label.startswith("CTC greedy triggers (causal); 1 of 2 words")
    o = sweep([u], max_lookahead=3, target=1.0, triggers="oracle")
    assert [r.reach for r in o.rows] == [0.5, 1.0, 1.0, 1.0] and o.recommended == 1
    assert o.n_oracle_words == 2 and o.triggers_label.startswith("oracle triggers")
    with pytest.raises(ParameterError, match="'triggers' parameter of sweep"):
        sweep([u], triggers="search")


def test_commands_label_the_triggers(tmp_path, capsys):
    u = _utt()
    path = tmp_path / "b"
    with BundleWriter(
        path,
        vocab=VOCAB,
        frame_shift_s=0.04,
        word_boundary={"kind": "separator", "symbol": "|"},
        decoder={"lookahead": 0},
    ) as w:
        w.add("u1", u.log_probs, ref="b a", words=u.words, hyps={"ctc": "c"})
    assert main(["sweep", str(path), "--max-lookahead", "3", "--target", "1"]) == 0
    out = capsys.readouterr().out
    assert "triggers: CTC greedy triggers (causal); 1 of 2 words" in out
    assert "reach: 2 frames" in out  # reference: hand-worked above
    assert main(["sweep", str(path), "--max-lookahead", "3", "--triggers", "oracle"]) == 0
    assert "triggers: oracle triggers (Viterbi forced alignment" in capsys.readouterr().out
    rep = tmp_path / "r"
    assert main(["scan", str(path), "--out", str(rep), "--workers", "0", "--no-pages"]) == 0
    index = (rep / "index.html").read_text()
    assert "CTC greedy triggers, 1 word oracle" in index
    words = [r["trigger_source"] for r in csv.DictReader(open(rep / "words.csv"))]
    assert words == ["greedy", "oracle"]
    assert main(["scan", str(path), "--out", str(rep), "--overwrite", "--workers", "0",
                 "--no-pages", "--triggers", "oracle"]) == 0  # fmt: skip
    assert "oracle triggers (forced alignment" in (rep / "index.html").read_text()


def test_views_name_the_trigger_source():
    from peekalign.views._document import _header_html, info_html
    from peekalign.views._model import view_model

    vm = view_model(analyze(_utt(), lookahead=0), audio=False)
    assert vm.trigger_src == ["CTC greedy", "CTC greedy", "oracle"]
    assert "triggers: CTC greedy; 1 of 3 tokens oracle" in _header_html(vm, 0)
    # reference: hand-worked (token 2 is "a", oracle frame 9 at 0.360 s)
    assert "trigger frame 9 (0.360 s, oracle)" in info_html(vm, 2, 0, None, "")
    assert "trigger frame 2 (0.080 s, CTC greedy)" in info_html(vm, 0, 0, None, "")
