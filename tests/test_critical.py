"""Critical path: the walk back along last-arriving dependencies and the attribution of wall time."""

from __future__ import annotations

import networkx as nx
import pytest
from _synth import pool_schedule, write_run
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import pipeprobe
from pipeprobe.critical import DELIVERY, GAP, critical_path, critical_path_length
from pipeprobe.timeline import build_timeline

HYP = settings(max_examples=30, deadline=None,
               suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])


@st.composite
def pipelines(draw, gapless=False):
    """Random worker-pool pipelines: durations in whole microseconds so times are exact."""
    workers = draw(st.integers(1, 3))
    batches = draw(st.integers(1, 5))
    samples = draw(st.integers(1, 3))
    stages = draw(st.integers(1, 3))
    dur = st.integers(1, 5000)
    stage_us = [[[draw(dur) for _ in range(stages)] for _ in range(samples)] for _ in range(batches)]
    step_us = [draw(dur) for _ in range(batches)]
    collate = draw(st.sampled_from([0, draw(dur)]))
    if gapless:
        return dict(stage_us=stage_us, step_us=step_us, workers=workers, collate_us=collate)
    jitter = draw(st.lists(st.integers(0, 500), min_size=1, max_size=5))
    deliv = [draw(st.integers(0, 300)) for _ in range(batches)]
    return dict(stage_us=stage_us, step_us=step_us, workers=workers, collate_us=collate, jitter_us=jitter,
                delivery_us=deliv)


def _timeline(tmp_path, spec, name="r"):
    procs, end = pool_schedule(**spec)
    return build_timeline(pipeprobe.load(write_run(tmp_path / name, procs, end_ms=end)))


def _path_weight(g, path, weight="weight"):
    return sum(g.edges[u, v][weight] for u, v in zip(path[:-1], path[1:], strict=True))


def _nx_longest_to_end(g):
    """Longest path into the virtual 'end' node (networkx dag_longest_path on its ancestors)."""
    sub = g.subgraph(nx.ancestors(g, "end") | {"end"})
    path = nx.dag_longest_path(sub, weight="weight")
    if path[-1] != "end" and sub.has_edge(path[-1], "end") and sub.edges[path[-1], "end"]["weight"] == 0:
        path.append("end")  # a zero-weight last edge ties; networkx may stop before it
    return path, nx.dag_longest_path_length(sub, weight="weight")


class TestHandChecked:
    def test_simple_pipeline_shares(self, simple_run_dir):
        """Hand check: 3 x (2 x (3 ms decode + 1 ms augment) + 10 ms step) = 54 ms; decode 18, augment 6, step 30."""
        cp = critical_path(build_timeline(pipeprobe.load(simple_run_dir)))
        got = {str(r.label): round(r.seconds * 1e3, 9) for r in cp.shares.itertuples()}
        assert {"decode": 18.0, "augment": 6.0, "step": 30.0} == got
        assert pytest.approx(0.054, abs=1e-12) == cp.wall_s
        assert [0, 1, 2] == cp.batches

    def test_delivery_and_gap_are_labelled(self, tmp_path):
        """Hand check: a finished batch's wait to reach the loop is 'delivery'; idle time before a span is a gap."""
        spec = dict(stage_us=[[[1000]], [[1000]]], step_us=[500, 500], workers=1, jitter_us=[200],
                    delivery_us=[300, 100])
        cp = critical_path(_timeline(tmp_path, spec))
        got = {str(r.label): round(r.seconds * 1e6) for r in cp.shares.itertuples()}
        # worker: gap 0..200, s0 200..1200, gap 1200..1400, s0 1400..2400 (one worker, so back to back);
        # loop: batch 0 ready 1500 (+300), step 1500..2000; batch 1 ready 2500 (+100), step 2500..3000.
        # Walking back from 3000: step 500, delivery 100, s0 1000, gap 200, s0 1000, gap 200.
        assert {"s0": 2000, "step": 500, DELIVERY: 100, GAP: 400} == got

    def test_empty_run_is_all_gap(self, tmp_path):
        """A run with no spans attributes its wall time to the unexplained gap."""
        cp = critical_path(build_timeline(pipeprobe.load(write_run(tmp_path / "r", {100: []}, end_ms=5))))
        assert [GAP] == list(cp.shares["label"])
        assert pytest.approx(0.005) == cp.wall_s
        assert 0 == len(cp.path)


