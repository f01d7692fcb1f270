"""Tests of what-if scenarios (pipeprobe.whatif.scenario, .predict) and the ``pipeprobe whatif`` command.

Outside references: hand-computed schedules of exact synthetic traces;
Amdahl's law (Amdahl 1967) for a serial pipeline, where it holds exactly;
real reruns of the demo (slow).
"""

from __future__ import annotations

import json
import math
import statistics

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import pipeprobe
from pipeprobe.cli import main
from pipeprobe.errors import ScenarioError
from pipeprobe.whatif import JSON_KEYS, parse_factors, sweep, whatif


class TestScenarioChecks:
    @pytest.mark.parametrize(
        "faster,match",
        [
            ({"decod": 2}, "unknown stage 'decod'.*decode"),
            ({"decode": 0}, "must be > 0"),
            ({"decode": -2}, "must be > 0"),
            ({"decode": "fast"}, "must be a number"),
            ({"decode": float("nan")}, "must be a number"),
            ({"decode": True}, "must be a number"),
            ({"decode": None}, "must be a number"),
        ],
    )
    def test_bad_factors_raise_with_advice(self, simple_run_dir, faster, match):
        """Unknown stages and factors that are not numbers > 0 raise ScenarioError saying what to give."""
        with pytest.raises(ScenarioError, match=match):
            whatif(simple_run_dir, faster=faster)

    def test_scenario_error_is_a_value_error(self, simple_run_dir):
        """Callers that only know built-in exceptions still catch a bad scenario."""
        with pytest.raises(ValueError):
            whatif(simple_run_dir, workers=-1)

    def test_offload_needs_a_loader_stage(self, simple_run_dir):
        """Only loader stages can move to the accelerator side."""
        with pytest.raises(ScenarioError, match="not a loader stage"):
            whatif(simple_run_dir, offload={"step": 2})

    def test_inf_means_free(self):
        """'inf' (and 'free') in STAGE=K pairs make the stage cost nothing."""
        assert {"decode": math.inf, "augment": 1.5} == parse_factors(["decode=inf", "augment=1.5"], "faster")

    def test_pair_without_factor_is_refused(self):
        """A pair without '=' gets a message showing the form to use."""
        with pytest.raises(ScenarioError, match="STAGE=FACTOR"):
            parse_factors(["decode"], "faster")


class TestPredictions:
    def test_unchanged_scenario_predicts_the_measured_time(self, simple_run_dir):
        """No change predicts the measured wall time and a speed-up of 1."""
        p = whatif(simple_run_dir)
        assert p.measured_wall_s == pytest.approx(p.predicted_wall_s)
        assert 1.0 == pytest.approx(p.predicted_speedup)

    def test_top_level_function_is_the_same_prediction(self, simple_run_dir):
        """`pipeprobe.whatif(run, ...)` (the function re-exported at the top) is `pipeprobe.whatif.whatif`."""
        run = pipeprobe.load(simple_run_dir)
        by_top = pipeprobe.whatif(run, faster={"decode": math.inf})
        assert whatif(run, faster={"decode": math.inf}).predicted_wall_s == by_top.predicted_wall_s
        assert 1.5 == pytest.approx(by_top.predicted_speedup)

    def test_serial_pipeline_follows_amdahl(self, simple_run_dir):
        """In a serial pipeline Amdahl's law is exact (Amdahl 1967): decode is 18 of 54 ms, free -> 1.5x."""
        p = whatif(simple_run_dir, faster={"decode": math.inf})
        assert 0.036 == pytest.approx(p.predicted_wall_s)
        assert 1.5 == pytest.approx(p.predicted_speedup)
        assert 1.5 == pytest.approx(pipeprobe.amdahl_speedup(18 / 54, math.inf))

    def test_faster_step_counts(self, simple_run_dir):
        """The step is a stage too: a 2x faster step saves 15 of 54 ms."""
        assert 0.039 == pytest.approx(whatif(simple_run_dir, faster={"step": 2}).predicted_wall_s)

    def test_offload_moves_the_stage_to_the_step_side(self, simple_run_dir):
        """Offloading decode 2x faster: the loop still runs it serially, at half its cost (54 - 9 ms)."""
        p = whatif(simple_run_dir, offload={"decode": 2})
        assert 0.045 == pytest.approx(p.predicted_wall_s)
        assert "decode (offloaded)" in p.critical_path

    def test_stall_fraction_and_path(self, simple_run_dir):
        """The prediction reports the stall share and the predicted critical path, shares summing to 1."""
        p = whatif(simple_run_dir, faster={"decode": 2})
        # by hand: 3 x (2 x (1.5 + 1)) ms loading in the wait over 3 x (5 + 10) ms of wall time
        assert 15 / 45 == pytest.approx(p.predicted_stall_fraction)
        assert 1.0 == pytest.approx(sum(p.critical_path.values()))
        assert "step" == p.bottleneck

    def test_sweep_equals_single_calls(self, simple_run_dir):
        """A sweep gives the same predictions as one call per scenario."""
        scenarios = [{"faster": {"decode": 2}}, {"workers": 2}, {"faster": {"augment": math.inf}}]
        got = [p.predicted_wall_s for p in sweep(simple_run_dir, scenarios)]
        assert [whatif(simple_run_dir, **s).predicted_wall_s for s in scenarios] == pytest.approx(got)

    def test_more_workers_for_an_inline_loader(self, simple_run_dir):
        """Moving an in-loop loader to 2 workers overlaps loading with the step (by hand: 8 + 3 x 10 ms)."""
        p = whatif(simple_run_dir, workers=2, prefetch=2)
        assert 0.038 == pytest.approx(p.predicted_wall_s)


