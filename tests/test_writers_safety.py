"""Every writer: no overwrite unless asked, temporary file + rename, clear errors on a
full disk or a read-only folder with nothing half-written, byte-identical output.

A full disk is simulated by file objects whose ``write`` raises ``OSError(ENOSPC)``
once a byte budget is spent (some bytes may already be in the file, as on a real
disk). A read-only folder is a ``chmod 555`` folder for a normal user; as root, where
chmod stops nothing, the system calls that create or rename entries in that folder
raise ``PermissionError(EACCES)``, which is what the kernel answers a normal user.
"""

from __future__ import annotations

import builtins
import errno
import io
import json
import os
import subprocess
import sys
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
from conftest import random_log_probs
from test_bundle import SEP, VOCAB
from test_cli import peaky

from peekalign import BundleWriter, ParameterError, open_bundle
from peekalign.cli import main
from peekalign.commands.align import align_bundle, write_outputs
from peekalign.io.atomic import atomic_dir, atomic_write
from peekalign.io.audio import write_wav
from peekalign.io.ctm import write_ctm
from peekalign.io.kaldi import read_kaldi_matrices, write_kaldi_matrices
from peekalign.io.textgrid import write_textgrid
from peekalign.streaming import sweep

# -- the writers ----------------------------------------------------------------------

CTM_ROWS = [
    (f"d-{i}", w, 0.12 * k, 0.12 * k + 0.1, None)
    for i in range(40)
    for k, w in enumerate(["tram", "depot", "bay", "four"])
]
TIERS = {
    "words": [(0.1 * k, 0.1 * k + 0.08, f"w{k}") for k in range(60)],
    "tokens": [(0.05 * k, 0.05 * k + 0.04, f"t{k}") for k in range(120)],
}


def _mats():
    rng = np.random.default_rng(7)
    return {f"d-{i}": random_log_probs(rng, 30, 9) for i in range(12)}


def _bundle(path, overwrite):
    rng = np.random.default_rng(8)
    with BundleWriter(
        path,
        vocab=VOCAB,
        frame_shift_s=0.04,
        word_boundary=SEP,
        sample_rate=16000,
        overwrite=overwrite,
    ) as w:
        for i in range(4):
            w.add(
                f"d-{i}",
                random_log_probs(rng, 25, 9),
                ref="tram car",
                audio=0.01 * rng.standard_normal(16000).astype(np.float32),
            )


def _atomic_dir(path, overwrite):
    with atomic_dir(path, overwrite=overwrite) as d:
        for i in range(5):
            (d / f"utt-{i}.html").write_text("<p>tram depot</p>\n" * 200)
            with atomic_write(d / f"utt-{i}.csv") as f:
                f.write("a,b\n" * 300)


def _text(path, overwrite):
    with atomic_write(path, overwrite=overwrite) as f:
        for i in range(500):
            f.write(f"line {i} tram depot\n")


def _binary(path, overwrite):
    with atomic_write(path, overwrite=overwrite, mode="wb") as f:
        for _ in range(200):
            f.write(bytes(range(256)))


def _small_bundle(path: Path, n: int, seed: int) -> Path:
    rng = np.random.default_rng(seed)
    with BundleWriter(
        path, vocab=VOCAB, frame_shift_s=0.04, word_boundary=SEP, decoder={"lookahead": 2}
    ) as w:
        for i, ref in enumerate((["tram car", "car to bar", "act", "cab to mart"] * n)[:n]):
            toks = [VOCAB.index(c) for c in ref.replace(" ", "|")]
            w.add(f"d-{i:02d}", peaky(rng, toks, 40, len(VOCAB)), ref=ref)
    return path


@pytest.fixture(scope="module")
def align_run(tmp_path_factory):
    """What the table and alignment writers write: an align run and a look-ahead sweep."""
    bundle = open_bundle(_small_bundle(tmp_path_factory.mktemp("align") / "b", 20, 9))
    return SimpleNamespace(run=align_bundle(bundle), sweep=sweep(bundle, max_lookahead=8))


@dataclass(frozen=True)
class Writer:
    name: str
    write: Callable  # (path, overwrite, align_run fixture) -> None
    folder: bool = False  # writes a folder rather than a file
    extra: tuple[str, ...] = ()  # sibling outputs written together (suffixes)

    def __call__(self, path: Path, overwrite: bool, run=None) -> None:
        self.write(path, overwrite, run)


