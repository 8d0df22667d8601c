"""Corpus scan: tables, totals, executors, broken utterances and dying workers."""

from __future__ import annotations

import concurrent.futures as cf
import contextlib
import json
import math
import os
import threading
from pathlib import Path

import numpy as np
import pytest
from conftest import require

from peekalign import open_bundle
from peekalign.corpus import (
    DELETION_CODES,
    UTTERANCE_COLUMNS,
    WORD_COLUMNS,
    Table,
    compare,
    scan,
)
from peekalign.exceptions import ParameterError
from peekalign.io.bundle import BundleWriter

# invented tram-depot dispatch words
WORDS = (
    "tram depot nine four two seven the to at on points signal east west loop yard "
    "hold clear track three platform proceed dunmere pellow cross car"
).split()
VOCAB = ["<b>", "|", *"abcdefghijklmnopqrstuvwxyz'"]


def _sentence(rng: np.random.Generator) -> list[str]:
    return [WORDS[k] for k in rng.integers(0, len(WORDS), size=int(rng.integers(3, 8)))]


def _hypothesis(ref: list[str], rng: np.random.Generator) -> list[str]:
    out = []
    for w in ref:
        r = rng.random()
        if r < 0.12:
            continue  # deletion
        if r < 0.18:
            out.append(WORDS[int(rng.integers(0, len(WORDS)))])  # substitution (or not)
        else:
            out.append(w)
        if rng.random() < 0.04:
            out.append("car")  # insertion
    return out


def _utterance(rng: np.random.Generator, words: list[str], *, shift: float = 0.04):
    """Peaky CTC log-probs for ``words``: a spike per token, blanks between."""
    ids = {t: i for i, t in enumerate(VOCAB)}
    tokens: list[int] = []
    for k, w in enumerate(words):
        if k:
            tokens.append(ids["|"])
        tokens += [ids[c] for c in w]
    frames: list[int] = []
    t = int(rng.integers(2, 5))
    for _ in tokens:
        frames.append(t)
        t += int(rng.integers(2, 4))
    T = t + int(rng.integers(3, 8))
    V = len(VOCAB)
    logits = rng.normal(scale=0.5, size=(T, V))
    logits[:, 0] += 5.0
    weak = rng.random() < 0.3
    for k, (tok, f) in enumerate(zip(tokens, frames, strict=True)):
        logits[f, tok] += 9.0 if not (weak and k == 1) else 4.5
    lp = logits - np.log(np.exp(logits).sum(axis=1, keepdims=True))
    # reference word times around the spikes of each word's letters
    times = []
    k = 0
    for w in words:
        first, last = frames[k], frames[k + len(w) - 1]
        times.append((w, round(first * shift - 0.02, 3), round(last * shift + 0.06, 3)))
        k += len(w) + 1
    att = np.zeros((len(tokens), T))
    for u, f in enumerate(frames):
        att[u] = np.exp(-0.5 * ((np.arange(T) - f - 2) / 1.5) ** 2)
    att /= att.sum(axis=1, keepdims=True)
    return lp.astype(np.float32), tokens, times, att.astype(np.float16)


