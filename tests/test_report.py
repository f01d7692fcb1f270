"""The run report: text that fits 100 columns, the verdict first, one list of sections, the documented JSON."""

from __future__ import annotations

import dataclasses
import io
import json

import pytest

from pipeprobe.analysis import analyze
from pipeprobe.report import (
    JSON_SCHEMA,
    SCHEMA_VERSION,
    SECTIONS,
    WIDTH,
    Report,
    Section,
    add_section,
    format_report,
    print_close_report,
    report_dict,
)

REQUIRED = ["wall_s", "batches", "stall_fraction", "steady_stall_fraction", "pace", "at_stake", "critical_path",
            "stages", "slowest_samples", "ranks"]


class TestText:
    @pytest.mark.parametrize("fixture", ["simple_run_dir", "analysis_pool_run"])
    def test_fits_width_and_leads_with_verdict(self, fixture, request):
        """Every line fits 100 columns; the verdict comes before the details; three actions at most."""
        a = analyze(request.getfixturevalue(fixture))
        text = format_report(a)
        lines = text.splitlines()
        assert WIDTH >= max(len(x) for x in lines)
        assert lines[2].startswith("  pace  ") and "input free: run" in lines[4] and "step free: run" in lines[5]
        assert "stall" in text and "critical path" in text and "top actions" in text
        assert 0 == sum(line.startswith("  4. ") for line in lines)

    def test_hand_numbers_appear(self, simple_run_dir):
        """The stall fraction and the critical-path shares printed are the hand-checked ones."""
        text = format_report(analyze(simple_run_dir))
        assert "44.4 % of wall" in text
        assert "decode                            0.018 s  33.3 %" in text

    def test_verdict_of_a_serial_loop_is_exact(self, simple_run_dir):
        """Loading inside the loop (8 ms input, 10 ms step, 3 batches): both sides pace in turn; freeing the
        input gives 54/30 = 1.80x and the step 54/24 = 2.25x, equal to Amdahl's ceilings (Amdahl 1967: with
        nothing overlapping, the formula is exact)."""
        lines = format_report(analyze(simple_run_dir)).splitlines()
        assert ["  pace  input and step set the pace in turn",
                "    critical path: input side 44 %, step side 56 %",
                "    input free: run 1.80x faster (replayed); Amdahl's ceiling 1.80x",
                "    step free: run 2.25x faster (replayed); Amdahl's ceiling 2.25x"] == lines[2:6]

    def test_verdict_lines_stay_whole_in_a_long_folder(self, tmp_path):
        """With a 150-character run folder, each verdict phrase still has a whole line under 100 columns."""
        from _synth import simple_pipeline, write_run

        lines = format_report(analyze(write_run(tmp_path / ("x" * 150), simple_pipeline()))).splitlines()
        assert ("  pace  input and step set the pace in turn", True) == (
            lines[2], all(len(line) <= WIDTH for line in lines[2:6]) and lines[5].endswith("2.25x"))

    def test_ends_with_what_to_run_next(self, simple_run_dir):
        """The report ends by naming the next commands: whatif, --html and the notebook."""
        text = format_report(analyze(simple_run_dir))
        tail = text[text.rindex("\nnext\n"):]
        assert ["whatif", "--html", "walkthrough.ipynb"] == [w for w in ("whatif", "--html", "walkthrough.ipynb")
                                                              if w in tail]

    def test_control_characters_from_the_trace_are_escaped(self, tmp_path):
        """A stage named with a clear-screen sequence and a newline prints as visible escapes (common practice)."""
        from _synth import simple_pipeline, write_run

        rows = [dataclasses.replace(r, stage="dec\x1b[2J\nforged") if r.stage == "decode" else r for r in simple_pipeline()[100]]
        text = format_report(analyze(write_run(tmp_path / "run\x07x", {100: rows})))
        assert (False, False, True) == ("\x1b" in text, "\x07" in text, "dec\\x1b[2J\\x0aforged" in text)

    def test_print_close_report_writes_to_file(self, simple_run_dir):
        """Probe.close() prints through print_close_report(run_dir, file)."""
        buf = io.StringIO()
        print_close_report(simple_run_dir, buf)
        assert format_report(analyze(simple_run_dir)) + "\n" == buf.getvalue()