WRITERS = [
    Writer("atomic_write text", lambda p, o, r: _text(p, o)),
    Writer("atomic_write binary", lambda p, o, r: _binary(p, o)),
    Writer("atomic_dir", lambda p, o, r: _atomic_dir(p, o), folder=True),
    Writer("BundleWriter", lambda p, o, r: _bundle(p, o), folder=True),
    Writer("CTM", lambda p, o, r: write_ctm(p, CTM_ROWS, overwrite=o)),
    Writer("TextGrid", lambda p, o, r: write_textgrid(p, TIERS, xmax=7.0, overwrite=o)),
    Writer("align JSON lines", lambda p, o, r: write_outputs(r.run, json_path=p, overwrite=o)),
    Writer("sweep CSV", lambda p, o, r: r.sweep.write_csv(p, overwrite=o)),
    Writer(
        "Kaldi ark + scp",
        lambda p, o, r: write_kaldi_matrices(p, _mats(), scp=p.with_suffix(".scp"), overwrite=o),
        extra=(".scp",),
    ),
    Writer(
        "WAV",
        lambda p, o, r: write_wav(p, np.sin(np.arange(16000) / 9.0) * 0.3, 16000, overwrite=o),
    ),
]
IDS = [w.name for w in WRITERS]


# -- helpers --------------------------------------------------------------------------


def snapshot(folder: Path) -> dict[str, bytes | None]:
    """Every entry under ``folder`` (hidden ones included) with its bytes; the folder's
    own path (which an scp file holds) is replaced by ``<dir>``."""
    out = {}
    here = os.fsencode(str(folder))
    for p in sorted(folder.rglob("*")):
        data = p.read_bytes().replace(here, b"<dir>") if p.is_file() else None
        out[str(p.relative_to(folder))] = data
    return out


def targets(writer: Writer, path: Path) -> list[Path]:
    return [path] + [path.with_suffix(s) for s in writer.extra]


def plant_old(writer: Writer, path: Path) -> None:
    """A user's existing output at every target."""
    for t in targets(writer, path):
        if writer.folder:
            t.mkdir()
            (t / "notes.txt").write_text("the user's own notes\n")
        else:
            t.write_bytes(b"the user's own file\n")


@pytest.fixture
def out(tmp_path) -> Path:
    d = tmp_path / "out"
    d.mkdir()
    return d


def _name(writer: Writer) -> str:
    return "result" if writer.folder else "result.out"


# -- overwrite ------------------------------------------------------------------------


@pytest.mark.parametrize("writer", WRITERS, ids=IDS)
def test_refuses_to_overwrite(writer, out, align_run):
    path = out / _name(writer)
    plant_old(writer, path)
    before = snapshot(out)
    with pytest.raises(ParameterError, match=r"overwrite=True|--overwrite"):
        writer(path, False, align_run)
    assert snapshot(out) == before  # untouched, no temporary left


@pytest.mark.parametrize("writer", WRITERS, ids=IDS)
def test_overwrite_when_asked_gives_the_fresh_bytes(writer, out, tmp_path, align_run):
    fresh = tmp_path / "fresh"
    fresh.mkdir()
    writer(fresh / _name(writer), False, align_run)
    path = out / _name(writer)
    plant_old(writer, path)
    writer(path, True, align_run)
    # reference: the same writer on an empty folder; nothing of the old output remains
    assert snapshot(out) == snapshot(fresh)


# -- temporary file + rename ----------------------------------------------------------


@pytest.mark.parametrize("writer", WRITERS, ids=IDS)
def test_output_appears_only_by_rename(writer, out, monkeypatch, align_run):
    path = out / _name(writer)
    real_replace = os.replace
    renames = []

    def spy(src, dst):
        src, dst = Path(src), Path(dst)
        if dst in targets(writer, path):
            # until this rename the target does not exist: nothing wrote to it directly
            assert not dst.exists(), dst
            renames.append((src, dst))
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", spy)
    writer(path, False, align_run)
    assert sorted(d for _, d in renames) == sorted(targets(writer, path))
    for src, dst in renames:
        assert src.parent == dst.parent and src.name.startswith(f".{dst.name}.")
    assert not [p for p in out.iterdir() if p.name.startswith(".")]


@pytest.mark.parametrize("writer", WRITERS, ids=IDS)
def test_output_permissions_follow_the_umask(writer, out, align_run):
    # reference: what a plain open() / mkdir() gives in the same folder (POSIX applies
    # the process umask to mode 0666 / 0777); tempfile's private 0600 / 0700 must not
    # leak into the user's output
    plain_file, plain_dir = out / "plain.txt", out / "plain"
    plain_file.write_text("x")
    plain_dir.mkdir()
    path = out / _name(writer)
    writer(path, False, align_run)
    for t in targets(writer, path):
        ref = plain_dir if writer.folder else plain_file
        assert oct(t.stat().st_mode) == oct(ref.stat().st_mode), t


# -- full disk ------------------------------------------------------------------------