def make_bundle(
    path,
    *,
    n: int = 12,
    seed: int = 0,
    broken: dict[int, str] | None = None,
    ids: list[str] | None = None,
    hyps: bool = True,
    encoder: dict | None = None,
    decoder_lookahead: int = 1,
    hyp_seed: int | None = None,
) -> Path:
    """A synthetic bundle of ``n`` utterances; ``broken`` maps an index to ``"missing"``
    (arrays file deleted), ``"nan"`` (NaN in log_probs) or ``"unalignable"`` (fewer
    frames than the reference needs); ``hyp_seed`` draws other hypotheses over the same
    references and arrays (a second model)."""
    rng = np.random.default_rng(seed)
    hyp_rng = np.random.default_rng(seed if hyp_seed is None else hyp_seed + 10_000)
    broken = broken or {}
    ids = ids or [f"dispatch-{k:04d}" for k in range(n)]
    with BundleWriter(
        path,
        vocab=VOCAB,
        frame_shift_s=0.04,
        word_boundary={"kind": "separator", "symbol": "|"},
        encoder=encoder or {"layers": 1, "lookahead_per_layer": 0},
        decoder={"lookahead": decoder_lookahead},
    ) as w:
        for k, uid in enumerate(ids):
            ref = _sentence(rng)
            lp, tokens, times, att = _utterance(rng, ref)
            hyp = " ".join(_hypothesis(ref, hyp_rng)) if hyps else None
            kind = broken.get(k)
            if kind == "nan":
                lp[3, 5] = np.nan
            if kind == "unalignable":
                lp = lp[: len(tokens) // 2]
                att = att[:, : len(tokens) // 2]
            w.add(
                uid,
                lp,
                ref=" ".join(ref),
                hyp=hyp,
                words=times if k % 2 == 0 else None,
                attention=att if k % 3 != 2 else None,
                attention_tokens=tokens if k % 3 != 2 else None,
            )
    if any(v == "missing" for v in broken.values()):
        lines = (Path(path) / "utts.jsonl").read_text().splitlines()
        for k, v in broken.items():
            if v == "missing":
                (Path(path) / json.loads(lines[k])["arrays"]).unlink()
    return Path(path)


@pytest.fixture(scope="module")
def bundle_path(tmp_path_factory) -> Path:
    return make_bundle(tmp_path_factory.mktemp("corpus") / "b", n=40, seed=7)


@pytest.fixture(scope="module")
def default_scan(bundle_path):
    return scan(bundle_path, workers=2, progress=False)


def _manifest(path) -> list[dict]:
    return [json.loads(x) for x in (Path(path) / "utts.jsonl").read_text().splitlines()]


def crash_on_marker(utt, *, lookahead=None):
    """Analysis that kills its worker process on utterances whose id holds 'crash'
    (stands in for a segfault in native code); importable by name in workers."""
    if "crash" in utt.id:
        os._exit(13)
    from peekalign.corpus import _default_analyze

    return _default_analyze()(utt, lookahead=lookahead)


# -- totals and WER --------------------------------------------------------------------


def test_totals_are_sums_and_wer_matches_jiwer(bundle_path, default_scan):
    jiwer = require("jiwer")
    s = default_scan
    assert s.ok and len(s.utterances) == 40
    t = s.totals()
    u = s.utterances
    for k in ("S", "D", "I", "n_words"):
        assert t[k] == sum(u[k].tolist())
    assert t["duration_s"] == pytest.approx(float(np.sum(u["duration_s"])))
    for c in DELETION_CODES:
        assert t["deletions"][c] == int(np.sum(u[f"del_{c}"]))
    # every deletion has exactly one cause (codes + "other" add up to D)
    dels = sum(t["deletions"].values())
    assert dels == t["D"]

    # reference: jiwer on the same (reference, hypothesis) pairs
    pairs = {e["id"]: (e["ref"], e["hyp"]) for e in _manifest(bundle_path)}
    for r in u:
        ref, hyp = pairs[r["id"]]
        assert r["wer"] == pytest.approx(jiwer.wer(ref, hyp), abs=1e-12), r["id"]
        out = jiwer.process_words(ref, hyp)
        assert r["S"] + r["D"] + r["I"] == out.substitutions + out.deletions + out.insertions
    refs = [pairs[i][0] for i in u["id"]]
    hyps = [pairs[i][1] for i in u["id"]]
    assert t["wer"] == pytest.approx(jiwer.wer(refs, hyps), abs=1e-12)
    assert t["S"] + t["D"] + t["I"] == t["errors"]


def test_word_table_agrees_with_utterance_rows(default_scan):
    s = default_scan
    by_id: dict[str, list[dict]] = {}
    for w in s.words:
        by_id.setdefault(w["id"], []).append(w)
    assert list(by_id) == s.utterances["id"].tolist()  # manifest order, no gaps
    for r in s.utterances:
        ws = by_id[r["id"]]
        assert [w["index"] for w in ws] == list(range(r["n_words"]))
        ops = [w["op"] for w in ws]
        assert ops.count("deletion") == r["D"]
        assert ops.count("substitution") == r["S"]
        for c in DELETION_CODES:
            assert sum(w["diagnosis"] == c for w in ws) == r[f"del_{c}"]
        margins = [w["reach_margin_ms"] for w in ws]
        assert r["worst_reach_margin_ms"] == min(margins)
        # reference: definition of the median (numpy's, even counts averaged); without
        # reference word times there is no delay (DEVELOPERS.md, "Emission delay")
        delays = [w["emission_delay_ms"] for w in ws]
        assert r["median_emission_delay_ms"] == pytest.approx(
            float(np.median(delays)), nan_ok=True
        )
        assert np.isnan(delays).all() == (r["word_times"] != "reference")
        assert {w["time_source"] for w in ws} == {r["word_times"]}
        for w in ws:
            assert w["window_end_frame"] >= w["trigger_frame"]
            assert w["end_s"] >= w["start_s"]


def test_word_times_source_and_look_ahead(bundle_path, default_scan):
    s = default_scan
    man = _manifest(bundle_path)
    with_times = {e["id"] for e in man if e.get("words")}
    for r in s.utterances:
        assert r["word_times"] == ("reference" if r["id"] in with_times else "alignment")
    # window end = trigger + look-ahead (bundle.json decoder look-ahead 1), clipped
    for w in s.words:
        assert w["window_end_frame"] - w["trigger_frame"] in (0, 1)


def test_sweep_equals_serial_sweep(bundle_path, default_scan):
    from peekalign.streaming import sweep

    # reference: the serial sweep over the same bundle in one process
    ref = sweep(open_bundle(bundle_path), max_lookahead=30, target=0.95)
    got = default_scan.sweep
    assert [r.n_reached for r in got.rows] == [r.n_reached for r in ref.rows]
    assert [r.reach for r in got.rows] == [r.reach for r in ref.rows]
    assert [r.latency_ms for r in got.rows] == [r.latency_ms for r in ref.rows]
    np.testing.assert_allclose(
        [r.kept_attention for r in got.rows], [r.kept_attention for r in ref.rows], rtol=1e-12
    )
    assert got.recommended == ref.recommended
    # hand check: reach at the scan's look-ahead is the share of margins >= 0
    m = default_scan.words["reach_margin_ms"]
    assert got.rows[1].reach == pytest.approx(float(np.mean(m >= -1e-6)))


# -- executors -----------------------------------------------------------------------


@contextlib.contextmanager
def _dask_executor(tmp_path, *, processes: bool, threads: int):
    """A Dask executor on a one-worker LocalCluster, its scratch files under tmp_path."""
    require("dask")
    distributed = require("distributed")
    import dask

    with (
        dask.config.set({"temporary-directory": str(tmp_path)}),
        distributed.LocalCluster(
            n_workers=1, processes=processes, dashboard_address=":0", threads_per_worker=threads
        ) as cluster,
        distributed.Client(cluster) as client,
    ):
        yield client.get_executor()


def test_tables_identical_across_executors(bundle_path, default_scan, tmp_path):
    one = scan(bundle_path, workers=1, progress=False)
    inline = scan(bundle_path, workers=0, progress=False)
    threads = scan(bundle_path, executor=cf.ThreadPoolExecutor(3), progress=False)
    with _dask_executor(tmp_path, processes=False, threads=2) as ex:
        on_dask = scan(bundle_path, executor=ex, progress=False)
    base = default_scan
    for other in (one, inline, threads, on_dask):
        assert other.utterances.equals(base.utterances)
        assert other.words.equals(base.words)
        assert other.utterances.csv_text() == base.utterances.csv_text()
        assert other.words.csv_text() == base.words.csv_text()
        assert [r.reach for r in other.sweep.rows] == [r.reach for r in base.sweep.rows]
        assert other.problems == base.problems


@pytest.mark.slow
def test_dask_process_cluster(bundle_path, default_scan, tmp_path):
    with _dask_executor(tmp_path, processes=True, threads=1) as ex:
        s = scan(bundle_path, executor=ex, progress=False)
    assert s.utterances.equals(default_scan.utterances)
    assert s.words.equals(default_scan.words)


class _Recorder(cf.Executor):
    """Runs calls inline and records what each submission carried."""

    def __init__(self):
        self.calls = []
        self.inner = cf.ThreadPoolExecutor(2)
        self.in_flight = 0
        self.max_in_flight = 0

    def submit(self, fn, /, *args, **kwargs):
        import pickle

        self.calls.append(len(pickle.dumps((fn, args, kwargs))))
        self.in_flight += 1
        self.max_in_flight = max(self.max_in_flight, self.in_flight)
        fut = self.inner.submit(fn, *args, **kwargs)

        def done(_):
            self.in_flight -= 1

        fut.add_done_callback(done)
        return fut


def test_batches_carry_ids_not_arrays_and_stay_bounded(bundle_path):
    rec = _Recorder()
    s = scan(bundle_path, executor=rec, workers=2, batch_size=3, progress=False)
    assert len(s.utterances) == 40
    assert len(rec.calls) == math.ceil(40 / 3)
    # one utterance's log-probs alone pickle to > 10 kB; a submission holds ids only
    lp = open_bundle(bundle_path)[s.utterances["id"][0]].log_probs
    assert lp.nbytes > 10_000
    assert max(rec.calls) < 2_000
    assert rec.max_in_flight <= 2 * 2  # bounded: two batches per worker


def test_progress_bar(bundle_path, capsys):
    scan(bundle_path, workers=0, progress=True, ids=["dispatch-0000", "dispatch-0001"])
    err = capsys.readouterr().err
    assert "2/2" in err  # tqdm's n/total counter


def test_ids_subset_and_parameter_errors(bundle_path):
    s = scan(bundle_path, workers=0, progress=False, ids=["dispatch-0005", "dispatch-0002"])
    assert s.utterances["id"].tolist() == ["dispatch-0002", "dispatch-0005"]  # manifest order
    with pytest.raises(ParameterError, match=r"'lookahead' parameter of scan must be an int"):
        scan(bundle_path, lookahead=-3)
    with pytest.raises(ParameterError, match="Got -3 instead"):
        scan(bundle_path, workers=-3)
    with pytest.raises(ParameterError, match="concurrent.futures.Executor"):
        scan(bundle_path, executor="dask")
    with pytest.raises(ParameterError, match="not in the bundle"):
        scan(bundle_path, ids=["nope"])


# -- broken utterances and dying workers ----------------------------------------------


def test_broken_utterances_are_listed_and_the_rest_scanned(tmp_path):
    broken = {2: "missing", 9: "nan", 17: "unalignable"}  # 10 % of 30
    p = make_bundle(tmp_path / "b", n=30, seed=3, broken=broken)
    s = scan(p, workers=2, progress=False)
    ids = [f"dispatch-{k:04d}" for k in range(30)]
    bad = {ids[k]: kind for k, kind in broken.items()}
    assert {q.utt for q in s.problems} == set(bad)
    reasons = {q.utt: q.message for q in s.problems}
    assert "no arrays file" in reasons[ids[2]]
    assert "NaN" in reasons[ids[9]]
    assert "needs" in reasons[ids[17]] and "frames" in reasons[ids[17]]
    assert s.utterances["id"].tolist() == [u for u in ids if u not in bad]
    assert set(s.words["id"].tolist()) == set(ids) - set(bad)
    # the good ones are exactly what a scan of the good ones alone gives
    alone = scan(p, workers=0, progress=False, ids=[u for u in ids if u not in bad])
    assert alone.utterances.equals(s.utterances)
    assert s.problems_table.csv_text().count("\n") == 4


def test_worker_death_is_retried_once_then_reported(tmp_path):
    ids = [f"dispatch-{k:04d}" for k in range(24)]
    ids[13] = "dispatch-crash-0013"
    p = make_bundle(tmp_path / "b", n=24, seed=5, ids=ids)
    s = scan(p, workers=2, batch_size=4, analyze=crash_on_marker, progress=False)
    assert [q.utt for q in s.problems] == ["dispatch-crash-0013"]
    assert "died" in s.problems[0].message and "retried" in s.problems[0].message
    good = [u for u in ids if "crash" not in u]
    assert s.utterances["id"].tolist() == good
    assert s.stats["retried"] >= 4  # at least the batch of the dead worker, one by one
    assert s.stats["restarts"] >= 2  # the first death and the retry's
    # every good result equals a clean scan of the good utterances
    clean = scan(p, workers=0, progress=False, ids=good)
    assert clean.utterances.equals(s.utterances)
    assert clean.words.equals(s.words)


# -- tables ----------------------------------------------------------------------------


def test_csv_bytes_and_pandas(default_scan, tmp_path):
    s = default_scan
    paths = s.write_csv(tmp_path)
    assert [q.name for q in paths] == ["utterances.csv", "words.csv", "sweep.csv", "problems.csv"]
    text = (tmp_path / "utterances.csv").read_text()
    assert text == s.utterances.csv_text()
    assert text.splitlines()[0].split(",") == list(UTTERANCE_COLUMNS)
    assert (tmp_path / "words.csv").read_text().splitlines()[0].split(",") == list(WORD_COLUMNS)
    with pytest.raises(ParameterError, match="overwrite"):
        s.write_csv(tmp_path)
    # reference: the standard library's csv reader reads back every row and cell
    import csv

    rows = list(csv.reader((tmp_path / "words.csv").open()))
    assert len(rows) == len(s.words) + 1
    assert rows[1][2] == s.words.rows[0][2]
    pd = require("pandas")
    du, dw = s.to_pandas()
    assert isinstance(du, pd.DataFrame) and len(du) == len(s.utterances)
    assert list(dw.columns) == list(WORD_COLUMNS)


def test_table_basics():
    t = Table(("id", "x"), [("b", 2.0), ("a", float("nan"))])
    assert t.equals(Table(("id", "x"), [("b", 2.0), ("a", float("nan"))]))
    assert not t.equals(Table(("id", "x"), [("b", 2.0), ("a", 1.0)]))
    assert t.csv_text() == "id,x\nb,2\na,\n"
    assert t.where("id", "a").rows == [("a", t.rows[1][1])]
    with pytest.raises(ParameterError, match="2 \\(one per column\\)"):
        Table(("id", "x"), [("a",)])
    with pytest.raises(KeyError, match="no column"):
        t["y"]


def test_worst_ranking(default_scan):
    w = default_scan.worst()
    errs = [r["S"] + r["D"] + r["I"] for r in w]
    assert errs == sorted(errs, reverse=True)
    assert sorted(w["id"].tolist()) == sorted(default_scan.utterances["id"].tolist())
    assert len(default_scan.worst(5)) == 5


# -- compare --------------------------------------------------------------------------


def test_compare_deltas_and_changed_words(tmp_path):
    jiwer = require("jiwer")
    a = make_bundle(tmp_path / "a", n=16, seed=11)
    b = make_bundle(tmp_path / "b", n=16, seed=11, hyp_seed=99)
    c = compare(a, b, workers=0, progress=False)
    assert not c.problems
    ma = {e["id"]: e for e in _manifest(a)}
    mb = {e["id"]: e for e in _manifest(b)}
    for r in c.utterances:
        # reference: jiwer on each model's own pairs
        wa = jiwer.wer(ma[r["id"]]["ref"], ma[r["id"]]["hyp"])
        wb = jiwer.wer(mb[r["id"]]["ref"], mb[r["id"]]["hyp"])
        assert r["wer_delta"] == pytest.approx(wb - wa, abs=1e-12)
    # a changed word is exactly one whose error operation (or cause, or reach) differs
    ops_a = {(w["id"], w["index"]): w["op"] for w in c.a.words}
    ops_b = {(w["id"], w["index"]): w["op"] for w in c.b.words}
    changed = {(w["id"], w["index"]) for w in c.words}
    differ = {k for k in ops_a if ops_a[k] != ops_b[k]}
    assert differ and differ <= changed
    assert sum(c.utterances["changed_words"]) == len(c.words)
    t = c.totals()
    assert t["delta"]["D"] == t["b"]["D"] - t["a"]["D"]


def test_compare_reports_ids_in_one_bundle_only(tmp_path):
    a = make_bundle(tmp_path / "a", n=5, seed=1)
    b = make_bundle(tmp_path / "b", n=4, seed=1)
    c = compare(a, b, workers=0, progress=False, labels=("stream", "full"))
    assert [(q.utt, q.message) for q in c.problems] == [
        ("dispatch-0004", "only in stream; not compared")
    ]
    assert len(c.utterances) == 4


# -- peek widget ----------------------------------------------------------------------------


def test_peek_picker_starts_from_a_scan(bundle_path, default_scan, monkeypatch):
    import peekalign
    import peekalign.corpus as corpus

    def no_new_scan(*a, **k):
        raise AssertionError("the peek widget analysed the bundle again")

    monkeypatch.setattr(corpus, "scan", no_new_scan)
    app = peekalign.peek(open_bundle(bundle_path), scan=default_scan)
    order = [v for _, v in app.controls["utt"].options]
    assert order == default_scan.worst()["id"].tolist()  # worst first, as the scan ranks
    assert app.state.utt == order[0]


# -- what the client keeps, and the per-utterance sweep -------------------------------


class _Reversed(cf.Executor):
    """Runs calls in this process, three at a time in reverse order of submission (and
    what is left after a short wait): results reach the client out of manifest order, as
    they may from a cluster."""

    def __init__(self):
        self.held: list = []
        self.lock = threading.Lock()
        self.finished: list[str] = []

    def submit(self, fn, /, *args, **kwargs):
        fut: cf.Future = cf.Future()
        with self.lock:
            self.held.append((fut, fn, args, kwargs))
            full = len(self.held) == 3
        if full:
            self.flush()
        else:
            threading.Timer(0.3, self.flush).start()
        return fut

    def flush(self):
        with self.lock:
            held, self.held = self.held, []
        for fut, fn, args, kwargs in reversed(held):
            res = fn(*args, **kwargs)
            self.finished += [r.uid for r in res]
            fut.set_result(res)


def test_results_out_of_order_give_the_same_tables_and_sweep(bundle_path, default_scan):
    ex = _Reversed()
    s = scan(bundle_path, executor=ex, workers=2, batch_size=2, progress=False)
    assert ex.finished != sorted(ex.finished)  # they did arrive out of order
    # reference: the process-pool run of the same bundle
    assert s.utterances.equals(default_scan.utterances)
    assert s.words.equals(default_scan.words)
    assert s.problems == default_scan.problems
    # kept attention is summed in manifest order whatever the arrival order: equal bits
    for a, b in zip(s.sweep.rows, default_scan.sweep.rows, strict=True):
        assert (a.n_reached, a.latency_ms) == (b.n_reached, b.latency_ms)
        assert a.kept_attention == b.kept_attention or (
            math.isnan(a.kept_attention) and math.isnan(b.kept_attention)
        )


def test_client_shares_equal_cells_and_keeps_nan_and_signed_zero():
    from peekalign.corpus import UTTERANCE_COLUMNS, _Collector, _UttResult

    c = _Collector(["u1", "u2"], max_lookahead=2)
    # built at run time, so equal values are distinct objects (as after unpickling)
    w1 = "".join(["de", "pot"])
    w2 = "".join(["dep", "ot"])
    t1, t2 = float("0.52"), float(str(0.5 + 0.02))
    nan = float("nan")

    def word(uid, w, t, end, window):
        cells = (uid, 0, w, t, end, "ctc", "correct", w, "", nan, nan, 1000, window, "", "")
        return cells + (nan, nan, None)

    def utt(uid):
        return (uid,) + (1.0,) * (len(UTTERANCE_COLUMNS) - 1)

    r1 = _UttResult("u1", row=utt("u1"), words=[word("u1", w1, t1, -0.0, int("1000"))])
    r2 = _UttResult("u2", row=utt("u2"), words=[word("u2", w2, t2, 0.0, None)])
    assert w1 is not w2 and t1 is not t2
    c.keep(r2)
    c.keep(r1)  # out of order: the tables are in manifest order all the same
    utts, words = c.tables()
    # reference: hand-worked
    assert utts["id"].tolist() == ["u1", "u2"] and words["id"].tolist() == ["u1", "u2"]
    col = words["word"]
    assert col[0] is col[1]  # equal words become one object
    assert words["start_s"].dtype == np.float64
    a, b = words.rows
    # -0.0 == 0.0 in Python but the CSV writes "-0": both kept as they were
    assert math.copysign(1, a[4]) == -1 and math.copysign(1, b[4]) == 1
    assert math.isnan(a[9]) and math.isnan(b[9])
    assert (a[12], b[12]) == (1000, None) and type(a[12]) is int
    assert [r.split(",")[:7] + r.split(",")[12:13] for r in words.csv_text().splitlines()[1:]] == [
        ["u1", "0", "depot", "0.52", "-0", "ctc", "correct", "1000"],
        ["u2", "0", "depot", "0.52", "0", "ctc", "correct", ""],
    ]


def test_batch_size_on_a_dask_cluster_and_elsewhere():
    from peekalign.corpus import MAX_BATCH, MAX_CLUSTER_BATCH, _plan_batches

    # reference: hand-worked, ceil(10,000 / (4 batches x 2 workers)) = 1,250, capped
    assert _plan_batches(10_000, 2, None, None) == (2, 2, MAX_BATCH)
    assert _plan_batches(10_000, 2, None, None, MAX_CLUSTER_BATCH) == (2, 2, 64)
    assert _plan_batches(100, 2, None, None, MAX_CLUSTER_BATCH) == (2, 2, 13)
    assert _plan_batches(100, 2, None, 7, MAX_CLUSTER_BATCH) == (2, 2, 7)


def test_dask_executor_gets_cluster_batches(bundle_path, tmp_path):
    from peekalign.corpus import _is_dask

    assert not _is_dask(cf.ThreadPoolExecutor(1)) and not _is_dask(None)
    with _dask_executor(tmp_path, processes=False, threads=1) as ex:
        assert _is_dask(ex)
        ids = open_bundle(bundle_path).ids[:3]
        s = scan(bundle_path, executor=ex, workers=1, ids=ids, progress=False)
    # reference: hand-worked, ceil(3 / 4) = 1 utterance per batch, 3 batches
    assert (s.stats["batch_size"], s.stats["batches"]) == (1, 3)


def test_utterance_counts_equal_the_sweep_of_that_utterance(bundle_path):
    from peekalign.analysis import analyze
    from peekalign.streaming import _utterance_counts, sweep

    b = open_bundle(bundle_path)
    with_attention = 0
    for uid in b.ids[:9]:
        utt = b[uid]
        res = analyze(utt)
        with_attention += utt.attention is not None
        # reference: streaming.sweep of the one utterance, which aligns by itself
        ref = sweep([utt], max_lookahead=12, front_end_ms=10.0)
        for paths in ({}, {"alignment": res.alignment, "greedy": res.greedy}):
            got = _utterance_counts(utt, max_lookahead=12, front_end_ms=10.0, **paths)
            assert got.n_reached.tolist() == [r.n_reached for r in ref.rows]
            np.testing.assert_array_equal(got.kept, [r.kept_attention for r in ref.rows])
            assert got.wait_frames.tolist() == ref.wait_frames.tolist()
            assert (got.n_words, got.n_oracle_words, got.n_tokens) == (
                ref.n_words,
                ref.n_oracle_words,
                ref.n_tokens,
            )
            assert got.encoder_frames == ref.encoder_frames
    assert 0 < with_attention < 9  # both kinds seen


def test_worker_heap_reuses_freed_arrays():
    import subprocess
    import sys

    # what a worker does per utterance: inflate into a buffer, a float32 copy, a
    # temporary, freed; frame counts vary between utterances
    code = (
        "import resource, sys, numpy as np\n"
        "from peekalign.corpus import _keep_heap\n"
        "if sys.argv[1] == 'keep':\n"
        "    _keep_heap()\n"
        "def one(k):\n"
        "    T = 180 + 7 * (k % 5)\n"
        "    raw = bytearray(T * 5000 * 2)\n"
        "    x = np.frombuffer(raw, np.float16).reshape(T, 5000).astype(np.float32)\n"
        "    return float(np.exp(x - x.max(axis=1, keepdims=True)).sum())\n"
        "for k in range(5):\n"
        "    one(k)\n"
        "f0 = resource.getrusage(resource.RUSAGE_SELF).ru_minflt\n"
        "for k in range(20):\n"
        "    one(k)\n"
        "print(resource.getrusage(resource.RUSAGE_SELF).ru_minflt - f0)\n"
    )
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]))

    def faults(mode):
        out = subprocess.run(
            [sys.executable, "-c", code, mode], capture_output=True, text=True, env=env
        )
        assert out.returncode == 0, out.stderr
        return int(out.stdout)

    # reference: glibc's mallopt(3) (M_MMAP_THRESHOLD, M_TRIM_THRESHOLD) and the kernel's
    # minor page-fault count (getrusage(2)): with the defaults the ~10 MB of arrays of
    # each round are faulted in again (~2,500 pages a round), kept in the heap next to none
    default, kept = faults("default"), faults("keep")
    assert default > 20 * 1000
    assert kept < default / 10