class TestJson:
    def test_keys(self, simple_run_dir):
        """The JSON form has the documented keys, and infinities become the string 'inf'."""
        d = whatif(simple_run_dir, faster={"decode": math.inf}, cores=math.inf).to_dict()
        assert set(JSON_KEYS) == set(d)
        assert "inf" == d["scenario"]["faster"]["decode"]
        json.dumps(d, allow_nan=False)


class TestCommand:
    def test_json_output(self, simple_run_dir, capsys):
        """`pipeprobe whatif RUN --faster decode=inf --json` prints one JSON object with the predictions."""
        assert 0 == main(["whatif", str(simple_run_dir), "--faster", "decode=inf", "augment=2", "--json"])
        d = json.loads(capsys.readouterr().out)
        assert 0.033 == pytest.approx(d["predicted_wall_s"])
        assert {"measured_wall_s", "predicted_wall_s", "predicted_speedup", "predicted_stall_fraction",
                "critical_path"} <= set(d)

    def test_text_output(self, simple_run_dir, capsys):
        """Without --json the command prints a short readable summary."""
        assert 0 == main(["whatif", str(simple_run_dir), "--workers", "2", "--prefetch", "2", "--cores", "inf"])
        out = capsys.readouterr().out
        assert "predicted wall" in out and "workers=2" in out

    @pytest.mark.parametrize(
        "args",
        [
            ["--faster", "decod=2"],
            ["--faster", "decode=0"],
            ["--faster", "decode=abc"],
            ["--faster", "decode"],
            ["--workers", "two"],
            ["--prefetch", "0"],
            ["--cores", "-1"],
            ["--offload", "step=2"],
            ["--policy", "random"],
        ],
    )
    def test_bad_input_is_one_line_and_exit_2(self, simple_run_dir, capsys, args):
        """Bad scenario input gets one error line, no traceback, exit code 2."""
        with pytest.raises(SystemExit) as e:
            raise SystemExit(main(["whatif", str(simple_run_dir), *args]))
        assert 2 == e.value.code
        err = capsys.readouterr().err.strip()
        assert 1 == len(err.splitlines()) and "Traceback" not in err

    def test_missing_run_is_exit_2(self, tmp_path, capsys):
        """A missing run folder is bad input, not a crash."""
        assert 2 == main(["whatif", str(tmp_path / "nothing")])
        assert 1 == len(capsys.readouterr().err.strip().splitlines())