class _FullFile:
    """A file object whose writes fail with ENOSPC once ``budget`` bytes are used."""

    def __init__(self, f, budget: list[int]) -> None:
        self._f, self._budget = f, budget

    def write(self, data):
        n = len(data)
        if n > self._budget[0]:
            fit = self._budget[0]
            if fit > 0:
                self._f.write(data[:fit])  # a real disk takes what fits, then fails
            self._budget[0] = 0
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        self._budget[0] -= n
        return self._f.write(data)

    def __getattr__(self, name):
        return getattr(self._f, name)

    def __iter__(self):
        return iter(self._f)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return self._f.__exit__(*exc)


def make_disk_full(monkeypatch, budget: int) -> None:
    left = [budget]
    real_open = builtins.open

    def opener(file, mode="r", *a, **k):
        f = real_open(file, mode, *a, **k)
        return _FullFile(f, left) if any(c in mode for c in "wax+") else f

    # os.fdopen (atomic_write) calls io.open, so these two cover every writer
    monkeypatch.setattr(builtins, "open", opener)
    monkeypatch.setattr(io, "open", opener)


def output_size(writer, tmp_path, align_run) -> int:
    d = tmp_path / "measure"
    d.mkdir()
    writer(d / _name(writer), False, align_run)
    return sum(p.stat().st_size for p in d.rglob("*") if p.is_file())


@pytest.mark.parametrize("overwrite", [False, True], ids=["new", "over-old"])
@pytest.mark.parametrize("fraction", [0.0, 0.5, 0.97])
@pytest.mark.parametrize("writer", WRITERS, ids=IDS)
def test_full_disk_leaves_nothing_half_written(
    writer, fraction, overwrite, out, tmp_path, monkeypatch, align_run
):
    budget = int(fraction * output_size(writer, tmp_path, align_run))
    path = out / _name(writer)
    if overwrite:
        plant_old(writer, path)
    before = snapshot(out)
    make_disk_full(monkeypatch, budget)
    with pytest.raises(ParameterError, match="No space left on device") as info:
        writer(path, overwrite, align_run)
    monkeypatch.undo()
    msg = str(info.value)
    assert "nothing was written" in msg and "check free space" in msg, msg
    # the old output (or no output) is exactly as before, and no temporary is left
    assert snapshot(out) == before


# -- read-only folder -----------------------------------------------------------------


def make_read_only(folder: Path, monkeypatch) -> str:
    """Make ``folder`` refuse new entries; returns the technique used."""
    if os.geteuid() != 0:
        folder.chmod(0o555)  # the caller restores 0o755
        return "chmod"
    denied = str(folder.resolve())

    def inside(p) -> bool:
        return os.path.abspath(os.fspath(p)).startswith(denied + os.sep)

    def refuse(p):
        raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), os.fspath(p))

    real = {n: getattr(os, n) for n in ("open", "mkdir", "replace", "rename")}
    real_open = builtins.open

    def os_open(p, flags, *a, **k):
        if inside(p) and flags & (os.O_WRONLY | os.O_RDWR | os.O_CREAT):
            refuse(p)
        return real["open"](p, flags, *a, **k)

    def os_mkdir(p, *a, **k):
        if inside(p):
            refuse(p)
        return real["mkdir"](p, *a, **k)

    def os_move(name):
        def move(src, dst, *a, **k):
            if inside(src) or inside(dst):
                refuse(dst)
            return real[name](src, dst, *a, **k)

        return move

    def opener(file, mode="r", *a, **k):
        if (
            isinstance(file, (str, os.PathLike))
            and inside(file)
            and any(c in mode for c in "wax+")
        ):
            refuse(file)
        return real_open(file, mode, *a, **k)

    monkeypatch.setattr(os, "open", os_open)
    monkeypatch.setattr(os, "mkdir", os_mkdir)
    monkeypatch.setattr(os, "replace", os_move("replace"))
    monkeypatch.setattr(os, "rename", os_move("rename"))
    monkeypatch.setattr(builtins, "open", opener)
    monkeypatch.setattr(io, "open", opener)
    return "EACCES from the system calls (running as root)"


@pytest.mark.parametrize("writer", WRITERS, ids=IDS)
def test_read_only_folder_gives_a_clear_error(writer, out, monkeypatch, align_run):
    path = out / _name(writer)
    before = snapshot(out)
    make_read_only(out, monkeypatch)
    try:
        with pytest.raises(ParameterError, match="Permission denied") as info:
            writer(path, False, align_run)
    finally:
        monkeypatch.undo()
        out.chmod(0o755)
    msg = str(info.value)
    assert str(out) in msg and "permissions" in msg, msg
    assert snapshot(out) == before


@pytest.mark.parametrize("writer", WRITERS, ids=IDS)
def test_parent_that_is_a_file(writer, out, align_run):
    blocker = out / "not-a-folder"
    blocker.write_text("x")
    before = snapshot(out)
    with pytest.raises(ParameterError, match=r"not-a-folder") as info:
        writer(blocker / _name(writer), False, align_run)
    assert "expected" in str(info.value)
    assert snapshot(out) == before


