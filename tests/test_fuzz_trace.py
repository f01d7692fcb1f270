"""Damaged and hostile trace files: every one loads with a warning or fails with a pipeprobe error.

The rule under test (README, 'Reliability'): bad input gives a warning or a
:class:`~pipeprobe.errors.PipeprobeError` whose message names the damaged
file; never another exception, a hang, or memory taken on the word of a
header; nothing in a run folder is unpickled or evaluated, and nothing
outside it is read. Fuzzing with Hypothesis (property-based testing, common
practice); seeds are fixed by ``derandomize=True``.
"""

from __future__ import annotations

import builtins
import io
import json
import os
import re
import shutil
import struct
import tracemalloc
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import pipeprobe
from pipeprobe import tracefile as tf
from pipeprobe.errors import PipeprobeError, TraceFormatError

try:
    from pipeprobe.analysis import analyze
except ImportError:  # the analysis layer is optional for these tests
    analyze = None

FUZZ = settings(max_examples=60, derandomize=True, deadline=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])


def _record_base(root: Path) -> Path:
    """A small real run: 4 batches of 2 samples decoded in a thread, steps in the main thread."""
    import threading
    import time

    ready: list[list[int]] = []
    cond = threading.Condition()

    def producer() -> None:
        for b in range(4):
            ids = []
            for s in range(2):
                with pipeprobe.stage("decode", sample=2 * b + s):
                    time.sleep(0.001)
                ids.append(2 * b + s)
            with cond:
                ready.append(ids)
                cond.notify()

    def batches():
        for _ in range(4):
            with cond:
                cond.wait_for(lambda: ready)
                yield ready.pop(0)

    with pipeprobe.Probe(root, report=False, sample_interval_s=0.01, flush_interval_s=0.05) as probe:
        threading.Thread(target=producer).start()
        for _batch in probe.watch(batches(), samples=lambda ids: ids):
            with probe.step():
                time.sleep(0.003)
    return root


@pytest.fixture(scope="module")
def base_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return _record_base(tmp_path_factory.mktemp("fuzz") / "base")


@pytest.fixture
def work(tmp_path: Path, base_run: Path):
    """Return a function giving a fresh copy of the base run to damage."""
    count = [0]

    def fresh() -> Path:
        count[0] += 1
        dst = tmp_path / f"w{count[0]}"
        shutil.copytree(base_run, dst)
        return dst

    return fresh


def file_named(root: Path, prefix: str, suffix: str) -> Path:
    [path] = [p for p in root.iterdir() if p.name.startswith(prefix) and p.name.endswith(suffix)]
    return path


def load_checked(root: Path) -> tuple[pipeprobe.Run | None, str, list[str]]:
    """Load (and analyse) ``root``; fail the test on anything but warnings or a pipeprobe error naming a file.

    Returns the run (None on error), the error message and pipeprobe's warnings.
    """
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        try:
            run = pipeprobe.load(root)
            if analyze is not None:
                analyze(run)
            error = ""
        except PipeprobeError as exc:
            run, error = None, str(exc)
    ours = [str(w.message) for w in seen if issubclass(w.category, UserWarning)]
    if error:
        assert str(root) in error, error  # names the file (or the folder)
        assert "\n" not in error
    for message in ours:
        assert str(root) in message, message
    return run, error, ours


def _load_traced(root: Path) -> tuple[tuple[pipeprobe.Run | None, str, list[str]], int]:
    """:func:`load_checked` under tracemalloc: its result and the peak bytes Python allocated meanwhile."""
    tracemalloc.start()
    try:
        result = load_checked(root)
        return result, tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