def _demo_run(tmp_path, name, **kwargs):
    """Run the demo in a fresh process with one BLAS thread (the step's threads would otherwise fight
    the loader workers for the 2 cores in ways no CPU-time trace shows)."""
    import os
    import subprocess
    import sys

    from _synth import wait_for_quiet_cpu

    wait_for_quiet_cpu(max_wait_s=20.0)  # other jobs on the machine perturb timing runs
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1", MKL_NUM_THREADS="1")
    out = tmp_path / name
    code = ("import json, sys; from pipeprobe.demo import run_demo; "
            "run_demo(out=sys.argv[1], quiet=True, **json.loads(sys.argv[2]))")
    subprocess.run([sys.executable, "-c", code, str(out), json.dumps(kwargs)], env=env, check=True, timeout=120)
    return pipeprobe.load(out)


@pytest.mark.slow
class TestRealRerun:
    def test_prefetch_prediction_matches_a_rerun(self, tmp_path):
        """Small version of bench/bench_predict.py: prefetch 1 -> 4 on the demo, predicted vs. rerun
        within 30 % (medians of three runs each, alternating, each started on a quiet machine when
        there is one within 20 s; the full benchmark aims at 10 %). A machine loaded by other work can
        stretch one side's runs: the whole comparison is made again at most twice before judging."""
        errors = []
        for attempt in range(3):
            a, b = [], []
            for i in range(3):
                a.append(_demo_run(tmp_path, f"a{attempt}-{i}", batches=24, workers=2, prefetch=1))
                b.append(_demo_run(tmp_path, f"b{attempt}-{i}", batches=24, workers=2, prefetch=4))
            predicted = statistics.median(
                whatif(run, prefetch=4, recorded_prefetch=1).predicted_wall_s for run in a
            )
            measured = statistics.median(run.wall_s for run in b)
            errors.append(abs(predicted / measured - 1))
            if errors[-1] <= 0.30:
                break
        assert min(errors) <= 0.30, errors


class TestImportForms:
    def test_function_and_subpackage_both_reachable(self):
        """`pipeprobe.whatif(...)` is the function while `from pipeprobe.whatif(.plan) import ...` still finds the
        subpackage: the documented resolution of the shared name."""
        import importlib

        from pipeprobe.whatif import Prediction
        from pipeprobe.whatif.plan import build_plan

        package = importlib.import_module("pipeprobe.whatif")
        assert (whatif, Prediction, build_plan) == (pipeprobe.whatif, package.Prediction, package.plan.build_plan)

    def test_merge_layer_does_not_import_the_whatif_layer(self):
        """load.py stands below the what-if layer (no load -> whatif -> load cycle): it imports nothing from it."""
        import ast
        from pathlib import Path

        tree = ast.parse((Path(pipeprobe.__file__).parent / "load.py").read_text())
        imported = [n.module or "" for n in ast.walk(tree) if isinstance(n, ast.ImportFrom)]
        imported += [a.name for n in ast.walk(tree) if isinstance(n, ast.Import) for a in n.names]
        assert [] == [m for m in imported if "whatif" in m or "replay" in m or "ceilings" in m]