class TestAgainstNetworkx:
    def test_hand_pipeline_matches_dag_longest_path(self, simple_run_dir):
        """networkx.dag_longest_path on the same graph (weights = time each node adds) gives our path."""
        tl = build_timeline(pipeprobe.load(simple_run_dir))
        cp = critical_path(tl)
        path, length = _nx_longest_to_end(tl.to_networkx())
        assert ["start", *cp.path["node"].tolist(), "end"] == path
        assert pytest.approx(cp.wall_s, abs=1e-12) == length

    @pytest.mark.parametrize("fixture", ["analysis_sleep_run", "analysis_pool_run"])
    def test_recorded_runs_match_dag_longest_path(self, fixture, request):
        """Recorded runs (sleeps; fork pool): networkx's longest path is our critical path, node by node."""
        tl = build_timeline(pipeprobe.load(request.getfixturevalue(fixture)))
        cp = critical_path(tl)
        g = tl.to_networkx()
        path, length = _nx_longest_to_end(g)
        assert ["start", *cp.path["node"].tolist(), "end"] == path
        assert pytest.approx(cp.wall_s, rel=1e-9) == length
        assert pytest.approx(critical_path_length(tl), rel=1e-9) == length - g.edges[path[-2], "end"]["weight"]

    @HYP
    @given(spec=pipelines())
    def test_random_pipelines_match_dag_longest_path(self, tmp_path_factory, spec):
        """Random pipelines with idle gaps and delivery times: our path is a longest path (networkx)."""
        tl = _timeline(tmp_path_factory.mktemp("h"), spec)
        cp = critical_path(tl)
        g = tl.to_networkx()
        ours = ["start", *cp.path["node"].tolist(), "end"]
        assert nx.is_path(g, ours)
        _, length = _nx_longest_to_end(g)
        assert pytest.approx(length, abs=1e-9) == _path_weight(g, ours)
        assert pytest.approx(cp.wall_s, abs=1e-9) == length

    @HYP
    @given(spec=pipelines(gapless=True))
    def test_gapless_pipelines_are_plain_cpm(self, tmp_path_factory, spec):
        """Critical path method (Kelley and Walker 1959): in an as-soon-as-possible schedule the makespan is
        the longest path weighted by durations alone (networkx dag_longest_path_length, weight = dur_s)."""
        tl = _timeline(tmp_path_factory.mktemp("h"), spec)
        cp = critical_path(tl)
        g = tl.to_networkx(weight="dur_s")
        ours = ["start", *cp.path["node"].tolist(), "end"]
        _, length = _nx_longest_to_end(g)
        assert pytest.approx(cp.wall_s, abs=1e-9) == length
        assert pytest.approx(length, abs=1e-9) == _path_weight(g, ours)
        assert 0.0 == pytest.approx(cp.share_of(GAP) + cp.share_of(DELIVERY), abs=1e-9)


class TestProperties:
    @HYP
    @given(spec=pipelines())
    def test_attribution_sums_to_wall_time(self, tmp_path_factory, spec):
        """Every second of wall time is attributed once: the shares sum to the wall time."""
        cp = critical_path(_timeline(tmp_path_factory.mktemp("h"), spec))
        assert pytest.approx(cp.wall_s, abs=1e-9) == cp.shares["seconds"].sum()
        assert pytest.approx(1.0, abs=1e-9) == cp.shares["share"].sum()
        seg = cp.segments
        assert (seg["start_s"].iloc[1:].to_numpy() == seg["end_s"].iloc[:-1].to_numpy()).all()

    @HYP
    @given(spec=pipelines(), extra_us=st.integers(1, 3000), pick=st.integers(0, 10_000))
    def test_delay_on_the_path_never_shortens_it(self, tmp_path_factory, spec, extra_us, pick):
        """Adding a delay to a stage span on the critical path never shortens the path (CPM monotonicity)."""
        base = tmp_path_factory.mktemp("h")
        tl = _timeline(base, spec, "a")
        cp = critical_path(tl)
        on = cp.path[(cp.path["kind"] == "stage") & (cp.path["stage"].astype(str).str.startswith("s"))]
        if on.empty:
            return
        row = on.iloc[pick % len(on)]
        b, sid, k = int(row["batch_id"]), int(row["sample_id"]), int(str(row["stage"])[1:])
        i = sid - sum(len(x) for x in spec["stage_us"][:b])
        slower = {**spec, "stage_us": [[list(d) for d in batch] for batch in spec["stage_us"]]}
        slower["stage_us"][b][i][k] += extra_us
        after = critical_path_length(_timeline(base, slower, "b"))
        assert critical_path_length(tl) + extra_us / 1e6 - 1e-9 <= after
