"""Confusion counts against jiwer's word alignment and hand counts."""

from __future__ import annotations

from collections import Counter

import pytest
from conftest import require
from test_errors import WORDS, optimal_alignments, random_pair

from peekalign import ParameterError
from peekalign.confusions import (
    confusions,
    entity_scores,
    frequency_bins,
    read_word_counts,
    token_deletions,
)
from peekalign.errors import align_words


def _jiwer_counts(jiwer, refs, hyps):
    """Per-word S/D/I from jiwer.process_words, chunks expanded word by word."""
    out = jiwer.process_words([" ".join(r) for r in refs], [" ".join(h) for h in hyps])
    subs, dels, ins = Counter(), Counter(), Counter()
    for ref, hyp, chunks in zip(refs, hyps, out.alignments, strict=True):
        for c in chunks:
            if c.type == "substitute":
                for i, j in zip(
                    range(c.ref_start_idx, c.ref_end_idx),
                    range(c.hyp_start_idx, c.hyp_end_idx),
                    strict=True,
                ):
                    subs[(ref[i], hyp[j])] += 1
            elif c.type == "delete":
                dels.update(ref[c.ref_start_idx : c.ref_end_idx])
            elif c.type == "insert":
                ins.update(hyp[c.hyp_start_idx : c.hyp_end_idx])
    return subs, dels, ins


def test_counts_per_word_equal_jiwer_on_unique_alignments(rng):
    jiwer = require("jiwer")
    refs, hyps = [], []
    while len(refs) < 500:
        ref, hyp = random_pair(rng, max_len=8, vocab=WORDS)
        if hyp and optimal_alignments(ref, hyp)[1] == 1:
            refs.append(ref)
            hyps.append(hyp)
    c = confusions(align_words(r, h) for r, h in zip(refs, hyps, strict=True))
    subs, dels, ins = _jiwer_counts(jiwer, refs, hyps)
    # reference: jiwer.process_words (its word alignment), on pairs whose minimal
    # alignment is unique (brute force), so both must find the same one
    assert c.substitutions == subs
    assert c.deletions == dels
    assert c.insertions == ins
    assert sum(subs.values()) > 200 and sum(dels.values()) > 100 and sum(ins.values()) > 50


def test_word_rows_and_tops_hand_worked():
    es = [
        align_words("tram nine to depot", "tram five depot"),
        align_words("nine to go", "five to go now"),
        align_words("to depot", "depot"),
    ]
    c = confusions(es)
    # reference: hand counts - "to" occurs 3 times, deleted twice
    rows = {r["word"]: r for r in c.word_rows()}
    assert rows["to"] == {
        "word": "to",
        "count": 3,
        "correct": 1,
        "substituted": 0,
        "deleted": 2,
        "deletion_rate": 2 / 3,
        "error_rate": 2 / 3,
    }
    assert c.word_rows()[0]["word"] == "to"
    assert c.top_substitutions() == [("nine", "five", 2)]
    assert c.top_inserted() == [("now", 1)]
    assert sum(r["count"] for r in c.word_rows()) == sum(e.N for e in es)


def test_token_deletions_hand_worked():
    # reference: hand-worked character alignments: "depot" -> "dept" drops the "o",
    # "depot" -> "depot" drops nothing; word pieces are taken as given
    rows = {r["token"]: r for r in token_deletions([("depot", "dept"), ("depot", "depot")])}
    assert rows["o"]["count"] == 2 and rows["o"]["deleted"] == 1
    assert rows["o"]["deletion_rate"] == 0.5 and rows["d"]["deleted"] == 0
    rows = token_deletions([(["▁dun", "mere"], ["▁dun"])])
    assert rows[0] == {"token": "mere", "count": 1, "deleted": 1, "deletion_rate": 1.0}


def test_frequency_bins_hand_counts_and_totals(tmp_path):
    p = tmp_path / "counts.txt"
    p.write_text("# training text\ntram 1200\ndepot 40\n   7 junction\nto 3000\nnine 2\n")
    counts = read_word_counts(p)
    assert counts == {"tram": 1200, "depot": 40, "junction": 7, "to": 3000, "nine": 2}
    es = [
        align_words("tram nine to dunmere junction", "tram five to junction"),
        align_words("depot to dunmere", "depot dunmere"),
    ]
    causes = [[None, None, None, "decoder-drop", None], [None, "glued", None]]
    bins = frequency_bins(es, counts, causes=causes)
    got = {b.label: (b.words, b.substituted, b.deleted, b.causes) for b in bins}
    # reference: hand counts - OOV: dunmere x2 (one deleted); 1-9: nine (S),
    # junction; 10-99: depot; >= 1000: tram, to x2 (one deleted)
    assert got == {
        "OOV (0)": (2, 0, 1, {"decoder-drop": 1}),
        "1-9": (2, 1, 0, {}),
        "10-99": (1, 0, 0, {}),
        "100-999": (0, 0, 0, {}),
        ">= 1000": (3, 0, 1, {"glued": 1}),
    }
    assert sum(b.words for b in bins) == sum(e.N for e in es)
    assert sum(b.substituted + b.deleted for b in bins) == sum(e.S + e.D for e in es)
    assert bins[0].error_rate == 0.5 and bins[3].error_rate != bins[3].error_rate  # NaN


def test_entity_scores_hand_counts():
    es = [
        align_words("hold at dunmere junction", "hold at dunmore junction"),
        align_words("dunmere junction clear", "dunmere junction clear"),
        align_words("tram to depot", "tram to dunmere depot"),
    ]
    s = entity_scores(es, ["Dunmere Junction", "depot"])
    # reference: hand counts - entities: "dunmere junction" twice (one with a
    # substitution), "depot" once (right); list words in the references: dunmere,
    # junction x2, depot = 5, errors: one S + the inserted "dunmere" = 2;
    # the other 5 words have no error
    assert (s.entities, s.recalled) == (3, 2)
    assert (s.b_words, s.b_errors, s.u_words, s.u_errors) == (5, 2, 5, 0)
    assert s.b_wer == pytest.approx(0.4) and s.u_wer == 0.0
    assert s.missed == Counter({"dunmere junction": 1})
    total = sum(e.errors for e in es)
    assert s.b_errors + s.u_errors == total and s.b_words + s.u_words == sum(e.N for e in es)


def test_bad_inputs_named(tmp_path):
    p = tmp_path / "c.txt"
    p.write_text("tram twelve\n")
    with pytest.raises(ParameterError, match="line 1"):
        read_word_counts(p)
    with pytest.raises(ParameterError, match="ErrorAlignment"):
        confusions(["tram"])
    with pytest.raises(ParameterError, match="increasing"):
        frequency_bins([], {}, edges=(10, 5))