class TestAbsurdNumbers:
    @pytest.mark.parametrize(
        "kwargs,limit",
        [
            ({"workers": 10_000_000}, "from 0 to 1024"),
            ({"workers": 10**9}, "from 0 to 1024"),
            ({"prefetch": 10**9}, "from 1 to 100000"),
            ({"recorded_workers": 10**9}, "from 0 to 1024"),
            ({"recorded_prefetch": 10**12}, "from 1 to 100000"),
            ({"cores": 1e12}, "from 0.01 to 100000"),
            ({"cores": 1e-6}, "from 0.01 to 100000"),
            ({"faster": {"decode": 5e-324}}, "at least 0.001"),
            ({"faster": {"decode": 1e300}}, "write inf"),
            ({"offload": {"decode": 1e-9}}, "at least 0.001"),
        ],
    )
    def test_out_of_range_is_refused_naming_the_limit(self, simple_run_dir, kwargs, limit):
        """Counts and factors past the documented limits are refused at once with a one-line error naming them."""
        with pytest.raises(ScenarioError, match=limit) as e:
            whatif(simple_run_dir, **kwargs)
        assert 1 == len(str(e.value).splitlines())

    def test_a_slower_stage_predicts_a_slow_down(self, simple_run_dir):
        """A factor below 1 makes the stage slower: decode 1000x slower in a serial run (18 of 54 ms) gives
        54 / (36 + 18000) ms, by hand (Amdahl 1967 with factor 1/1000)."""
        p = whatif(simple_run_dir, faster={"decode": 0.001})
        assert pipeprobe.amdahl_speedup(18 / 54, 0.001) == pytest.approx(p.predicted_speedup)
        assert p.predicted_speedup < 1

    def test_the_largest_factor_stays_below_free(self, simple_run_dir):
        """A million times faster is just short of free (Amdahl 1967: 1 / (36/54 + 18/54 / 1e6))."""
        p = whatif(simple_run_dir, faster={"decode": 1e6})
        assert pipeprobe.amdahl_speedup(18 / 54, 1e6) == pytest.approx(p.predicted_speedup)

    @pytest.mark.parametrize(
        "args",
        [
            ["--workers", "10000000"],
            ["--recorded-workers", "1000000000"],
            ["--prefetch", "1000000000"],
            ["--cores", "1e12"],
            ["--faster", "decode=5e-324"],
            ["--faster", "decode=1e300"],
            ["--prefetch-per-worker", "0"],
            ["--prefetch", "4", "--prefetch-per-worker", "2"],
        ],
    )
    def test_command_line_refuses_them_with_exit_2(self, simple_run_dir, capsys, args):
        """On the command line the same limits give one error line and exit code 2."""
        assert 2 == main(["whatif", str(simple_run_dir), *args])
        err = capsys.readouterr().err.strip()
        assert 1 == len(err.splitlines()) and "Traceback" not in err


class TestCommandLineForms:
    def test_options_before_the_run_folder(self, simple_run_dir, capsys):
        """`pipeprobe whatif --faster decode=inf RUN` works like `pipeprobe whatif RUN --faster decode=inf`."""
        assert 0 == main(["whatif", "--faster", "decode=inf", "augment=2", str(simple_run_dir), "--json"])
        before = json.loads(capsys.readouterr().out)
        assert 0 == main(["whatif", str(simple_run_dir), "--faster", "decode=inf", "augment=2", "--json"])
        assert json.loads(capsys.readouterr().out) == before

    def test_plain_option_before_the_run_folder(self, simple_run_dir, capsys):
        """`pipeprobe whatif --workers 2 RUN` works."""
        assert 0 == main(["whatif", "--workers", "2", "--prefetch", "2", str(simple_run_dir)])
        assert "workers=2" in capsys.readouterr().out

    def test_missing_run_folder_is_one_line(self, capsys):
        """Without a run folder the command says how to give one and exits 2."""
        assert 2 == main(["whatif", "--faster", "decode=2"])
        assert "give the run folder" in capsys.readouterr().err

    def test_text_shows_the_recorded_configuration(self, tmp_path, capsys):
        """The text output states the workers, prefetch and cores the prediction assumed."""
        from _synth import record_pool_run

        run_dir = record_pool_run(tmp_path / "run", workers=2, prefetch=4, epochs=1, batches_per_epoch=6)
        assert 0 == main(["whatif", str(run_dir), "--workers", "3", "--recorded-prefetch", "4"])
        recorded = next(line for line in capsys.readouterr().out.splitlines() if "recorded:" in line)
        assert recorded.strip().startswith("recorded: 2 workers, prefetch 4 batches in flight, ")
        assert " cores" in recorded

    def test_per_worker_prefetch_is_torch_prefetch_factor(self, simple_run_dir, capsys):
        """--prefetch-per-worker K means workers x K batches in flight (torch DataLoader's prefetch_factor,
        common practice: each worker keeps prefetch_factor batches loaded ahead)."""
        assert 0 == main(["whatif", str(simple_run_dir), "--workers", "3", "--prefetch-per-worker", "2", "--json"])
        assert 6 == json.loads(capsys.readouterr().out)["scenario"]["prefetch"]

    def test_recorded_per_worker_prefetch(self, tmp_path, capsys):
        """--recorded-prefetch-per-worker K sets the recorded depth to recorded workers x K."""
        from _synth import record_pool_run

        run_dir = record_pool_run(tmp_path / "run", workers=2, prefetch=4, epochs=1, batches_per_epoch=6)
        assert 0 == main(["whatif", str(run_dir), "--recorded-prefetch-per-worker", "2", "--json"])
        recorded = json.loads(capsys.readouterr().out)["recorded"]
        assert (2, 4, False) == (recorded["workers"], recorded["prefetch"], recorded["prefetch_inferred"])


