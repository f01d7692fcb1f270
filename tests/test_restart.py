"""Tests of the worker-restart cost (pipeprobe.whatif.restart) and its report part.

Outside references: hand-worked schedules of a three-epoch run (below);
the critical path method (Kelley and Walker 1959) for which waits lie on
the path.
"""

from __future__ import annotations

import pytest
from _synth import member, stage, step, wait, write_run

import pipeprobe
from pipeprobe.report import build_report, format_report, report_dict
from pipeprobe.whatif.plan import build_plan
from pipeprobe.whatif.restart import with_persistent_workers, worker_restarts

RESTART_MS = 3.0  # from the loop's ask to the new workers' first span
GAP_MS = 5.0  # the loop's time between epochs (old workers stopped, new ones started)


def restart_rows(persistent: bool, restart_ms: float = RESTART_MS) -> dict[int, list]:
    """3 epochs x 2 batches on 2 workers; batch decodes take 4 and 5 ms, steps 4 ms.

    Epoch e starts when the loop asks at t; its workers start decoding at t + 3 ms (``restart_ms``; new workers: every
    epoch; kept workers: the first only), the loop waits until the first batch is ready, steps 4 ms,
    takes the second batch (ready by then) and steps 4 ms, then spends 5 ms (new workers) or nothing
    (kept workers) before it asks for the next epoch. New workers: epochs start at 0, 20, 40 ms, the run
    ends at 55 ms; kept workers: at 0, 15, 27 ms, the run ends at 39 ms.
    """
    main, procs, t = [], {}, 0.0
    for e in range(3):
        start = t + (restart_ms if (e == 0 or not persistent) else 0.0)
        for k in range(2):
            pid = 201 + k if persistent else 201 + 2 * e + k
            procs.setdefault(pid, []).append(stage("decode", start, start + 4 + k, sample=2 * e + k, epoch=e))
        ready = start + 4
        main += [wait(t, ready, 2 * e, epoch=e), member(ready, 2 * e, 2 * e, epoch=e),
                 step(ready, ready + 4, 2 * e, epoch=e), wait(ready + 4, ready + 4, 2 * e + 1, epoch=e),
                 member(ready + 4, 2 * e + 1, 2 * e + 1, epoch=e), step(ready + 4, ready + 8, 2 * e + 1, epoch=e)]
        t = ready + 8 + (0.0 if persistent or e == 2 else GAP_MS)
    return {100: main, **procs}


@pytest.fixture
def restarting_run(tmp_path):
    return write_run(tmp_path / "new", restart_rows(persistent=False))


class TestMeasure:
    def test_restart_waits_per_epoch(self, restarting_run):
        """Each later epoch: 5 ms between epochs plus 3 ms until the new workers' first span (by hand)."""
        run = pipeprobe.load(restarting_run)
        r = worker_restarts(build_plan(run), run)
        assert True is r.restarts
        assert [0.008, 0.008] == pytest.approx(r.restart_s, abs=1e-9)
        assert [0.005, 0.005] == pytest.approx(r.between_epochs_s, abs=1e-9)
        assert 0.003 == pytest.approx(r.first_start_s, abs=1e-9)

    def test_kept_workers_do_not_restart(self, tmp_path):
        """A run with the same two worker processes in every epoch has no restarts to name."""
        d = write_run(tmp_path / "kept", restart_rows(persistent=True))
        run = pipeprobe.load(d)
        r = worker_restarts(build_plan(run), run)
        assert (False, False) == (r.restarts, r.worth_naming)


class TestReplay:
    def test_persistent_workers_replay_the_kept_run(self, restarting_run, tmp_path):
        """Replayed with kept workers, the run lasts what the run recorded with kept workers lasts: 39 ms."""
        run = pipeprobe.load(restarting_run)
        r = worker_restarts(build_plan(run), run)
        kept = pipeprobe.load(write_run(tmp_path / "kept", restart_rows(persistent=True)))
        assert 0.055 == pytest.approx(run.wall_s, abs=1e-9)
        assert kept.wall_s == pytest.approx(r.persistent_wall_s, abs=1e-6)
        assert 0.016 == pytest.approx(r.saved_s, abs=1e-6)

    def test_epoch_barrier_holds_new_workers(self, restarting_run):
        """The replay starts no task of a later epoch before the loop asks for that epoch (new workers)."""
        plan = build_plan(pipeprobe.load(restarting_run))
        rep = pipeprobe.whatif(with_persistent_workers(plan)).replay
        first = [0, 2, 4]
        assert all(rep.start_s[b] >= rep.wait_start_s[b] - 1e-12 for b in first)


