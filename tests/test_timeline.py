"""Dependency timeline: nodes, edges, last-arriving dependencies."""

from __future__ import annotations

import networkx as nx
import numpy as np
from _synth import member, pool_schedule, stage, step, three_epoch_rows, wait, write_run

import pipeprobe
from pipeprobe.critical import critical_path
from pipeprobe.timeline import EDGE_KINDS, NODE_COLUMNS, build_timeline


def _edge_set(tl, kind=None):
    e = tl.edges if kind is None else tl.edges[tl.edges["kind"] == kind]
    return set(zip(e["src"].tolist(), e["dst"].tolist(), strict=True))


class TestNodes:
    def test_columns_documented(self, simple_run_dir):
        """Every node column is documented in NODE_COLUMNS, in order."""
        tl = build_timeline(pipeprobe.load(simple_run_dir))
        assert list(NODE_COLUMNS) == list(tl.nodes.columns)

    def test_one_delivery_per_batch_and_no_wait_nodes(self, simple_run_dir):
        """Each delivered batch gets one delivery node at its ready time; waits are not work."""
        run = pipeprobe.load(simple_run_dir)
        tl = build_timeline(run)
        d = tl.nodes[tl.nodes["kind"] == "delivery"]
        assert list(run.batches["ready_s"]) == list(d["start_s"])
        assert "wait" not in set(tl.nodes["stage"].astype(str))
        assert 12 + 3 + 3 == len(tl.nodes)  # stage spans + steps + deliveries

    def test_nested_span_is_its_own_node(self, tmp_path):
        """A span nested in another on the same thread is a node; the outer one keeps its time outside it.

        Hand-worked: load 0-5 ms around read 1-2 ms gives load's own time 0-1 ms and 2-5 ms.
        """
        rows = [stage("load", 0, 5, sample=0, batch=0, epoch=0), stage("read", 1, 2, sample=0, batch=0, epoch=0),
                wait(0, 5, 0), step(5, 6, 0)]
        tl = build_timeline(pipeprobe.load(write_run(tmp_path / "r", {100: rows})))
        own = "load (own time)"
        assert [own, "read", own, "delivery", "step"] == list(tl.nodes["stage"].astype(str))
        assert [0.001, 0.001, 0.003, 0.0, 0.001] == [round(x, 9) for x in tl.nodes["dur_s"]]

    def test_stage_around_the_whole_loop_is_not_a_node(self, tmp_path):
        """A user stage that encloses steps of its own thread (an 'epoch' timer) does not hide them."""
        rows = [stage("epoch", 0, 20, epoch=0), stage("decode", 0, 3, sample=0, batch=0, epoch=0),
                wait(0, 3, 0), step(3, 10, 0),
                stage("decode", 10, 13, sample=1, batch=1, epoch=0), wait(10, 13, 1), step(13, 20, 1)]
        tl = build_timeline(pipeprobe.load(write_run(tmp_path / "r", {100: rows})))
        assert ["decode", "delivery", "step"] * 2 == list(tl.nodes["stage"].astype(str))

    def test_lanes_name_workers_and_main(self, analysis_pool_run):
        """Worker processes get 'worker 1', 'worker 2'; the training thread is 'main'."""
        tl = build_timeline(pipeprobe.load(analysis_pool_run))
        assert {"main", "worker 1", "worker 2"} == set(tl.nodes["lane"].astype(str))
        assert {"main"} == set(tl.nodes.loc[tl.nodes["kind"] != "stage", "lane"].astype(str))

    def test_empty_run(self, tmp_path):
        """A run with no spans gives an empty, well-formed timeline."""
        tl = build_timeline(pipeprobe.load(write_run(tmp_path / "r", {100: []}, end_ms=5)))
        assert (0, 0) == (len(tl.nodes), len(tl.edges))
        assert list(NODE_COLUMNS) == list(tl.nodes.columns)