class TestSections:
    def test_added_section_appears_in_text_and_json(self, simple_run_dir):
        """A later layer can add a section after the critical path, in text and JSON."""
        try:
            add_section(Section("extra", lambda a: ["extra section line"], lambda a: {"extra": 1}),
                        after="critical path")
            names = [s.name for s in SECTIONS]
            assert names.index("critical path") + 1 == names.index("extra")
            a = analyze(simple_run_dir)
            text = format_report(a)
            assert text.index("critical path") < text.index("extra section line") < text.index("stages  ")
            assert 1 == report_dict(a)["extra"]
            from pipeprobe.html import render_report

            assert "extra section line" in render_report(a)
        finally:
            SECTIONS[:] = [s for s in SECTIONS if s.name != "extra"]

    def test_unknown_anchor_is_refused(self):
        """Naming a section that does not exist is an error that lists the sections."""
        with pytest.raises(ValueError, match="critical path"):
            add_section(Section("x", lambda a: []), after="nope")


class TestJson:
    def test_required_keys_and_documented_schema(self, analysis_pool_run):
        """The JSON has the keys the issue names; every key of the default report is documented."""
        d = report_dict(analyze(analysis_pool_run))
        assert set(REQUIRED) <= set(d)
        assert set(d) <= set(JSON_SCHEMA)
        json.dumps(d, allow_nan=False)
        assert {"stage", "seconds", "share"} <= set(d["critical_path"][0])
        assert pytest.approx(d["wall_s"], rel=1e-9) == sum(x["seconds"] for x in d["critical_path"])

    def test_hand_values(self, simple_run_dir):
        """Hand check: wall 54 ms, 3 batches, stall 24/54, decode share 18/54."""
        d = report_dict(analyze(simple_run_dir))
        assert (pytest.approx(0.054), 3, pytest.approx(24 / 54)) == (d["wall_s"], d["batches"], d["stall_fraction"])
        share = {x["stage"]: x["share"] for x in d["critical_path"]}
        assert pytest.approx(18 / 54) == share["decode"]
        assert ("in turn", SCHEMA_VERSION) == (d["pace"]["outcome"], d["schema"])
        assert (pytest.approx(1.8), pytest.approx(2.25)) == (d["at_stake"]["input_free_speedup"],
                                                              d["at_stake"]["step_free_speedup"])
        assert {"count": 1, "cross_rank_view": False} == d["ranks"]
        assert not {"verdict", "verdict_reason"} & set(d)

    def test_infinity_is_one_spelling(self, tmp_path):
        """An infinite speed-up is the string "inf" in the report JSON, as in the what-if JSON; NaN is null."""
        from _synth import step, wait, write_run

        d = report_dict(analyze(write_run(tmp_path / "r", {100: [wait(0, 5, 0), step(5, 5, 0)]})))
        text = json.dumps(d, allow_nan=False)
        assert ("inf" in text, "Infinity" in text, "NaN" in text) == (True, False, False)


class TestOneComputation:
    def test_ceilings_are_replayed_once_for_text_json_and_html(self, simple_run_dir, monkeypatch):
        """Text, JSON and HTML of one Report share one ceilings computation and one replay plan."""
        import pipeprobe.report as rep
        from pipeprobe.html import render_report

        calls = {"ceilings": 0, "plan": 0}
        real_ceilings, real_plan = rep.ceilings, rep.build_plan

        def counting_ceilings(*a, **k):
            calls["ceilings"] += 1
            return real_ceilings(*a, **k)

        def counting_plan(*a, **k):
            calls["plan"] += 1
            return real_plan(*a, **k)

        monkeypatch.setattr(rep, "ceilings", counting_ceilings)
        monkeypatch.setattr(rep, "build_plan", counting_plan)
        r = Report(analyze(simple_run_dir))
        format_report(r), report_dict(r), render_report(r)
        assert {"ceilings": 1, "plan": 1} == calls

    def test_html_shows_the_text_reports_capped_ceilings(self, simple_run_dir, monkeypatch):
        """The page's ceilings are the text report's (the same batch cap), not a second computation."""
        import pipeprobe.report as rep
        from pipeprobe.html import render_report

        monkeypatch.setattr(rep, "REPORT_MAX_BATCHES", 2)
        r = Report(analyze(simple_run_dir))
        c = r.figures("ceilings")[0]
        assert 2 == r.replay_plan.batches
        assert f"{c.stages[0].free_speedup:.2f}x" in render_report(r)


