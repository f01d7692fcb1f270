"""The run report: text that fits 100 columns, verdict first, and the documented JSON."""

from __future__ import annotations

import io
import json

import pytest

from pipeprobe.analysis import analyze
from pipeprobe.report import (
    JSON_SCHEMA,
    SECTIONS,
    WIDTH,
    Section,
    add_section,
    format_report,
    print_close_report,
    report_dict,
)

REQUIRED = ["wall_s", "batches", "stall_fraction", "steady_stall_fraction", "verdict", "critical_path", "stages",
            "slowest_samples"]


class TestText:
    @pytest.mark.parametrize("fixture", ["simple_run_dir", "analysis_pool_run"])
    def test_fits_width_and_leads_with_verdict(self, fixture, request):
        """Every line fits 100 columns; the verdict comes before the details; three actions at most."""
        a = analyze(request.getfixturevalue(fixture))
        text = format_report(a)
        lines = text.splitlines()
        assert WIDTH >= max(len(x) for x in lines)
        assert a.verdict.word.upper() in "\n".join(lines[:4])
        assert "stall" in text and "critical path" in text and "top actions" in text
        assert 0 == sum(line.startswith("  4. ") for line in lines)

    def test_hand_numbers_appear(self, simple_run_dir):
        """The stall fraction and the critical-path shares printed are the hand-checked ones."""
        text = format_report(analyze(simple_run_dir))
        assert "44.4 % of wall" in text
        assert "decode                        0.018 s  33.3 %" in text

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
            assert text.index("critical path") < text.index("extra section line") < text.index("top actions")
            assert 1 == report_dict(a)["extra"]
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
        assert "input-bound" == d["verdict"]