class TestTruncation:
    @pytest.mark.parametrize("content", [tf.CONTENT_SPANS, tf.CONTENT_RESOURCES])
    def test_binary_files_at_every_offset(self, base_run: Path, tmp_path: Path, content: int) -> None:
        """A .bin file cut at any byte reads as its whole records, with a warning when a record was cut."""
        name = "spans-" if content == tf.CONTENT_SPANS else "res-"
        data = file_named(base_run, name, ".bin").read_bytes()
        size = tf.SPAN_RECORD.itemsize if content == tf.CONTENT_SPANS else tf.RESOURCE_RECORD.itemsize
        full = tf.read_records(file_named(base_run, name, ".bin"), content)
        path = tmp_path / "cut.bin"
        for cut in range(len(data) + 1):
            path.write_bytes(data[:cut])
            with warnings.catch_warnings(record=True) as seen:
                warnings.simplefilter("always")
                try:
                    recs = tf.read_records(path, content)
                except TraceFormatError as exc:
                    assert 0 < cut < 16, cut  # only a cut preamble is an error
                    assert str(path) in str(exc)
                    continue
            whole = max(0, (cut - 16) // size)
            assert full[:whole].tobytes() == recs.tobytes()
            cut_record = cut > 16 and (cut - 16) % size != 0
            assert cut_record == any("truncated final record" in str(w.message) for w in seen)

    @pytest.mark.parametrize("prefix", ["run-", "spans-"])
    def test_json_headers_at_every_offset(self, base_run: Path, tmp_path: Path, prefix: str) -> None:
        """A header cut at any byte is a TraceFormatError naming it (JSON cannot be half-read)."""
        data = file_named(base_run, prefix, ".json").read_bytes()
        path = tmp_path / "cut.json"
        for cut in range(len(data)):
            path.write_bytes(data[:cut])
            with pytest.raises(TraceFormatError, match=re.escape(str(path))):
                tf.read_json(path)

    @FUZZ
    @given(data=st.data())
    def test_whole_run_with_one_file_cut(self, work, data: st.DataObject) -> None:
        """A run with any one file cut short loads with warnings, or fails with an error naming the file."""
        root = work()
        path = data.draw(st.sampled_from(sorted(root.iterdir())))
        size = path.stat().st_size
        cut = data.draw(st.integers(0, size))
        path.write_bytes(path.read_bytes()[:cut])
        run, error, ours = load_checked(root)
        if path.name.startswith("run-") and cut < size:
            assert run is None  # without its whole run header there is no run
        elif path.name.startswith("spans-") and path.suffix == ".bin" and cut > 16 and (cut - 16) % 48:
            assert any("truncated final record" in m for m in ours)

    def test_span_file_cut_at_record_edges(self, work) -> None:
        """Cutting the span file one byte short of, at, and past each record keeps the whole records before it."""
        base = work()
        whole = pipeprobe.load(base)
        path = file_named(base, "spans-", ".bin")
        n = (path.stat().st_size - 16) // 48
        for k in range(0, n + 1, 3):
            for delta in (-1, 0, 1):
                cut = 16 + 48 * k + delta
                if not 16 <= cut <= path.stat().st_size:
                    continue
                root = work()
                file_named(root, "spans-", ".bin").write_bytes(path.read_bytes()[:cut])
                run, error, ours = load_checked(root)
                assert "" == error
                assert len(run.spans) + len(run.samples) <= len(whole.spans) + len(whole.samples)


class TestFlippedBits:
    @FUZZ
    @given(data=st.data())
    def test_flipped_bits_anywhere(self, work, data: st.DataObject) -> None:
        """Flipping 1 to 8 bits in any file never escapes as a non-pipeprobe error."""
        root = work()
        path = data.draw(st.sampled_from(sorted(root.iterdir())))
        raw = bytearray(path.read_bytes())
        for bit in data.draw(st.lists(st.integers(0, 8 * len(raw) - 1), min_size=1, max_size=8)):
            raw[bit // 8] ^= 1 << (bit % 8)
        path.write_bytes(bytes(raw))
        load_checked(root)

    @FUZZ
    @given(data=st.data())
    def test_random_record_fields(self, work, data: st.DataObject) -> None:
        """Records with arbitrary field values (times, ids, stage, kind, flags) load or warn, never crash."""
        root = work()
        path = file_named(root, "spans-", ".bin")
        recs = tf.read_records(path, tf.CONTENT_SPANS)
        i = data.draw(st.integers(0, len(recs) - 1))
        field = data.draw(st.sampled_from(list(tf.SPAN_RECORD.names)))
        info = np.iinfo(tf.SPAN_RECORD[field])
        recs[field][i] = data.draw(st.integers(int(info.min), int(info.max)))
        path.write_bytes(tf.preamble(tf.CONTENT_SPANS) + recs.tobytes())
        run, error, ours = load_checked(root)
        assert "" == error  # record contents alone never make a run unreadable


class TestVersionsAndPreambles:
    @pytest.mark.parametrize("version", [0, 2, 65535])
    def test_binary_version_other_than_ours(self, work, version: int) -> None:
        """A span file of another format version is skipped with a warning that names it and says what to do."""
        root = work()
        path = file_named(root, "spans-", ".bin")
        raw = bytearray(path.read_bytes())
        raw[6:8] = struct.pack("<H", version)
        path.write_bytes(bytes(raw))
        run, error, ours = load_checked(root)
        assert [m for m in ours if str(path) in m and f"version {version}" in m and "upgrade" in m]

    @pytest.mark.parametrize("version", [2, "1", None, 1.0000001])
    def test_run_header_version_other_than_ours(self, work, version) -> None:
        """A run header of another (or no) format version is an error naming the file."""
        root = work()
        path = file_named(root, "run-", ".json")
        h = json.loads(path.read_text())
        h["format_version"] = version
        path.write_text(json.dumps(h))
        run, error, ours = load_checked(root)
        assert str(path) in error and "version" in error

    @FUZZ
    @given(head=st.binary(min_size=0, max_size=40))
    def test_bogus_preamble(self, work, head: bytes) -> None:
        """Any bytes in place of a span file's preamble: skipped with a warning, or read when they are a valid one."""
        root = work()
        path = file_named(root, "spans-", ".bin")
        path.write_bytes(head + path.read_bytes()[16:])
        run, error, ours = load_checked(root)
        assert "" == error

    def test_preamble_claims_other_record_size(self, work) -> None:
        """A preamble claiming 65535-byte records is refused, not used to size a read."""
        root = work()
        path = file_named(root, "spans-", ".bin")
        raw = bytearray(path.read_bytes())
        raw[8:10] = struct.pack("<H", 65535)
        path.write_bytes(bytes(raw))
        run, error, ours = load_checked(root)
        assert [m for m in ours if "65535-byte records" in m]


def _edit_header(root: Path, prefix: str, **fields) -> Path:
    path = file_named(root, prefix, ".json")
    h = json.loads(path.read_text())
    h.update(fields)
    path.write_text(json.dumps(h))
    return path


JSON_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=20),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=5), inner, max_size=4),
    max_leaves=10,
)