class TestReport:
    def test_report_names_cost_fix_and_gain(self, restarting_run):
        """The text, JSON and action list name the restart cost, persistent workers, and the replayed saving."""
        report = build_report(pipeprobe.analyze(restarting_run))
        text = format_report(report)
        assert "worker restarts" in text and "persistent_workers=True" in text
        data = report_dict(report)["worker_restarts"]
        assert (True, 0.016) == (data["worth_naming"], pytest.approx(data["restart_total_s"], abs=1e-9))
        acts = [a for a in report_dict(report)["actions"] if a["kind"] == "warmup"]
        assert 1 == len(acts) and "persistent_workers=True" in acts[0]["text"]
        from pipeprobe.html import render_report

        assert "Worker restarts" in render_report(report)


class TestWhatif:
    def test_whatif_persistent_workers(self, restarting_run):
        """pipeprobe.whatif(run, persistent_workers=True) predicts the kept run's 39 ms (by hand, above)."""
        p = pipeprobe.whatif(restarting_run, persistent_workers=True)
        assert 0.039 == pytest.approx(p.predicted_wall_s, abs=1e-6)
        assert any("persistent workers" in n for n in p.notes)

    def test_cli_persistent_workers(self, restarting_run, capsys):
        """`pipeprobe whatif RUN --persistent-workers --json` predicts the kept run's 39 ms (by hand, above)."""
        import json

        from pipeprobe.cli import main

        assert 0 == main(["whatif", str(restarting_run), "--persistent-workers", "--json"])
        assert 0.039 == pytest.approx(json.loads(capsys.readouterr().out)["predicted_wall_s"], abs=1e-6)

    def test_gap_action_names_the_workers_starting(self, restarting_run):
        """No span covers a worker's start-up: the unrecorded-gap action says how much of it is workers starting
        (3 ms at each of 3 epoch starts plus 5 ms between epochs twice = 19 ms, by hand) and keeps the rest."""
        a = pipeprobe.analyze(restarting_run)
        before = next(x for x in a.actions if x.kind == "gap")
        after = [x for x in build_report(a).figures("actions").actions if x.kind == "gap"]
        assert ["loader workers starting"] == [x.text.split("s is ")[-1].split(" at each")[0] for x in after]
        assert max(0.0, before.seconds - 0.019) == pytest.approx(after[0].seconds, abs=1e-9)


class TestStallBlame:
    """The stall section names each epoch's first wait for starting workers (issue #11 §0), not the gap."""

    def test_first_waits_blamed_on_starting_workers(self, tmp_path):
        """Workers 10 ms to start: each epoch's first wait (14 ms) is 10 ms of gap then 4 ms of decode on the path
        (by hand, as in restart_rows), so it is the workers starting; later epochs say the loader starts new ones."""
        report = build_report(pipeprobe.analyze(write_run(tmp_path / "new", restart_rows(False, restart_ms=10.0))))
        worst = report_dict(report)["worst_stalls"]
        assert [(0, "workers starting"), (2, "workers starting"), (4, "workers starting")] == \
            sorted((w["batch_id"], w["blame"]) for w in worst)
        text = format_report(report)
        lines = [x for x in text[text.index("stalls  "):].splitlines() if x.startswith("  batch ")]
        said = {int(x.split()[1]): x.split(": ", 1)[1] for x in lines}
        assert {0: "loader workers starting", 2: "new loader workers starting (persistent_workers=False)",
                4: "new loader workers starting (persistent_workers=False)"} == said

    def test_kept_workers_keep_the_gap(self, tmp_path):
        """Kept workers (the same two processes every epoch) restart nothing: the first wait keeps the gap's blame."""
        report = build_report(pipeprobe.analyze(write_run(tmp_path / "kept", restart_rows(True, restart_ms=10.0))))
        worst = {w["batch_id"]: w["blame"] for w in report_dict(report)["worst_stalls"]}
        assert "unexplained gap" == worst[0]

    def test_html_names_them_too(self, tmp_path):
        """The HTML page's longest-waits table names the new workers too (the same words as the text)."""
        import html

        from pipeprobe.html import render_report

        report = build_report(pipeprobe.analyze(write_run(tmp_path / "new", restart_rows(False, restart_ms=10.0))))
        page = html.unescape(render_report(report))
        assert True is ("new loader workers starting (persistent_workers=False)" in page)
