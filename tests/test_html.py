"""The one-file HTML report: escaping, self-containment, the CLI option, and a real browser."""

from __future__ import annotations

import dataclasses
import os
import re
import shutil
import tempfile
from html.parser import HTMLParser
from pathlib import Path
from typing import Any

import pytest
from _synth import simple_pipeline, stage, step, wait, write_run

from pipeprobe import html as ppe_html
from pipeprobe.cli import main

EVIL = "<script>alert(1)</script>"
CHROMIUM_FLAGS = [
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
]


def _evil_rows() -> dict[int, list]:
    """The simple pipeline with its stages renamed to markup and an ampersand."""
    rows = []
    for row in simple_pipeline()[100]:
        if row.kind == "stage":
            row = dataclasses.replace(row, stage=EVIL if row.stage == "decode" else 'a&b "c"')
        rows.append(row)
    return {100: rows}


@pytest.fixture(scope="module")
def html_evil_run_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A run whose stage names are ``<script>alert(1)</script>`` and ``a&b "c"``, in a folder named with markup."""
    return write_run(tmp_path_factory.mktemp("evil") / "run <i>x</i>", _evil_rows())


@pytest.fixture(scope="module")
def html_simple(tmp_path_factory: pytest.TempPathFactory) -> tuple[Any, str]:
    """The conftest's simple run (3 batches, 8 ms waits, 10 ms steps), analysed, and its page."""
    from pipeprobe.analysis import analyze

    a = analyze(write_run(tmp_path_factory.mktemp("simple") / "simple", simple_pipeline()))
    return a, ppe_html.render_report(a)