class TestLyingHeaders:
    @FUZZ
    @given(data=st.data())
    def test_any_value_in_any_header_field(self, work, data: st.DataObject) -> None:
        """Any JSON value in any header field loads, warns, or fails with an error naming the header."""
        root = work()
        prefix = data.draw(st.sampled_from(["run-", "spans-"]))
        path = file_named(root, prefix, ".json")
        h = json.loads(path.read_text())
        key = data.draw(st.sampled_from(sorted(h)))
        h[key] = data.draw(JSON_VALUES)
        path.write_text(json.dumps(h))
        load_checked(root)

    @pytest.mark.parametrize(
        "fields",
        [
            {"cores": 10**12},
            {"batches": 10**12},
            {"anchor_mono_ns": 10**30},
            {"end_mono_ns": 2**62},
            {"end_mono_ns": -(10**12)},
        ],
        ids=["cores", "batches", "anchor", "end-far-future", "end-negative"],
    )
    def test_huge_numbers_cost_no_memory(self, work, fields: dict) -> None:
        """A run header claiming 10^12 of something is refused or ignored without allocating for it."""
        root = work()
        path = _edit_header(root, "run-", **fields)
        (run, error, ours), peak = _load_traced(root)
        assert peak < 50 * 2**20
        assert error or [m for m in ours if str(path) in m]
        if run is not None:
            assert run.wall_s < 3600

    def test_huge_stage_table_is_refused(self, work) -> None:
        """A process header listing more stages than a record can name is skipped with a warning."""
        root = work()
        path = _edit_header(root, "spans-", stages=["wait", "step"] + [f"s{i}" for i in range(70000)])
        run, error, ours = load_checked(root)
        assert "" == error
        assert [m for m in ours if str(path) in m and "'stages'" in m]
        assert 0 == len(run.spans)

    def test_names_cannot_point_outside_the_run(self, work, monkeypatch: pytest.MonkeyPatch) -> None:
        """Names like '../../x' in headers are labels only: loading opens nothing outside the run folder."""
        root = work()
        _edit_header(root, "run-", run_id="../../x", host="../../x", stages=["../../x"])
        _edit_header(root, "spans-", stages=["wait", "step", "../../../etc/passwd"], role="../x", run_id="../../x")
        opened: list[str] = []
        real_open = io.open

        def spy(file, *args, **kwargs):
            opened.append(os.path.realpath(file) if isinstance(file, (str, os.PathLike)) else str(file))
            return real_open(file, *args, **kwargs)

        monkeypatch.setattr(builtins, "open", spy)
        monkeypatch.setattr(io, "open", spy)
        run, error, ours = load_checked(root)
        monkeypatch.undo()
        inside = os.path.realpath(root) + os.sep
        assert opened and all(p.startswith(inside) for p in opened), opened
        assert "" == error
        assert "../../../etc/passwd" in set(run.spans["stage"].astype(str))  # kept as a label

    @pytest.mark.parametrize("kind", ["symlink-out", "symlink-zero", "fifo"])
    def test_links_and_pipes_are_not_followed(self, work, tmp_path: Path, kind: str) -> None:
        """A span file that is a link out of the folder, a link to an endless device, or a pipe is refused at once."""
        root = work()
        path = file_named(root, "spans-", ".bin")
        path.unlink()
        if kind == "symlink-out":
            outside = tmp_path / "outside.bin"
            outside.write_bytes(tf.preamble(tf.CONTENT_SPANS))
            path.symlink_to(outside)
        elif kind == "symlink-zero":
            path.symlink_to("/dev/zero")
        else:
            os.mkfifo(path)  # opening it for reading would block forever
        run, error, ours = load_checked(root)
        assert [m for m in ours if str(path) in m and "not a regular file" in m]

    def test_fifo_run_header_is_an_error_not_a_hang(self, work) -> None:
        """A run header that is a pipe fails with an error instead of blocking."""
        root = work()
        path = file_named(root, "run-", ".json")
        path.unlink()
        os.mkfifo(path)
        run, error, ours = load_checked(root)
        assert str(path) in error and "not a regular file" in error

    @pytest.mark.parametrize("payload", ["[" * 100000 + "]" * 100000, '{"n": ' + "9" * 5000 + "}"],
                             ids=["deep-nesting", "huge-int"])
    def test_json_bombs(self, work, payload: str) -> None:
        """Deeply nested or over-long JSON is an error naming the header, not a RecursionError or ValueError."""
        root = work()
        path = file_named(root, "run-", ".json")
        path.write_text(payload)
        run, error, ours = load_checked(root)
        assert str(path) in error