class TestModelCheck:
    def test_a_run_the_replay_reproduces_is_not_flagged(self, simple_run_dir):
        """The serial synthetic run replays to its measured 54 ms: no flag, a miss of 0."""
        check = whatif(simple_run_dir, workers=2).model_check
        assert (False, 0.0) == (check.flagged, pytest.approx(check.miss, abs=1e-9))

    def test_a_miss_over_five_per_cent_is_said_in_text_and_json(self, capsys):
        """When the unchanged replay misses the measured wall time by more than 5 %, the prediction says so,
        with a likely cause, in its text and JSON (the replay of this plan is 0.13 s by hand; measured 0.15 s)."""
        from dataclasses import replace

        from pipeprobe.whatif import format_prediction
        from pipeprobe.whatif.plan import plan_from_durations

        plan = plan_from_durations([0.03] * 10, [0.01] * 10, workers=3, prefetch=3, cores=4)
        p = whatif(replace(plan, measured_wall_s=0.15), workers=4)
        assert 0.13 / 0.15 - 1 == pytest.approx(p.model_check.miss)
        assert p.model_check.flagged and p.model_check.likely_cause
        assert "check: the replay of the recorded configuration is -13.3 % off the measured wall time" in format_prediction(p)
        assert p.to_dict()["model_check"]["flagged"] is True


class TestMonotoneSpeedups:
    @settings(max_examples=50, deadline=None)
    @given(st.integers(4, 30).flatmap(lambda n: st.tuples(
        st.lists(st.floats(1e-4, 0.02), min_size=n, max_size=n), st.lists(st.floats(1e-4, 0.02), min_size=n, max_size=n),
        st.lists(st.floats(0.0, 0.02), min_size=n, max_size=n), st.lists(st.floats(0.0, 1.0), min_size=n, max_size=n),
        st.integers(1, 4), st.integers(1, 6), st.sampled_from([1, 2, 4]), st.sampled_from(["first-free", "round-robin"]))))
    def test_a_faster_stage_never_predicts_a_slower_run(self, p):
        """Speed-ups grow with the factor: 1x <= 2x <= 4x <= free (issue 11; the property the ceilings table
        relies on), on generated pipelines with CPU sharing and both policies."""
        from pipeprobe.whatif.plan import plan_from_durations

        a, b, step, cpu, workers, prefetch, cores, policy = p
        stages = {"a": a, "b": b}
        total = [x + y for x, y in zip(a, b, strict=True)]
        plan = plan_from_durations(None, step, stages=stages, task_cpu_s=[t * c for t, c in zip(total, cpu, strict=True)],
                                   workers=workers, prefetch=prefetch, cores=cores, policy=policy)
        from pipeprobe.whatif.engine import replay

        walls = [replay(plan, faster={"a": k}).wall_s for k in (1, 2, 4, math.inf)]
        assert sorted(walls, reverse=True) == pytest.approx(walls, rel=1e-9)

    def test_a_slower_prediction_says_why(self, simple_run_dir):
        """A change that slows the run names the reason in the text (here: a stage made slower)."""
        from pipeprobe.whatif import format_prediction

        text = format_prediction(whatif(simple_run_dir, faster={"decode": 0.5}))
        assert "slower because decode is 2x slower" in text