class _Collect(HTMLParser):
    """Collects tags and their attributes with the standard library's HTML parser."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def _parse(page: str) -> _Collect:
    p = _Collect()
    p.feed(page)
    p.close()
    return p


class TestEscaping:
    def test_markup_in_stage_names_shows_as_text(self, html_evil_run_dir: Path) -> None:
        """A stage named <script>...</script> is written escaped, so the parser sees text, not a tag."""
        page = ppe_html.render_report(html_evil_run_dir)
        assert EVIL not in page
        assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page
        parsed = _parse(page)
        assert [] == [t for t, _ in parsed.tags if t in ("script", "i")]
        text = "".join(parsed.text)
        assert EVIL in text  # the parser decodes the entities back into the visible text
        assert 'a&b "c"' in text
        assert "run <i>x</i>" in text


    def test_control_characters_show_as_escapes(self, tmp_path: Path) -> None:
        """A stage named with a terminal escape shows as visible text in the page, never as a raw control byte."""
        rows = [dataclasses.replace(r, stage="dec\x1b[2Jode") if r.stage == "decode" else r for r in simple_pipeline()[100]]
        import warnings

        with warnings.catch_warnings():  # matplotlib may lack a glyph for ESC in the chart labels
            warnings.simplefilter("ignore")
            page = ppe_html.render_report(write_run(tmp_path / "r", {100: rows}))
        assert (False, True) == ("\x1b" in page, "dec\\x1b[2Jode" in page)


class TestSelfContained:
    def test_no_script_and_no_network_urls(self, html_simple: tuple[Any, str]) -> None:
        """Every src/href is a data: URI or an in-page anchor; there is no <script> and no http(s) URL."""
        page = html_simple[1]
        parsed = _parse(page)
        assert "script" not in [t for t, _ in parsed.tags]
        links = [v for _, a in parsed.tags for k, v in a.items() if k in ("src", "href") and v is not None]
        assert links, "the report embeds its pictures"
        assert all(v.startswith("data:image/png;base64,") or v.startswith("#") for v in links)
        assert "http://" not in page and "https://" not in page

    def test_browser_is_told_to_fetch_nothing(self, html_simple: tuple[Any, str]) -> None:
        """A Content-Security-Policy allows only inline style and data: images."""
        parsed = _parse(html_simple[1])
        csp = [a.get("content") for t, a in parsed.tags if t == "meta" and a.get("http-equiv") == "Content-Security-Policy"]
        assert ["default-src 'none'; img-src data:; style-src 'unsafe-inline'"] == csp

    def test_key_figures_are_in_the_page(self, html_simple: tuple[Any, str]) -> None:
        """Verdict, stall share, critical-path rows and the pictures are all in the page."""
        a, page = html_simple
        text = "".join(_parse(page).text)
        # by hand: 3 waits of 8 ms in a 54 ms run = 44.4 % stalled
        assert "44.4 %" in text
        assert "input and step set the pace in turn" in text
        for heading in ("Stalls", "Critical path", "What a faster stage would buy", "Stages", "Slowest samples",
                        "Timeline"):
            assert heading in text
        assert {"decode", "augment", "step"} <= set(a.critical.shares["label"])
        for label in ("decode", "augment", "step"):
            assert label in text


class TestLayout:
    def test_page_leads_with_the_pace_and_what_a_change_buys(self, html_simple: tuple[Any, str]) -> None:
        """The title and the opening box name what paces the run; the first sections are what to try and buy."""
        _, page = html_simple
        parsed = _parse(page)
        text = "".join(parsed.text)
        assert text.index("input and step set the pace in turn") < text.index("What to try first") < text.index(
            "What a faster stage would buy") < text.index("Stalls")
        assert "<title>What paces simple: input and step set the pace in turn</title>" in page

    def test_same_stage_columns_as_the_text_report(self, html_simple: tuple[Any, str]) -> None:
        """The stage table's columns come in the text report's order."""
        a, page = html_simple
        from pipeprobe.report import format_report

        text_head = next(line for line in format_report(a).splitlines() if line.startswith("stages "))
        html_head = page[page.index("<h2>Stages</h2>"):].split("</thead>")[0]
        titles = re.findall(r"<th[^>]*>([^<]*)</th>", html_head)
        assert " ".join(text_head.split()) == " ".join(["stages"] + titles[1:])

    def test_no_zero_stakes(self) -> None:
        """An action with nothing at stake shows no '(0.00 ms at stake)'."""
        from types import SimpleNamespace

        from pipeprobe.analysis import Action

        page = ppe_html.actions_html(SimpleNamespace(actions=(Action("workers", "Do not add workers: busy", 0.0),)),
                                     None)
        assert ("Do not add workers: busy", False) == ("Do not add workers: busy" if "busy" in page else "",
                                                       "at stake" in page)


class TestWriting:
    def test_a_folder_is_refused(self, simple_run_dir: Path, tmp_path: Path) -> None:
        """--html naming a folder: OutputFileError, the folder untouched."""
        with pytest.raises(ppe_html.OutputFileError, match="it is a folder"):
            ppe_html.write_report(simple_run_dir, tmp_path)
        assert [] == [p.name for p in tmp_path.iterdir() if p.name.endswith(".tmp")]

    def test_a_link_is_not_followed(self, simple_run_dir: Path, tmp_path: Path) -> None:
        """A link at the target (here to /dev/null) is refused and left as it is; nothing is written through it."""
        target = tmp_path / "r.html"
        target.symlink_to("/dev/null")
        with pytest.raises(ppe_html.OutputFileError, match="a link"):
            ppe_html.write_report(simple_run_dir, target)
        assert ("/dev/null", []) == (os.readlink(target), [p.name for p in tmp_path.iterdir() if p.name not in ("r.html", "simple")])

    def test_a_link_at_the_old_temporary_name_is_not_followed(self, simple_run_dir: Path, tmp_path: Path) -> None:
        """A link planted at ``F.tmp`` is neither followed nor used: the page goes to a fresh name."""
        victim = tmp_path / "victim"
        victim.write_text("keep")
        (tmp_path / "r.html.tmp").symlink_to(victim)
        ppe_html.write_report(simple_run_dir, tmp_path / "r.html")
        assert ("keep", True) == (victim.read_text(), (tmp_path / "r.html").read_text().startswith("<!DOCTYPE"))

    def test_an_old_report_is_replaced(self, simple_run_dir: Path, tmp_path: Path) -> None:
        """A regular file at the target is replaced by the new page, readable by others as a new file would be."""
        target = tmp_path / "r.html"
        target.write_text("old")
        ppe_html.write_report(simple_run_dir, target)
        umask = os.umask(0)
        os.umask(umask)
        assert (True, 0o666 & ~umask) == (target.read_text().startswith("<!DOCTYPE"), target.stat().st_mode & 0o777)


class TestCommandLine:
    def test_html_to_a_folder_is_one_line_exit_2(self, simple_run_dir: Path, tmp_path: Path,
                                                 capsys: pytest.CaptureFixture) -> None:
        """``report R --html SOME_FOLDER``: one line naming the problem, exit 2, no traceback."""
        assert 2 == main(["report", str(simple_run_dir), "--html", str(tmp_path)])
        err = capsys.readouterr().err
        assert (1, True, False) == (len(err.strip().splitlines()), "folder" in err, "Traceback" in err)

    def test_html_on_a_read_only_folder_is_one_line_exit_2(self, simple_run_dir: Path, tmp_path: Path,
                                                           capsys: pytest.CaptureFixture, monkeypatch) -> None:
        """A folder that cannot be written (read-only file system: EROFS, simulated) gives one line, exit 2."""
        import errno

        def read_only(*a, **k):
            raise OSError(errno.EROFS, "Read-only file system")

        monkeypatch.setattr(ppe_html.tempfile, "mkstemp", read_only)
        assert 2 == main(["report", str(simple_run_dir), "--html", str(tmp_path / "r.html")])
        err = capsys.readouterr().err
        assert (1, True) == (len(err.strip().splitlines()), "read-only" in err)

    def test_report_writes_html(self, simple_run_dir: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
        """``pipeprobe report RUN --html FILE`` writes the page and still prints the text report."""
        out = tmp_path / "report.html"
        assert 0 == main(["report", str(simple_run_dir), "--html", str(out)])
        assert out.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
        captured = capsys.readouterr()
        assert "  pace  " in captured.out
        assert f"pipeprobe: wrote {out}\n" == captured.err

    def test_missing_output_folder_is_one_line_exit_2(self, simple_run_dir: Path, tmp_path: Path,
                                                      capsys: pytest.CaptureFixture) -> None:
        """An HTML path in a folder that does not exist gives one line saying so, and exit code 2."""
        assert 2 == main(["report", str(simple_run_dir), "--html", str(tmp_path / "no" / "r.html")])
        err = capsys.readouterr().err
        assert 1 == len(err.strip().splitlines())
        assert "does not exist" in err and "Traceback" not in err


def _chromium() -> tuple[str, str] | None:
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    driver = shutil.which("chromedriver")
    return (browser, driver) if browser and driver else None


@pytest.mark.skipif(_chromium() is None, reason="Chromium or chromedriver is not installed "
                    "(Debian: apt-get install -y chromium chromium-driver); the in-browser check cannot run")
class TestInChromium:
    def test_page_loads_clean_and_shows_the_key_figures(self, html_evil_run_dir: Path, tmp_path: Path) -> None:
        """In headless Chromium the page logs no console error, loads nothing from the network, and shows the figures."""
        webdriver = pytest.importorskip("selenium.webdriver", reason="selenium is not installed (pip install selenium)")
        from selenium.webdriver.chrome.service import Service
        from selenium.webdriver.common.by import By

        from pipeprobe.analysis import analyze

        a = analyze(html_evil_run_dir)
        page = ppe_html.write_report(a, tmp_path / "report.html")
        browser, driver_path = _chromium()
        opts = webdriver.ChromeOptions()
        opts.binary_location = browser
        for flag in CHROMIUM_FLAGS:
            opts.add_argument(flag)
        profile = tempfile.mkdtemp(prefix="pp-chromium-")
        opts.add_argument(f"--user-data-dir={profile}")
        opts.set_capability("goog:loggingPrefs", {"browser": "ALL", "performance": "ALL"})
        drv = webdriver.Chrome(service=Service(driver_path), options=opts)
        try:
            drv.get(page.as_uri())
            console = drv.get_log("browser")
            assert [] == [e for e in console if e["level"] in ("SEVERE", "ERROR")]
            requests = [e["message"] for e in drv.get_log("performance") if "Network.requestWillBeSent" in e["message"]]
            assert [] == [m for m in requests if '"url":"http' in m.replace(" ", "")]
            body = drv.find_element(By.TAG_NAME, "body").text
            assert "input and step set the pace in turn" in body
            assert f"{100 * a.stalls.fraction:.1f} %" in body
            assert EVIL in body  # shown as text, not run
            assert 0 == len(drv.find_elements(By.TAG_NAME, "script"))
            images = drv.find_elements(By.TAG_NAME, "img")
            assert len(images) >= 4
            widths = [int(img.get_property("naturalWidth")) for img in images]
            assert all(w > 100 for w in widths), widths
            headings = [h.text for h in drv.find_elements(By.TAG_NAME, "h2")]
            assert {"Stalls", "Critical path", "What a faster stage would buy", "Slowest samples",
                    "Timeline"} <= set(headings)
        finally:
            drv.quit()
            shutil.rmtree(profile, ignore_errors=True)
        assert os.path.getsize(page) > 10_000


class TestStageDurationLabels:
    def test_slowest_span_labels_never_overlap(self, tmp_path: Path) -> None:
        """Three slowest decode spans of almost equal length (and the one step) get numbers that do not overlap."""
        from matplotlib.text import Annotation

        from pipeprobe import load, plot

        rows = [stage("decode", 2 * i, 2 * i + (1.99 if i < 3 else 0.5) - 0.001 * i, sample=i, batch=0, epoch=0)
                for i in range(30)]
        rows += [wait(0, 60, 0), step(60, 61, 0)]
        ax = plot.draw_stage_durations(load(write_run(tmp_path / "r", {100: rows})))
        from matplotlib.backends.backend_agg import FigureCanvasAgg

        renderer = FigureCanvasAgg(ax.figure).get_renderer()
        boxes = [t.get_window_extent(renderer) for t in ax.texts if isinstance(t, Annotation)]
        overlapping = [(i, j) for i in range(len(boxes)) for j in range(i + 1, len(boxes)) if boxes[i].overlaps(boxes[j])]
        assert (4, []) == (len(boxes), overlapping)  # decode 3, step 1


class TestModelCheckOnThePage:
    def test_ceilings_say_a_replay_that_misses_the_run(self):
        """The page's ceilings carry the model check's sentence when the unchanged replay misses by over 5 %."""
        from dataclasses import replace

        from pipeprobe.whatif.ceilings import ceilings
        from pipeprobe.whatif.plan import plan_from_durations

        plan = plan_from_durations([0.03] * 10, [0.01] * 10, workers=3, prefetch=3, cores=4)
        missed = ppe_html.ceilings_html((ceilings(replace(plan, measured_wall_s=0.15)), None), ppe_html._Page(None, 40))
        met = ppe_html.ceilings_html((ceilings(replace(plan, measured_wall_s=0.13)), None), ppe_html._Page(None, 40))
        sentence = "the replay of the recorded configuration is -13.3 % off the measured wall time"
        assert (True, False) == (sentence in missed, "off the measured wall time" in met)
