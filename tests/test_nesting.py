"""Stages inside other stages: time given to the innermost stage running, counted once everywhere."""

from __future__ import annotations

import math
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from _synth import member, stage, step, wait, write_run
from hypothesis import given, settings
from hypothesis import strategies as st

import pipeprobe
from pipeprobe.errors import ScenarioError
from pipeprobe.nesting import flatten_spans, own_label, span_pieces
from pipeprobe.timeline import build_timeline
from pipeprobe.whatif import whatif

FETCH_OWN = own_label("fetch")


def _nested_run(path: Path) -> Path:
    """One worker fetches samples 0 and 1 (10 ms each: decode 3 ms, augment 4 ms inside, no ids), collates
    2 ms; the loop waits 22 ms, steps 8 ms. Hand-worked wall 30 ms: fetch's own 6, decode 6, augment 8,
    collate 2, step 8."""
    worker = []
    for k, t in enumerate((0, 10)):
        worker += [stage("fetch", t, t + 10, sample=k, epoch=0), stage("decode", t + 1, t + 4),
                   stage("augment", t + 5, t + 9)]
    worker.append(stage("collate", 20, 22, sample=0, epoch=0))
    main = [wait(0, 22, 0), member(22, 0, 0), member(22, 1, 0), step(22, 30, 0)]
    return write_run(path, {100: main, 200: worker}, end_ms=30)


class TestFlatten:
    def test_pieces_tile_each_thread_once(self):
        """Random properly nested spans: pieces never overlap and cover exactly the union of the spans.

        Checked against a brute-force count on a 0.01 grid (common practice: measure of a union of intervals)."""
        rng = np.random.default_rng(7)
        starts, ends = [], []
        for _ in range(40):  # 40 top-level spans, each with up to 3 children and grandchildren
            a = float(rng.integers(0, 1000)) * 10
            starts.append(a)
            ends.append(a + 9)
            for c in range(3):
                starts += [a + 1 + 3 * c, a + 1.5 + 3 * c]
                ends += [a + 2.5 + 3 * c, a + 2 + 3 * c]
        s, e = np.array(starts), np.array(ends)
        keep = np.ones(len(s), bool)
        top = np.arange(0, len(s), 7)
        dup = pd.Series(s[top]).duplicated().to_numpy()  # drop top-level spans that coincide
        for t in top[dup]:
            keep[t:t + 7] = False
        s, e = s[keep], e[keep]
        f = flatten_spans(s, e, np.zeros(len(s), int))
        assert (f.start[1:] >= f.end[:-1] - 1e-12).all()
        grid = np.arange(0, 10010, 0.01) + 0.005
        covered = np.zeros(len(grid), bool)
        for a, b in zip(s, e, strict=True):
            covered |= (grid > a) & (grid < b)
        assert pytest.approx(covered.sum() * 0.01, abs=0.05) == float((f.end - f.start).sum())

    @given(st.lists(st.tuples(st.integers(0, 40), st.integers(0, 12), st.integers(0, 2)), min_size=1, max_size=30))
    @settings(max_examples=150, deadline=None)
    def test_any_spans_count_once(self, rows):
        """Any spans, nested, crossing or equal, on up to 3 threads: per thread the pieces never overlap and add
        up to the length of the union of its spans (measure of a union of intervals, counted on integer cells)."""
        s = np.array([r[0] for r in rows], float)
        e = s + np.array([r[1] for r in rows], float)
        th = np.array([r[2] for r in rows])
        f = flatten_spans(s, e, th)
        for t in np.unique(th):
            mine = th[f.span] == t
            a, b = f.start[mine], f.end[mine]
            assert bool((a[1:] >= b[:-1]).all())
            cells = set()
            for x, y in zip(s[th == t], e[th == t], strict=True):
                cells.update(range(int(x), int(y)))
            assert len(cells) == float((b - a).sum())

    def test_crossing_spans_count_once(self):
        """A span open across its parent's end (a stage held over a yield): the later start wins, no time twice.

        Hand-worked: A 0-10, B 2-8, C 5-12 -> A 0-2, B 2-5, C 5-12."""
        f = flatten_spans(np.array([0.0, 2.0, 5.0]), np.array([10.0, 8.0, 12.0]), np.zeros(3, int))
        assert [(0, 0.0, 2.0), (1, 2.0, 5.0), (2, 5.0, 12.0)] == [
            (int(a), float(b), float(c)) for a, b, c in zip(f.span, f.start, f.end, strict=True)]

    def test_nested_span_takes_ids_and_cpu_from_around_it(self):
        """A nested span without ids belongs to the enclosing span's sample; CPU is split without double count."""
        sp = pd.DataFrame({"stage": ["fetch", "decode"], "start_s": [0.0, 0.1], "end_s": [1.0, 0.5], "rank": 0,
                           "pid": 1, "tid": 1, "sample_id": [5, -1], "batch_id": [2, -1], "epoch": [0, -1],
                           "cpu_s": [0.9, 0.4]})
        p = span_pieces(sp)
        assert [5, 5, 5] == p["sample_id"].tolist()
        assert [2, 2, 2] == p["batch_id"].tolist()
        assert pytest.approx(0.9) == float(p["cpu_s"].sum())