class TestEdges:
    def test_sample_chain_delivery_consumer_and_step_edges(self, simple_run_dir):
        """decode -> augment per sample, last stage -> delivery -> step, step k-1 -> step k."""
        tl = build_timeline(pipeprobe.load(simple_run_dir))
        n = tl.nodes
        node = {(str(s), int(smp), str(k)): int(i) for i, s, smp, k in
                zip(n["node"], n["stage"], n["sample_id"], n["kind"], strict=True) if k == "stage"}
        assert (node[("decode", 0, "stage")], node[("augment", 0, "stage")]) in _edge_set(tl, "sample")
        deliv = n.loc[n["kind"] == "delivery", "node"].tolist()
        steps = n.loc[n["kind"] == "step", "node"].tolist()
        assert (node[("augment", 1, "stage")], deliv[0]) in _edge_set(tl, "delivery")
        assert {(deliv[i], steps[i]) for i in range(3)} <= _edge_set(tl, "consumer")
        assert {(steps[0], steps[1]), (steps[1], steps[2])} <= _edge_set(tl, "step") | _edge_set(tl, "thread")

    def test_worker_spans_link_to_their_batch_delivery(self, tmp_path):
        """Spans recorded in a worker process reach their batch's delivery via the sample ids."""
        procs, end = pool_schedule([[[100, 200]], [[100, 200]]], [50, 50], workers=2, collate_us=30)
        tl = build_timeline(pipeprobe.load(write_run(tmp_path / "r", procs, end_ms=end)))
        n = tl.nodes
        collate = n[n["stage"] == "collate"]
        deliv = n[n["kind"] == "delivery"]
        assert [0, 1] == sorted(collate["batch_id"].tolist())
        pairs = _edge_set(tl, "delivery")
        for b in (0, 1):
            c = int(collate.loc[collate["batch_id"] == b, "node"].iloc[0])
            d = int(deliv.loc[deliv["batch_id"] == b, "node"].iloc[0])
            assert (c, d) in pairs
        s1 = n[(n["stage"] == "s1") & (n["batch_id"] == 0)]["node"].iloc[0]
        c0 = collate.loc[collate["batch_id"] == 0, "node"].iloc[0]
        assert (int(s1), int(c0)) in _edge_set(tl, "assembly")

    def test_edges_agree_with_recorded_times(self, analysis_pool_run):
        """Every edge goes from a node that ended to one that started later (so the graph is a DAG)."""
        tl = build_timeline(pipeprobe.load(analysis_pool_run))
        n = tl.nodes
        src, dst = tl.edges["src"].to_numpy(), tl.edges["dst"].to_numpy()
        assert np.all(n["end_s"].to_numpy()[src] <= n["start_s"].to_numpy()[dst])
        assert set(tl.edges["kind"].astype(str)) <= set(EDGE_KINDS)
        assert nx.is_directed_acyclic_graph(tl.to_networkx())

    def test_last_arriving_dependency_is_latest_predecessor(self, analysis_pool_run):
        """pred is the predecessor that ended last (networkx predecessors as the reference)."""
        tl = build_timeline(pipeprobe.load(analysis_pool_run))
        g = tl.to_networkx()
        end = tl.nodes["end_s"].to_numpy()
        for v, p in zip(tl.nodes["node"], tl.nodes["pred"], strict=True):
            preds = [u for u in g.predecessors(int(v)) if u != "start"]
            if not preds:
                assert -1 == p
            else:
                assert max(end[u] for u in preds) == end[p]


def _slot_run(root):
    """Two workers, prefetch 2: worker B finishes batch 1 at 12 ms and idles until the consumer
    takes batch 1 (15.1 ms, after step 0) frees a slot; its batch 3 then takes until 40 ms."""
    main = [
        wait(0, 10, 0), member(10, 0, 0), step(10, 15, 0),
        wait(15, 15.1, 1), member(15.1, 1, 1), step(15.1, 25, 1),
        wait(25, 25.05, 2), member(25.05, 2, 2), step(25.05, 30, 2),
        wait(30, 40, 3), member(40, 3, 3), step(40, 45, 3),
    ]
    worker_a = [stage("decode", 0, 10, sample=0), stage("decode", 10, 20, sample=2)]
    worker_b = [stage("decode", 0, 12, sample=1), stage("decode", 15.1, 40, sample=3)]
    return write_run(root, {100: main, 101: worker_a, 102: worker_b})


class TestSlotEdges:
    def test_idle_worker_waits_for_the_consumer_not_a_gap(self, tmp_path):
        """A worker idle until the consumer frees a prefetch slot is explained by that delivery:
        the critical path runs through step 0 and the delivery of batch 1, with no unexplained gap."""
        tl = build_timeline(pipeprobe.load(_slot_run(tmp_path / "r")))
        nodes = tl.nodes
        deliv1 = int(nodes[(nodes["kind"] == "delivery") & (nodes["batch_id"] == 1)]["node"].iloc[0])
        decode3 = int(nodes[(nodes["stage"] == "decode") & (nodes["sample_id"] == 3)]["node"].iloc[0])
        assert (deliv1, decode3) in _edge_set(tl, "slot")
        assert deliv1 == int(nodes.loc[decode3, "pred"])
        path = critical_path(tl)
        on_path = set(path.path["node"].tolist())
        step0 = int(nodes[(nodes["kind"] == "step") & (nodes["batch_id"] == 0)]["node"].iloc[0])
        assert {deliv1, decode3, step0} <= on_path
        shares = dict(zip(path.shares["label"], path.shares["seconds"], strict=True))
        assert abs(0.045 - sum(shares.values())) < 1e-9
        assert shares.get("unexplained gap", 0.0) < 1e-4

    def test_slot_path_is_a_longest_path(self, tmp_path):
        """networkx.dag_longest_path_length on the weighted graph equals the wall time (networkx reference)."""
        tl = build_timeline(pipeprobe.load(_slot_run(tmp_path / "r")))
        g = tl.to_networkx()
        assert abs(tl.wall_s - nx.dag_longest_path_length(g, weight="weight")) < 1e-9


class TestEpochsWithNewWorkers:
    def test_critical_path_covers_every_epoch(self, tmp_path):
        """With new worker processes each epoch, a new worker's first span waits for the loop's last step
        (a slot edge), so the critical path runs through all three epochs and adds up to the wall time
        (networkx.dag_longest_path_length as the reference)."""
        tl = build_timeline(pipeprobe.load(write_run(tmp_path / "r", three_epoch_rows(persistent=False))))
        path = critical_path(tl)
        assert {0, 1, 2} == set(path.path.loc[path.path["kind"] == "step", "epoch"])
        step1 = tl.nodes[(tl.nodes["kind"] == "step") & (tl.nodes["batch_id"] == 1)]["node"].iloc[0]
        first2 = tl.nodes[(tl.nodes["stage"] == "decode") & (tl.nodes["batch_id"] == 2)]["node"].iloc[0]
        assert (int(step1), int(first2)) in _edge_set(tl, "slot")
        assert abs(tl.wall_s - nx.dag_longest_path_length(tl.to_networkx(), weight="weight")) < 1e-9
        assert abs(0.052 - float(path.shares["seconds"].sum())) < 1e-9