class TestScenarioObject:
    def test_reads_like_the_earlier_dict(self, simple_run_dir):
        """Code written against the dict form keeps working: p.scenario["workers"] and .get()."""
        p = whatif(simple_run_dir, workers=2)
        assert (2, 2, None, None) == (p.scenario["workers"], p.scenario.workers, p.scenario.get("prefetch"),
                                      p.scenario.get("no such field"))


def _decode_augment_plan(workers: int = 1):
    """One worker (or the loop itself) decodes batches in 10 and 30 ms by turns (mean 20) and augments each in
    40 ms, all CPU; the step takes 1 ms; 4 cores, so nothing contends."""
    from pipeprobe.whatif.plan import plan_from_durations

    dec, aug = [0.01, 0.03] * 5, [0.04] * 10
    return plan_from_durations(None, [0.001] * 10, stages={"decode": dec, "augment": aug},
                               task_cpu_s=[d + a for d, a in zip(dec, aug)], step_cpu_s=[0.001] * 10,
                               workers=workers, prefetch=2, cores=4)


class TestLoadRange:
    def test_freeing_the_cores_gives_a_range_below(self):
        """augment free takes 0.40 of the 0.61 CPU seconds off the cores (66 %): one worker decodes in turn, so
        the prediction is 10 x 20 ms + the last 1 ms step = 0.201 s, and the low end the same at the quickest
        tenth of decodes (10 ms): 0.101 s (hand-worked, a serial pipeline)."""
        p = whatif(_decode_augment_plan(), faster={"augment": math.inf})
        assert [pytest.approx(0.201), pytest.approx(0.101), pytest.approx(0.201)] == [p.predicted_wall_s,
                                                                                      *p.wall_range_s]
        assert "66 % of the recorded CPU seconds off the cores" in p.range_reason

    def test_small_change_keeps_one_number(self):
        """augment 1.1x faster moves 6 % of the CPU seconds, under the 25 % from which a range is given."""
        assert None is whatif(_decode_augment_plan(), faster={"augment": 1.1}).wall_range_s

    def test_workers_beside_the_step_give_a_range_above(self):
        """Loading moved from the training loop into 2 workers beside the step puts its CPU seconds onto the cores
        the step shares: the prediction is the low end, the slowest tenth of batches the high end."""
        p = whatif(_decode_augment_plan(workers=0), workers=2, prefetch=4)
        low, high = p.wall_range_s
        assert (pytest.approx(p.predicted_wall_s), True) == (low, high > p.predicted_wall_s)
        assert "onto the cores beside the step" in p.range_reason

    def test_range_in_text_and_json(self):
        """The range and its reason show in the text and the JSON, as the thread range does."""
        from pipeprobe.whatif.predict import format_prediction

        p = whatif(_decode_augment_plan(), faster={"augment": math.inf})
        assert "range: 0.101 s to 0.201 s" in format_prediction(p)
        d = json.loads(json.dumps(p.to_dict()))
        assert ([pytest.approx(0.101), pytest.approx(0.201)], p.range_reason) == (d["wall_range_s"], d["range_reason"])

    def test_workers_beside_a_step_pool_recorded_alone_give_a_range(self):
        """A step that ran on 2 threads with 2 cores to itself, with 2 workers added: a range above the prediction
        even though the light loader moves little CPU (a pool of threads that meet at barriers loses its speed-up
        on oversubscribed cores; Ousterhout 1982)."""
        from dataclasses import replace

        from pipeprobe.threads import ThreadCheck
        from pipeprobe.whatif.plan import plan_from_durations

        plan = plan_from_durations([0.002] * 20, [0.04] * 20, task_cpu_s=[0.002] * 20, step_cpu_s=[0.04] * 20,
                                   workers=0, cores=2)
        plan = replace(plan, step_width=2.0, threads=ThreadCheck("the loader ran no worker processes", cores=2,
                                                                 step_threads=2))
        p = whatif(plan, workers=2, prefetch=4)
        low, high = p.wall_range_s
        assert (pytest.approx(p.predicted_wall_s), True) == (low, high > p.predicted_wall_s)
        assert "workers join a step that ran on 2 threads" in p.range_reason