class TestInPlace:
    @given(st.lists(st.tuples(st.integers(0, 40), st.integers(0, 12), st.integers(0, 2), st.sampled_from(
        ["wait", "fetch", "decode", "step"])), min_size=1, max_size=30), st.integers(0, 2 ** 30))
    @settings(max_examples=100, deadline=None)
    def test_rows_cut_as_the_copy_would(self, rows, seed):
        """span_pieces(spans, rows=r) and pieces_and_inside give the pieces of spans.iloc[r] exactly, and
        thread_codes numbers threads as pandas' groupby(...).ngroup() does (pandas, the reference)."""
        from pipeprobe.nesting import labels_inside, pieces_and_inside, thread_codes

        n = len(rows)
        sp = pd.DataFrame({"stage": pd.Categorical([r[3] for r in rows]), "start_s": [float(r[0]) for r in rows],
                           "end_s": [float(r[0] + r[1]) for r in rows], "rank": 0, "pid": [r[2] % 2 for r in rows],
                           "tid": [r[2] for r in rows], "sample_id": [-1 if r[1] % 3 else r[0] for r in rows],
                           "batch_id": [r[0] // 10 if r[1] % 2 else -1 for r in rows], "cpu_s": [r[1] / 2 for r in rows]})
        keep = np.flatnonzero(np.random.default_rng(seed).random(n) < 0.7)
        copy = sp.iloc[keep].reset_index(drop=True)
        expected = span_pieces(copy)
        got, inside = pieces_and_inside(sp, rows=keep)
        pd.testing.assert_frame_equal(expected, got[list(expected.columns)])
        assert labels_inside(copy) == inside
        for sort in (False, True):
            ref = copy.groupby(["rank", "pid", "tid"], sort=sort).ngroup().to_numpy(np.int64)
            assert ref.tolist() == thread_codes(sp, keep, sort=sort).tolist()


class TestHandWorkedShares:
    def test_critical_path_shares(self, tmp_path):
        """Shares of the hand-worked run: augment 8/30, decode 6/30, fetch's own 6/30, collate 2/30, step 8/30."""
        a = pipeprobe.analyze(_nested_run(tmp_path / "r"))
        sh = a.stage_shares()
        expected = {"augment": 8 / 30, "decode": 6 / 30, FETCH_OWN: 6 / 30, "collate": 2 / 30, "step": 8 / 30}
        assert expected == pytest.approx({k: sh.get(k, 0.0) for k in expected})
        assert pytest.approx(1.0) == sum(sh.values())

    def test_stage_table_inclusive_and_own(self, tmp_path):
        """fetch: 20 ms whole spans, 6 ms of its own, shown on the path under its own-time label."""
        t = pipeprobe.analyze(_nested_run(tmp_path / "r")).stages.table.set_index("stage")
        assert (0.020, 0.006, FETCH_OWN) == (round(t.loc["fetch", "total_s"], 9), round(t.loc["fetch", "own_s"], 9),
                                             t.loc["fetch", "label"])
        assert pytest.approx(0.006) == t.loc["fetch", "critical_s"]
        assert (0.008, 0.008) == (round(t.loc["augment", "total_s"], 9), round(t.loc["augment", "own_s"], 9))

    def test_stall_blame_names_the_nested_stage(self, tmp_path):
        """The 22 ms stall is blamed on augment (8 ms of it on the path), not on the fetch around it."""
        a = pipeprobe.analyze(_nested_run(tmp_path / "r"))
        assert ["augment"] == a.stalls.per_batch["blame"].astype(str).tolist()

    def test_top_action_names_the_nested_stage(self, tmp_path):
        """The leading input stage on the path is augment (8 ms), not the fetch around it."""
        a = pipeprobe.analyze(_nested_run(tmp_path / "r"))
        assert "Make 'augment' cheaper" in a.actions[0].text


class TestWhatIfNested:
    def test_unchanged_replay_counts_nested_time_once(self, tmp_path):
        """Replaying the recorded configuration gives the recorded 30 ms (hand-worked), not fetch plus its insides."""
        assert pytest.approx(0.030, abs=1e-6) == whatif(_nested_run(tmp_path / "r")).predicted_wall_s

    @pytest.mark.parametrize("faster,wall_ms", [({"augment": float("inf")}, 22.0), ({"augment": 2}, 26.0),
                                                ({"fetch": 2}, 20.0), ({FETCH_OWN: float("inf")}, 24.0)])
    def test_faster_nested_and_enclosing(self, tmp_path, faster, wall_ms):
        """Hand-worked: augment free saves 8 ms, 2x saves 4; fetch 2x halves its 20 ms; its own time free saves 6."""
        got = whatif(_nested_run(tmp_path / "r"), faster=faster).predicted_wall_s
        assert pytest.approx(wall_ms / 1e3, abs=1e-6) == got

    @pytest.mark.parametrize("offload,wall_ms", [({"augment": 4}, 24.0), ({"fetch": 4}, 15.0)])
    def test_offload_nested_and_enclosing(self, tmp_path, offload, wall_ms):
        """Hand-worked: offloading augment (4x) leaves a 14 ms loader task and 8 + 8/4 ms on the step side;
        offloading fetch (4x) moves all 20 ms of it, insides included: 2 ms collate, then 8 + 20/4 ms."""
        p = whatif(_nested_run(tmp_path / "r"), offload=offload)
        assert pytest.approx(wall_ms / 1e3, abs=1e-6) == p.predicted_wall_s

    def test_unknown_stage_keeps_the_clear_error(self, tmp_path):
        """A name recorded nowhere is refused with the list of the run's stages."""
        with pytest.raises(ScenarioError, match="unknown stage 'resize'; this run's stages are .*augment"):
            whatif(_nested_run(tmp_path / "r"), faster={"resize": 2})


def _torch():
    return pytest.importorskip("torch")


def _sleep_stages():
    @pipeprobe.stage("decode")
    def decode(path: str) -> str:
        time.sleep(0.002)
        return path

    @pipeprobe.stage("augment")
    def augment(x: str) -> int:
        time.sleep(0.004)
        return len(x)

    return decode, augment


def _record(loader, out: Path) -> pipeprobe.Run:
    with pipeprobe.Probe(out, report=False, sample_interval_s=0) as probe:
        for _ in probe.watch(loader):
            with probe.step():
                time.sleep(0.001)
    return pipeprobe.load(out)


def _loader(kind: str, workers: int):
    torch = _torch()
    decode, augment = _sleep_stages()

    class Photos(torch.utils.data.Dataset):
        def __len__(self) -> int:
            return 32

        def __getitem__(self, i: int):
            return torch.tensor([augment(decode(f"part_{i}.jpg"))])

    class Stream(torch.utils.data.IterableDataset):
        def __iter__(self):
            info = torch.utils.data.get_worker_info()
            w, n = (info.id, info.num_workers) if info else (0, 1)
            for i in range(w, 32, n):
                yield torch.tensor([augment(decode(f"part_{i}.jpg"))])

    data = Photos() if kind == "map" else Stream()
    ctx = "fork" if workers else None
    return torch.utils.data.DataLoader(data, batch_size=4, num_workers=workers, multiprocessing_context=ctx)


@pytest.mark.parametrize("kind", ["map", "iterable"])
@pytest.mark.parametrize("workers", [0, 2])
class TestRealLoader:
    def test_decorated_stages_inside_fetch(self, tmp_path, kind, workers):
        """Decorated stages inside the dataset are on the path under their names; worker time is counted once
        (each lane's node time equals its outermost spans' time: common practice, measure of a union)."""
        run = _record(_loader(kind, workers), tmp_path / "r")
        tl = build_timeline(run)
        labels = set(tl.nodes["stage"].astype(str))
        assert {"decode", "augment", FETCH_OWN} <= labels
        sp = run.spans[run.spans["stage"].isin(["fetch", "collate"])]
        nodes = tl.nodes[tl.nodes["kind"] == "stage"]
        assert pytest.approx(float(sp["dur_s"].sum()), rel=1e-9) == float(nodes["dur_s"].sum())
        sh = pipeprobe.analyze(run).stage_shares()
        assert pytest.approx(1.0) == sum(sh.values())

    def test_whatif_accepts_nested_stage(self, tmp_path, kind, workers):
        """--faster augment=inf works on a real loader; with no workers every augment instant is on the path,
        so the prediction is the wall time less augment's recorded time (analytic, serial pipeline)."""
        run = _record(_loader(kind, workers), tmp_path / "r")
        pred = whatif(run, faster={"augment": float("inf")}).predicted_wall_s
        aug = float(run.spans.loc[run.spans["stage"] == "augment", "dur_s"].sum())
        if workers == 0:
            assert pytest.approx(run.wall_s - aug, rel=0.10) == pred
        else:
            assert pred < whatif(run).predicted_wall_s


class TestCommandLine:
    def test_faster_nested_stage_on_the_command_line(self, tmp_path, capsys):
        """`pipeprobe whatif RUN --faster augment=inf` works when augment ran only inside fetch."""
        from pipeprobe.cli import main

        assert 0 == main(["whatif", str(_nested_run(tmp_path / "r")), "--faster", "augment=inf"])
        assert "faster augment=inf" in capsys.readouterr().out

    def test_unknown_stage_exits_2_with_one_line(self, tmp_path, capsys):
        """A stage recorded nowhere: one error line naming the run's stages, exit code 2."""
        from pipeprobe.cli import main

        assert 2 == main(["whatif", str(_nested_run(tmp_path / "r")), "--faster", "resize=2"])
        err = capsys.readouterr().err.strip().splitlines()
        assert 1 == len(err) and "unknown stage 'resize'" in err[0]


STEP_OWN = own_label("step")


def _step_run(path: Path, *, epoch_timer: bool = False) -> Path:
    """One worker decodes batch b from 10b to 10b + 10 ms; each 20 ms step holds ``forward`` (2-10 ms into it)
    and ``backward`` (10-18 ms), both without ids; CPU 30 ms per step (process clock), 8 ms per stage. Batch 0
    is ready at 10 ms, then the steps run back to back: 10-30, 30-50, 50-70. Hand-worked wall 70 ms: decode 10,
    forward 3 x 8 = 24, backward 24, the steps' own time 3 x 4 = 12."""
    worker = [stage("decode", 10 * b, 10 * b + 10, sample=b, batch=b, epoch=0, cpu_ms=10) for b in range(3)]
    main, t = [], 0.0
    for b in range(3):
        ready = max(t, 10.0 * b + 10)
        main += [wait(t, ready, b), member(ready, b, b), step(ready, ready + 20, b, cpu_ms=30),
                 stage("forward", ready + 2, ready + 10, cpu_ms=8), stage("backward", ready + 10, ready + 18, cpu_ms=8)]
        t = ready + 20
    if epoch_timer:
        main.append(stage("epoch", 0, 70))
    return write_run(path, {100: main, 200: worker}, end_ms=70)


class TestStagesInsideTheStep:
    def test_critical_path_shares(self, tmp_path):
        """Stages inside probe.step() get their own share and the step keeps its own time (hand-worked, see
        _step_run; the shares add up to the wall time: critical path method, Kelley and Walker 1959)."""
        sh = {k: v for k, v in pipeprobe.analyze(_step_run(tmp_path / "r")).stage_shares().items() if v > 0}
        assert pytest.approx({"decode": 10 / 70, "forward": 24 / 70, "backward": 24 / 70, STEP_OWN: 12 / 70}) == sh

    def test_stage_table_inclusive_and_own(self, tmp_path):
        """The stage table shows the step's full time, its own time and its own time on the path (hand-worked)."""
        t = pipeprobe.analyze(_step_run(tmp_path / "r")).stages.table.set_index("stage")
        got = t.loc["step", ["total_s", "own_s", "critical_s", "label"]].tolist()
        assert [pytest.approx(0.060), pytest.approx(0.012), pytest.approx(0.012), STEP_OWN] == got
        assert pytest.approx(0.024) == t.loc["forward", "critical_s"]

    def test_epoch_timer_counts_steps_as_children(self, tmp_path):
        """A stage around whole steps is no node (shares as without it) and its own time is its time outside
        the steps: 70 - 60 ms (hand-worked)."""
        a = pipeprobe.analyze(_step_run(tmp_path / "r", epoch_timer=True))
        assert pytest.approx(24 / 70) == a.stage_shares()["forward"]
        t = a.stages.table.set_index("stage")
        assert [pytest.approx(0.070), pytest.approx(0.010)] == t.loc["epoch", ["total_s", "own_s"]].tolist()

    def test_step_cpu_beyond_its_stages_is_shared_by_duration(self, tmp_path):
        """The step's 30 ms CPU (all threads) less its stages' 16 ms is spread over its 20 ms by duration:
        0.7 ms per ms, so forward 8 + 5.6, the step's own 4 ms 2.8 (hand-worked)."""
        run = pipeprobe.load(_step_run(tmp_path / "r"))
        p = span_pieces(run.spans[run.spans["stage"] != "wait"])
        cpu = p.groupby("label", observed=True)["cpu_s"].sum()
        assert [pytest.approx(3 * 0.0136), pytest.approx(3 * 0.0028)] == [cpu["forward"], cpu[STEP_OWN]]

    @pytest.mark.parametrize(("faster", "wall_ms"), [({"forward": 2}, 58), ({"forward": float("inf")}, 46),
                                                     ({"step": 2}, 40), ({"backward": float("inf"), "forward": 2}, 38)])
    def test_faster_stage_inside_the_step(self, tmp_path, faster, wall_ms):
        """The step shrinks by the time saved; making the step faster speeds the stages inside it (hand-worked:
        the steps follow batch 0's 10 ms, each 20 ms less what the change saves, none before its batch is
        ready at 10, 20, 30 ms: 8 ms steps end at 38 ms)."""
        assert pytest.approx(wall_ms / 1000) == whatif(_step_run(tmp_path / "r"), faster=faster).predicted_wall_s

    def test_faster_forward_on_the_command_line(self, tmp_path, capsys):
        """`pipeprobe whatif RUN --faster forward=2` works when forward ran only inside the step."""
        from pipeprobe.cli import main

        assert 0 == main(["whatif", str(_step_run(tmp_path / "r")), "--faster", "forward=2"])
        assert "faster forward=2" in capsys.readouterr().out


def _record_train_loop(out: Path, workers: int) -> pipeprobe.Run:
    """A real torch loop: forward and backward timed inside probe.step(), a 2 ms item load."""
    torch = _torch()

    class Items(torch.utils.data.Dataset):
        def __len__(self) -> int:
            return 48

        def __getitem__(self, i: int):
            time.sleep(0.002)
            return torch.full((16,), float(i))

    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(16, 64), torch.nn.ReLU(), torch.nn.Linear(64, 1))
    opt = torch.optim.SGD(model.parameters(), lr=0.01)
    loader = torch.utils.data.DataLoader(Items(), batch_size=4, num_workers=workers,
                                         multiprocessing_context="fork" if workers else None)
    with pipeprobe.Probe(out, report=False, sample_interval_s=0) as probe:
        for x in probe.watch(loader):
            with probe.step():
                with pipeprobe.stage("forward"):
                    loss = model(x).square().mean()
                    time.sleep(0.004)  # a forward pass long enough to matter beside the loading
                with pipeprobe.stage("backward"):
                    loss.backward()
                opt.step()
                opt.zero_grad()
    return pipeprobe.load(out)


@pytest.mark.parametrize("workers", [0, 2])
class TestRealStepStages:
    def test_shares_add_up(self, tmp_path, workers):
        """forward and backward are on the path under their names; all shares add up to the wall time
        (critical path method, Kelley and Walker 1959)."""
        sh = pipeprobe.analyze(_record_train_loop(tmp_path / "r", workers)).stage_shares()
        assert {"forward", "backward", STEP_OWN} <= set(sh)
        assert sh["forward"] > 0
        assert pytest.approx(1.0) == sum(sh.values())

    def test_forward_free_lies_within_amdahl(self, tmp_path, workers):
        """--faster forward=inf speeds the run up by at most Amdahl's bound 1 / (1 - p), p = forward's share of
        the replayed wall time (Amdahl 1967), and never slows it down."""
        run = _record_train_loop(tmp_path / "r", workers)
        base = whatif(run).predicted_wall_s
        p = float(run.spans.loc[run.spans["stage"] == "forward", "dur_s"].sum()) / base
        speedup = base / whatif(run, faster={"forward": float("inf")}).predicted_wall_s
        assert 1.0 <= speedup <= 1 / (1 - p) + 1e-9


class TestOffloadInsideTheStep:
    def test_offload_forward_shrinks_the_step(self, tmp_path):
        """--offload forward=2 runs forward's 8 ms in 4 ms off the CPU inside the step: 0.058 s as forward=2 on
        free cores (hand-worked, see _step_run)."""
        assert pytest.approx(0.058) == whatif(_step_run(tmp_path / "r"), offload={"forward": 2}, cores=math.inf).predicted_wall_s

    def test_offload_takes_forward_off_the_cpu(self, tmp_path):
        """On one core beside a CPU-bound worker, offloading forward frees the core: faster than forward=2."""
        d = _step_run(tmp_path / "r")
        moved = whatif(d, offload={"forward": 2}, cores=1).predicted_wall_s
        assert moved < whatif(d, faster={"forward": 2}, cores=1).predicted_wall_s