class TestTimesAndIds:
    def _set(self, root: Path, field: str, index: int, value: int) -> Path:
        path = file_named(root, "spans-", ".bin")
        recs = tf.read_records(path, tf.CONTENT_SPANS)
        recs[field][index] = value
        path.write_bytes(tf.preamble(tf.CONTENT_SPANS) + recs.tobytes())
        return path

    def test_reversed_span_dropped_with_warning(self, work) -> None:
        """A span ending before it starts is dropped, and the warning says how many."""
        root = work()
        recs = tf.read_records(file_named(root, "spans-", ".bin"), tf.CONTENT_SPANS)
        path = self._set(root, "end_ns", 0, int(recs["start_ns"][0]) - 10)
        run, error, ours = load_checked(root)
        assert [m for m in ours if str(path) in m and "1 spans end before they start" in m]

    @pytest.mark.parametrize("field,value", [("start_ns", -5), ("start_ns", 0), ("end_ns", 2**62)])
    def test_times_outside_the_run_dropped(self, work, field: str, value: int) -> None:
        """Negative times, or an end a century away, are dropped with a warning instead of stretching the run."""
        root = work()
        whole = pipeprobe.load(root)
        path = self._set(root, field, 0, value)
        run, error, ours = load_checked(root)
        assert [m for m in ours if str(path) in m and "outside the run" in m]
        assert run.wall_s <= whole.wall_s + 1e-9
        assert run.spans["start_s"].min() >= 0

    def test_unknown_stage_id_dropped(self, work) -> None:
        """A record naming a stage the process header does not list is dropped with a warning."""
        root = work()
        path = self._set(root, "stage", 0, 999)
        run, error, ours = load_checked(root)
        assert [m for m in ours if str(path) in m and "unknown stages" in m]

    def test_copied_process_file_counted_once(self, work) -> None:
        """A span file duplicated under another pid is reported and its spans counted once."""
        root = work()
        whole = pipeprobe.load(root)
        for suffix in (".bin", ".json"):
            src = file_named(root, "spans-", suffix)
            shutil.copy(src, root / f"spans-r0-p999999{suffix}")
        run, error, ours = load_checked(root)
        assert [m for m in ours if "same records" in m]
        assert len(whole.spans) == len(run.spans)

    def test_name_with_leading_zero_is_ignored(self, work) -> None:
        """'spans-r0-p0123.bin' (the same pid spelt twice) is not read, and the warning names it."""
        root = work()
        whole = pipeprobe.load(root)
        src = file_named(root, "spans-", ".bin")
        pid = re.search(r"-p(\d+)\.bin", src.name).group(1)
        dup = root / f"spans-r0-p0{pid}.bin"
        shutil.copy(src, dup)
        run, error, ours = load_checked(root)
        assert [m for m in ours if str(dup) in m]
        assert len(whole.spans) == len(run.spans)