@pytest.mark.parametrize("writer", WRITERS, ids=IDS)
def test_failed_rename_keeps_the_old_output(writer, out, monkeypatch, align_run):
    path = out / _name(writer)
    plant_old(writer, path)
    before = snapshot(out)
    real_replace = os.replace
    refused = []

    def refuse_final(src, dst):
        # the first move of a finished temporary onto a target fails (moving things
        # back afterwards still works, as it would on a real disk)
        if Path(dst) in targets(writer, path) and Path(src).name.endswith(".tmp"):
            if not refused:
                refused.append(dst)
                raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), os.fspath(dst))
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", refuse_final)
    with pytest.raises(ParameterError, match="Permission denied"):
        writer(path, True, align_run)
    monkeypatch.undo()
    assert refused and snapshot(out) == before


def test_command_line_reports_a_read_only_output(tmp_path, monkeypatch, capsys, align_run):
    src = tmp_path / "b"
    with BundleWriter(src, vocab=VOCAB, frame_shift_s=0.04, word_boundary=SEP) as w:
        w.add("d-0", peaky(np.random.default_rng(1), [7, 6, 2, 8], 20, 9), ref="tram")
    ro = tmp_path / "ro"
    ro.mkdir()
    make_read_only(ro, monkeypatch)
    try:
        rc = main(["align", str(src), "--json", str(ro / "a.jsonl")])
    finally:
        monkeypatch.undo()
        ro.chmod(0o755)
    out, err = capsys.readouterr()
    assert rc == 2
    assert "Permission denied" in err and "Traceback" not in err
    assert list(ro.iterdir()) == []


def test_kaldi_scp_never_points_into_a_new_ark_it_does_not_describe(out, monkeypatch):
    # an scp holds byte offsets into its ark; if the ark is replaced but writing the
    # scp fails, the old scp would index the new ark at wrong offsets
    ark, scp = out / "post.ark", out / "post.scp"
    old = {"old": np.eye(3, dtype=np.float32)}
    write_kaldi_matrices(ark, old, scp=scp)
    new = _mats()
    write_kaldi_matrices(out / "measure.ark", new)
    ark_size = (out / "measure.ark").stat().st_size
    (out / "measure.ark").unlink()
    make_disk_full(monkeypatch, ark_size + 10)  # the ark fits, the scp does not
    with pytest.raises(ParameterError, match="No space left"):
        write_kaldi_matrices(ark, new, scp=scp, overwrite=True)
    monkeypatch.undo()
    # reference: kaldiio's own reading of the pair agrees with what was there before
    got = dict(read_kaldi_matrices(f"scp:{scp}"))
    assert list(got) == ["old"] and np.array_equal(got["old"], old["old"])


# -- byte-identical outputs -----------------------------------------------------------


def test_bundle_writer_output_does_not_depend_on_the_clock(tmp_path, monkeypatch):
    import time

    _bundle(tmp_path / "a", False)
    real = time.time
    monkeypatch.setattr(time, "time", lambda: real() + 86400 * 400)  # a year later
    _bundle(tmp_path / "b", False)
    monkeypatch.undo()
    assert snapshot(tmp_path / "a") == snapshot(tmp_path / "b")


def test_command_outputs_are_byte_identical_across_processes(tmp_path):
    src = _small_bundle(tmp_path / "b", 4, 11)
    runs = []
    for seed in ("1", "2"):  # different hash seeds: no set/dict-order leaks into files
        d = tmp_path / f"run{seed}"
        d.mkdir()
        env = dict(os.environ, PYTHONHASHSEED=seed)
        for args in (
            ["align", "--json", d / "a.jsonl", "--ctm", d / "a.ctm", "--textgrid", d / "tg"],
            ["sweep", "--max-lookahead", "6", "--csv", d / "sweep.csv"],
        ):
            cmd = [sys.executable, "-m", "peekalign", args[0], str(src)] + [
                str(a) for a in args[1:]
            ]
            proc = subprocess.run(cmd, capture_output=True, text=True, env=env, timeout=300)
            assert proc.returncode == 0, proc.stderr
        runs.append(snapshot(d))
    assert runs[0] == runs[1]
    # json, ctm, csv, the TextGrid folder and its 4 files
    assert len(runs[0]) == 3 + 1 + 4
    lines = [json.loads(x) for x in runs[0]["a.jsonl"].decode().splitlines()]
    assert [x["id"] for x in lines] == ["d-00", "d-01", "d-02", "d-03"]
    assert runs[0]["sweep.csv"].startswith(b"lookahead_frames,latency_ms,reach,kept_attention\n")
    assert runs[0]["sweep.csv"].count(b"\n") == 1 + 7  # header and look-aheads 0..6