class TestRecordingCost:
    @staticmethod
    def _with_cost(run_dir, cost_ns):
        from pipeprobe import tracefile

        for f in run_dir.glob("spans-*.json"):
            h = tracefile.read_json(f)
            h["span_cost_ns"] = cost_ns
            tracefile.write_json_atomic(f, h)
        return run_dir

    def test_estimate_from_the_measured_per_span_cost(self, simple_run_dir):
        """18 spans at 1 us each add 18 us: 0.03 % of the 54 ms run (arithmetic)."""
        d = report_dict(analyze(self._with_cost(simple_run_dir, 1000.0)))["recording_cost"]
        p = d["processes"][0]
        assert (18, True, pytest.approx(18e-6), pytest.approx(18e-6 / 0.054), []) == (
            p["spans"], d["measured"], p["added_s"], p["wall_share"], d["too_short"])

    def test_stages_too_short_to_time_per_item(self, simple_run_dir):
        """At 200 us a span, stages with a median under 4 ms (20x) are flagged: augment 1 ms and decode 3 ms."""
        a = analyze(self._with_cost(simple_run_dir, 200_000.0))
        text = format_report(a)
        flagged = [x["stage"] for x in report_dict(a)["recording_cost"]["too_short"]]
        assert (["augment", "decode"], True) == (sorted(flagged), "'decode' is too short to time per item" in text)
        from pipeprobe.html import render_report

        page = render_report(a)
        assert (True, True) == ("<h2>What recording cost</h2>" in page, "decode: median 3000.0 us" in page)

    def test_not_measured_says_so(self, simple_run_dir):
        """A run recorded without the measurement says the cost was not measured and estimates nothing."""
        d = report_dict(analyze(simple_run_dir))["recording_cost"]
        assert (False, None) == (d["measured"], d["processes"][0]["span_cost_ns"])
        assert "per-span cost not measured in this run" in format_report(analyze(simple_run_dir))


class TestWarmupAction:
    @staticmethod
    def _two_epochs(tmp_path, restart: bool):
        """2 epochs x 3 batches; the first batch of each epoch waits 20 ms (18 ms of worker start-up), the rest
        2 ms; each wait ends with a 2 ms decode on the epoch's worker; 5 ms steps. Wall 78 ms."""
        from _synth import member, stage, step, wait, write_run

        consumer, workers, t = [], {201: [], 202: []}, 0.0
        for e in range(2):
            pid = 202 if (restart and e == 1) else 201
            for k in range(3):
                b, w = 3 * e + k, (20.0 if k == 0 else 2.0)
                workers[pid].append(stage("decode", t + w - 2, t + w, sample=b))
                consumer += [member(t + w, b, b, epoch=e), wait(t, t + w, b, epoch=e), step(t + w, t + w + 5, b, epoch=e)]
                t += w + 5
        procs = {100: consumer, **{p: r for p, r in workers.items() if r}}
        return write_run(tmp_path / "r", procs, end_ms=t)

    def test_given_when_workers_restart(self, tmp_path):
        """New worker processes in epoch 1: keep them alive; the figure is the one warm-up figure of the
        stalls section (2 x 20 ms less 2 x the 2 ms steady mean = 36 ms; arithmetic)."""
        a = analyze(self._two_epochs(tmp_path, restart=True), warmup_batches=1)
        warm = [x for x in a.actions if x.kind == "warmup"]
        assert ([pytest.approx(0.036)], pytest.approx(0.036)) == ([x.seconds for x in warm], a.stalls.warmup_extra_s)
        assert "0.036 s extra stall" in format_report(a)

    def test_not_given_when_workers_live_on(self, tmp_path):
        """The same waits with one worker process across both epochs: no keep-alive advice."""
        a = analyze(self._two_epochs(tmp_path, restart=False), warmup_batches=1)
        assert [] == [x for x in a.actions if x.kind == "warmup"]