class TestNoCodeRuns:
    def test_crafted_run_cannot_run_code(self, work, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
        """Loading a run full of pickle and Python payloads evaluates none of them (pickle/eval/exec are disabled)."""
        import marshal
        import pickle

        marker = tmp_path / "pwned"
        root = work()
        evil = f"__import__('os').system('touch {marker}')"
        _edit_header(root, "run-", host=evil, run_id=pickle.dumps(evil).hex(), stages=[evil])
        _edit_header(root, "spans-", stages=["wait", "step", evil], role=evil)
        (root / "res-r0.bin").write_bytes(tf.preamble(tf.CONTENT_RESOURCES) + pickle.dumps(os.system)[:40])

        def refuse(*args, **kwargs):
            raise AssertionError("code execution on the load path")

        for mod, name in [(pickle, "loads"), (pickle, "load"), (pickle, "Unpickler"), (marshal, "loads"),
                          (builtins, "eval"), (builtins, "exec"), (builtins, "compile")]:
            monkeypatch.setattr(mod, name, refuse)
        run, error, ours = load_checked(root)
        monkeypatch.undo()
        assert not marker.exists()
        assert "" == error

    def test_load_path_source_has_no_eval_or_unpickling(self) -> None:
        """The modules that read run folders contain no pickle, marshal, eval, exec or allow_pickle."""
        pkg = Path(pipeprobe.__file__).parent
        banned = re.compile(r"\b(pickle|marshal|eval\(|exec\(|allow_pickle|__import__|yaml\.load)")
        for name in ["tracefile.py", "_runfolder.py", "load.py", "timeline.py", "analysis.py", "report.py"]:
            path = pkg / name
            if path.exists():
                assert [] == banned.findall(path.read_text()), name


class TestHostileFolders:
    """Issue 14: header numbers, unencodable names, links, sparse files, bloated headers, future file times."""

    @pytest.mark.parametrize("fields", [{"world_size": 10**12}, {"world_size": 0}, {"world_size": "8"}],
                             ids=["10^12", "zero", "text"])
    def test_world_size_out_of_range_is_a_clear_error(self, work, fields: dict) -> None:
        """A run header's world size beyond what rank file names can hold (10^6) is one error naming it."""
        root = work()
        path = _edit_header(root, "run-", **fields)
        (run, error, ours), peak = _load_traced(root)
        assert peak < 50 * 2**20
        assert str(path) in error and "'world_size'" in error and "1 to 1000000" in error

    def test_lone_surrogate_in_names_is_escaped_on_read(self, work, tmp_path: Path, capsys) -> None:
        """Stage and host names with a lone surrogate load escaped, so report, --json, --html, whatif and
        compare all print UTF-8 (a strict UTF-8 encode is the check, as a terminal or file would do)."""
        from pipeprobe.cli import EXIT_OK, main

        root = work()
        path = file_named(root, "spans-", ".json")
        h = json.loads(path.read_text())
        h["stages"] = [("dec\ud800ode" if s == "decode" else s) for s in h["stages"]]
        path.write_text(json.dumps(h))  # JSON carries the surrogate as the escape \ud800
        _edit_header(root, "run-", host="box\udfff")
        run = pipeprobe.load(root)
        assert "dec\\ud800ode" in set(run.spans["stage"].astype(str))
        assert "box\\udfff" == run.header["host"]
        html = tmp_path / "r.html"
        for argv in (["report", str(root)], ["report", str(root), "--json", "--html", str(html)],
                     ["whatif", str(root), "--workers", "2"], ["compare", str(root), str(root)]):
            assert EXIT_OK == main(argv)
            captured = capsys.readouterr()
            (captured.out + captured.err).encode("utf-8")
        assert "dec\\ud800ode" in html.read_bytes().decode("utf-8")

    def test_file_name_that_is_not_utf8_is_named_escaped(self, work, capsys) -> None:
        """A file named like a trace file with bytes that are not UTF-8 is named in a warning that prints as UTF-8."""
        from pipeprobe.cli import EXIT_OK, main

        root = work()
        with open(os.path.join(os.fsencode(root), b"spans-r0-p1\xff.bin"), "wb") as fh:
            fh.write(b"x")
        run, error, ours = load_checked(root)
        assert [m for m in ours if "spans-r0-p1\\udcff.bin" in m]
        assert EXIT_OK == main(["report", str(root)])
        captured = capsys.readouterr()
        (captured.out + captured.err).encode("utf-8")

    @pytest.mark.parametrize("target", ["loop", "dangling"])
    @pytest.mark.parametrize("prefix,suffix", [("spans-", ".bin"), ("spans-", ".json"), ("res-", ".bin")])
    def test_link_named_like_a_trace_file_is_skipped_with_one_warning(self, work, target: str, prefix: str,
                                                                       suffix: str) -> None:
        """A symlink loop or a dangling link in place of a trace file: one warning naming it; the rest loads."""
        root = work()
        whole = pipeprobe.load(root)
        path = file_named(root, prefix, suffix)
        path.unlink()
        path.symlink_to(path.name if target == "loop" else root / "gone.bin")
        run, error, ours = load_checked(root)
        assert "" == error
        assert 1 == len([m for m in ours if str(path) in m])
        assert [m for m in ours if str(path) in m and "not a regular file" in m]
        assert (0 if prefix == "spans-" else len(whole.spans)) == len(run.spans)  # the base run has one process

    def test_sparse_terabyte_span_file_is_not_read_whole(self, work) -> None:
        """A span file grown to 1 TB of holes loads its written records, reads none of the holes, and says so."""
        root = work()
        whole = pipeprobe.load(root)
        path = file_named(root, "spans-", ".bin")
        with open(path, "r+b") as fh:
            fh.truncate(2**40)
        (run, error, ours), peak = _load_traced(root)
        assert peak < 50 * 2**20
        assert "" == error
        assert [m for m in ours if str(path) in m and "holes of a sparse file" in m]
        assert len(whole.spans) == len(run.spans)

    def test_span_file_read_in_bounded_pieces(self, work) -> None:
        """Read 5 records at a time, a span file gives the same records as read whole."""
        root = work()
        rf = tf.open_records(file_named(root, "spans-", ".bin"), tf.CONTENT_SPANS)
        pieces = list(rf.chunks(max_records=5))
        assert all(len(p) <= 5 for p in pieces)
        assert tf.read_records(rf.path, tf.CONTENT_SPANS).tobytes() == b"".join(p.tobytes() for p in pieces)

    @pytest.mark.parametrize("prefix", ["run-", "spans-"])
    @pytest.mark.parametrize("filler", ["{}", "[]", "0"])
    def test_header_full_of_values_costs_no_memory(self, work, prefix: str, filler: str) -> None:
        """A 16 MiB header holding millions of empty objects, lists or numbers is refused before parsing."""
        root = work()
        path = file_named(root, prefix, ".json")
        h = json.loads(path.read_text())
        head = json.dumps(h)[:-1]  # the filler brings the file to the same size however long the header is
        body = head + ', "x": [' + ", ".join([filler] * ((tf.MAX_JSON_BYTES - 4096 - len(head)) // 4)) + "]}"
        path.write_text(body)
        (run, error, ours), peak = _load_traced(root)
        # the check reads the text and scans a copy with its strings blanked (a third copy while the regex joins
        # its pieces); 1 MiB over that for the rest of the load; parsing it would take hundreds of MiB
        assert peak < 3 * path.stat().st_size + 2**20
        assert [m for m in [error, *ours] if str(path) in m and "more than a pipeprobe header has" in m]

    def test_future_file_time_does_not_admit_a_fifty_year_span(self, work) -> None:
        """A span ending 50 years on is dropped even when its file's time is set 50 years ahead: a closed run
        is bounded by its own end anchor."""
        root = work()
        whole = pipeprobe.load(root)
        path = file_named(root, "spans-", ".bin")
        recs = tf.read_records(path, tf.CONTENT_SPANS)
        fifty_years_ns = 50 * 365 * 86400 * 10**9
        recs["end_ns"][0] += fifty_years_ns
        path.write_bytes(tf.preamble(tf.CONTENT_SPANS) + recs.tobytes())
        future = (os.stat(path).st_mtime_ns + fifty_years_ns) / 1e9
        os.utime(path, (future, future))
        run, error, ours = load_checked(root)
        assert [m for m in ours if str(path) in m and "outside the run" in m]
        assert run.wall_s <= whole.wall_s + 1e-9
        assert run.spans["dur_s"].max() < 60
