"""The HTML report: valid images, numbers that equal the ledger's, and a page that degrades while a campaign runs.

Campaigns come from ``tests/test_api.py``: written straight into a ledger (fast, no Prefect) or run
through the real flow once per session. Every report is checked the same way (:func:`check_report`):
each image it references exists and is a real, non-empty PNG, no image is left over from an
earlier report, no section failed, and the caution is there.
"""

from __future__ import annotations

import os
import re
import shutil
import struct
import subprocess
from html.parser import HTMLParser
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml

from sortie.api import open_campaign
from sortie.ledger import DesignRow, Ledger, ledger_path
from sortie.report import CAUTION, write_report
from tests.conftest import ROOT
from tests.test_api import finished_campaign, simulate_campaign, sled_config, snapshot_at

pytestmark = pytest.mark.slow  # every report fits surrogates and draws figures: seconds each

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


class _Page(HTMLParser):
    """What the tests read from a report: images, tables (cells with their attributes), body attributes, text."""

    def __init__(self) -> None:
        super().__init__()
        self.images: list[str] = []
        self.tables: list[tuple[str, list[list[tuple[dict[str, str], str]]]]] = []
        self.body: dict[str, str] = {}
        self.text: list[str] = []
        self._cell: tuple[dict[str, str], list[str]] | None = None

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = {k: v or "" for k, v in attrs}
        if tag == "img":
            self.images.append(a["src"])
        elif tag == "body":
            self.body = a
        elif tag == "table":
            self.tables.append((a.get("class", ""), []))
        elif tag == "tr" and self.tables:
            self.tables[-1][1].append([])
        elif tag in ("td", "th"):
            self._cell = (a, [])

    def handle_endtag(self, tag: str) -> None:
        if tag in ("td", "th") and self._cell is not None and self.tables:
            self.tables[-1][1][-1].append((self._cell[0], "".join(self._cell[1]).strip()))
            self._cell = None

    def handle_data(self, data: str) -> None:
        self.text.append(data)
        if self._cell is not None:
            self._cell[1].append(data)

    @property
    def plain(self) -> str:
        return " ".join(" ".join(self.text).split())


def check_report(index: Path) -> _Page:
    """Parse a report and check what every report must satisfy."""
    assert index.name == "index.html" and index.is_file()
    page = _Page()
    page.feed(index.read_text(encoding="utf-8"))
    for src in page.images:
        assert "/" not in src and not src.startswith(("http", "data:")), "images sit beside index.html"
        path = index.parent / src
        assert path.is_file(), f"{src} is referenced but missing"
        data = path.read_bytes()
        assert data[:8] == PNG_SIGNATURE, f"{src} is not a PNG"
        assert data[12:16] == b"IHDR"
        width, height = struct.unpack(">II", data[16:24])
        assert width >= 400 and height >= 250, f"{src} is {width}x{height}"
        assert len(data) > 10_000, f"{src} is suspiciously small ({len(data)} bytes)"
    assert sorted(p.name for p in index.parent.glob("*.png")) == sorted(page.images), "no stale or unreferenced PNG"
    assert len(set(page.images)) == len(page.images)
    assert "could not be drawn" not in page.plain
    assert CAUTION in page.plain
    return page


def top_table(page: _Page) -> list[dict[str, tuple[str, str]]]:
    """The top-designs table (the first of class 'designs'): per row, column -> (data-value, shown text)."""
    _, rows = next(t for t in page.tables if t[0] == "designs")
    header = [text for _, text in rows[0]]
    return [{col: (attrs.get("data-value", ""), text) for col, (attrs, text) in zip(header, row, strict=True)}
            for row in rows[1:]]


def assert_top_designs_equal_the_ledger(page: _Page, directory: Path) -> None:
    view = open_campaign(directory)
    cfg = view.config
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        designs = {d.id: d for d in ledger.designs()}
    rows = top_table(page)
    ranked = [r for r in rows if r["rank"][1] != "ref."]
    done = [d for d in designs.values() if d.status == "done"]
    sign = 1.0 if cfg.goal.sense == "minimize" else -1.0
    feasible = sorted((d for d in done if d.feasible), key=lambda d: sign * d.objective)
    infeasible = sorted((d for d in done if not d.feasible), key=lambda d: max(d.constraints.values()))
    assert [int(r["design"][0]) for r in ranked] == [d.id for d in (feasible + infeasible)[:10]]
    for row in rows:
        d: DesignRow = designs[int(row["design"][0])]
        assert float(row["objective"][0]) == d.objective
        assert row["objective"][1] == f"{d.objective:.4g}"
        for source in cfg.goal.subject_to:
            assert float(row[source][0]) == d.constraints[source]
        for name in cfg.parameters:
            value = d.values[name]
            if isinstance(value, float):
                assert float(row[name][0]) == value and row[name][1] == f"{value:.4g}"
            else:
                assert row[name][0] == str(value)
        assert row["feasible"][1] == ("yes" if d.feasible else "no")
        predicted = (d.prediction or {}).get("objective_mean")
        assert row["predicted when proposed"][1].startswith(f"{predicted:.4g}" if predicted is not None else "—")


# --------------------------------------------------------------------------- campaigns written straight into a ledger


@pytest.fixture(scope="module")
def twenty(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The twenty-parameter sled after a Morris screening stage, with Sobol' indices recorded too."""
    from sortie import stages
    from sortie.sensitivity import surrogate_sobol_indices

    root = tmp_path_factory.mktemp("twenty")
    config = sled_config(root)
    demo20 = yaml.safe_load((ROOT / "configs" / "sled-aftbody-20.yaml").read_text())
    config.update(campaign=demo20["campaign"], parameters=demo20["parameters"],
                  plan={"screening": {"method": "morris", "trajectories": 3, "levels": 4, "select": {"fraction": 0.1}},
                        "initial": {"method": "lhs", "designs": 12}, "infill": {}}, budget={"designs": 90})
    directory = simulate_campaign(root, config)
    view = open_campaign(directory)
    with Ledger.open(ledger_path(directory)) as ledger:
        result = stages.screen(view.config.plan.screening, view.config.space(), ledger.designs(),
                               view.config.goal.build())
        ledger.add_analysis("screening", result)
    active = open_campaign(directory)
    names = [p.name for p in active.active_space().free]
    sobol = surrogate_sobol_indices({t: active.surrogate(t).model for t in ("objective", "drag <= baseline.drag")},
                                    n_base=256, seed=0, n_resamples=50, names=names)
    with Ledger.open(ledger_path(directory)) as ledger:
        ledger.add_analysis("sobol", {"parameters": names, "outputs": list(sobol.output_names),
                                      **{key: getattr(sobol, key) for key in ("first_order", "total_order",
                                                                               "first_order_low", "first_order_high",
                                                                               "total_order_low", "total_order_high")},
                                      "confidence_level": sobol.confidence_level, "n_points": sobol.n_evaluations})
    return directory


def test_twenty_parameters_after_screening(twenty: Path, tmp_path: Path) -> None:
    page = check_report(write_report(twenty, tmp_path / "report"))
    assert {"fig-screening.png", "fig-sobol.png", "fig-convergence.png", "fig-parity.png", "fig-slices.png",
            "fig-contours.png", "fig-quantities.png"} <= set(page.images)
    screening = open_campaign(twenty).screening()["data"]
    fixed = screening["fixed"]
    assert fixed, "the mock physics ignores most of the twenty parameters, so screening fixes some"
    assert f"Not modelled: {len(fixed)} parameters that screening fixed at their baseline" in page.plain
    reasons = next(rows for cls, rows in page.tables if [t for _, t in rows[0]] == ["parameter", "decision", "why"])
    assert len(reasons) == 1 + 20
    assert_top_designs_equal_the_ledger(page, twenty)


def test_a_surrogate_screen_is_described_as_such_with_its_processes_trust(twenty: Path, tmp_path: Path) -> None:
    from sortie import stages
    from sortie.config import ScreeningSpec

    directory = tmp_path / "camp"
    shutil.copytree(twenty, directory)
    view = open_campaign(directory)
    spec = ScreeningSpec(method="surrogate", select={"fraction": 0.25})
    with Ledger.open(ledger_path(directory)) as ledger:
        result = stages.screen(spec, view.config.space(), ledger.designs(), view.config.goal.build(), seed=0)
        ledger.add_analysis("screening", result)
    page = check_report(write_report(directory, tmp_path / "report"))
    assert "fig-screening.png" in page.images
    assert "Surrogate screening: total Sobol' index" in page.plain and "Morris screening" not in page.plain
    r2 = ", ".join(f"{o}: {v:.2f}" for o, v in zip(result["outputs"], result["loo_r2"], strict=True))
    assert f"leave-one-out R² ({r2})" in page.plain
    reasons = next(rows for cls, rows in page.tables if [t for _, t in rows[0]] == ["parameter", "decision", "why"])
    assert any("√(total Sobol' index)" in t for _, t in reasons[1]), reasons[1]


def test_a_campaign_caught_running(tmp_path: Path) -> None:
    """Few designs, some pending, no model choice recorded yet: every section still says something."""
    directory = simulate_campaign(tmp_path, sled_config(tmp_path), running=8)
    page = check_report(write_report(directory))
    assert (directory / "report" / "index.html").is_file(), "the default place is <campaign>/report"
    # a simulated ledger has no orchestrator run recorded: it is not running, and its plan is not done
    assert "state: interrupted" in page.plain and "13 of 18 planned designs recorded, 8 pending" in page.plain
    assert "The campaign has not chosen a surrogate yet" in page.plain
    assert "fig-convergence.png" in page.images and "fig-parity.png" in page.images
    in_progress = next(rows for cls, rows in page.tables if [t for _, t in rows[0]][:2] == ["design", "stage"]
                       and "why proposed" in [t for _, t in rows[0]])
    assert len(in_progress) == 1 + 8
    assert_top_designs_equal_the_ledger(page, directory)


def test_a_campaign_with_nothing_finished(tmp_path: Path) -> None:
    directory = simulate_campaign(tmp_path, sled_config(tmp_path), running=13)
    page = check_report(write_report(directory, tmp_path / "out"))
    assert page.images == []
    for sentence in ("No design has finished yet", "Surrogates need at least 3 finished designs; 0 so far",
                     "Slices need a fitted objective surrogate", "No case of the baseline or of a feasible design",
                     "No design has been scored yet", "No screening analysis is recorded"):
        assert sentence in page.plain


def test_a_maximised_goal_over_paired_conditions(tmp_path: Path) -> None:
    """Best means highest when maximising; two condition variables share one axis with both values on each tick."""
    config = sled_config(tmp_path, conditions={"mach": [0.6, 0.9, 1.1, 1.3], "yaw": [0.0, 1.0, 2.0, 3.0]},
                         goal={"maximize": "min(lift) - max(lift)", "subject_to": ["drag <= baseline.drag"]})
    directory = simulate_campaign(tmp_path, config, running=1)
    page = check_report(write_report(directory))
    assert "higher is better" not in page.plain  # the figure says it, the page does not repeat it
    assert_top_designs_equal_the_ledger(page, directory)
    best = open_campaign(directory).best()
    designs = open_campaign(directory).designs()
    assert best["objective"] == designs.loc[designs["feasible"].fillna(False).astype(bool), "objective"].max()


def test_a_second_report_replaces_the_first(tmp_path: Path) -> None:
    directory = simulate_campaign(tmp_path, sled_config(tmp_path), running=2)
    out = tmp_path / "report"
    out.mkdir()
    (out / "fig-old.png").write_bytes(b"stale")
    index = write_report(directory, out)
    check_report(index)
    assert not (out / "fig-old.png").exists()


# --------------------------------------------------------------------------- a campaign run by the flow


@pytest.fixture(scope="module")
def finished(tmp_path_factory: pytest.TempPathFactory, prefect_api: None) -> Path:
    return finished_campaign(tmp_path_factory)


@pytest.fixture(scope="module")
def finished_report(finished: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    return write_report(finished, tmp_path_factory.mktemp("finished-report") / "report")


def test_finished_campaign_report(finished: Path, finished_report: Path) -> None:
    page = check_report(finished_report)
    assert set(page.images) == {"fig-convergence.png", "fig-parity.png", "fig-slices.png", "fig-contours.png",
                                "fig-quantities.png"}
    assert "state: finished; 18 of 18 planned designs recorded" in page.plain
    assert_top_designs_equal_the_ledger(page, finished)
    failed = next(rows for cls, rows in page.tables if cls == "designs" and "failed cases" in [t for _, t in rows[0]])
    with Ledger.open(ledger_path(finished), readonly=True) as ledger:
        expected = [d.id for d in ledger.designs(status="failed")]
    assert [int(row[0][1]) for row in failed[1:]] == expected and expected, "the seeded LHS puts a design past ramp 13"
    assert all("mesh generation failed: ramp steeper than 13 deg" in row[-1][1] for row in failed[1:])
    assert "No screening analysis is recorded" in page.plain
    choices = next(rows for cls, rows in page.tables if [t for _, t in rows[0]][:3] == ["target", "model", "chosen"])
    rows = [[text for _, text in row] for row in choices[1:]]
    # one chosen model per target: the objective and the margin in direct mode, each quantity at each condition in
    # composite mode (the demo's swing goal)
    assert sum(row[2] == "✓" for row in rows) == len({row[0] for row in rows}) >= 2


def test_report_of_a_ledger_copied_mid_campaign(finished: Path, tmp_path: Path) -> None:
    with Ledger.open(ledger_path(finished), readonly=True) as ledger:
        starts = sorted(a["started_at"] for a in ledger.attempts())
    copy = snapshot_at(finished, tmp_path / "copy", starts[len(starts) * 3 // 5])
    view = open_campaign(copy)
    pending = int((view.designs()["status"] == "pending").sum())
    assert pending >= 1 and len(view.designs()) < 18
    page = check_report(write_report(copy))
    assert f"{pending} pending" in page.plain
    assert_top_designs_equal_the_ledger(page, copy)


# --------------------------------------------------------------------------- a real browser


def _browser() -> str | None:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    return "/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None


def _run_browser(browser: str, profile: Path, *args: str) -> subprocess.CompletedProcess[str]:
    flags = ["--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars", "--no-first-run",
             f"--user-data-dir={profile}"]
    return subprocess.run([browser, *flags, *args], capture_output=True, text=True, timeout=180, check=False)


def test_report_renders_in_a_headless_browser(finished_report: Path, tmp_path: Path) -> None:
    """Chromium loads every image without a script error and renders a page that is not blank."""
    from matplotlib.image import imread

    browser = _browser()
    if browser is None:
        if os.environ.get("SORTIE_REQUIRE_BROWSER") == "1":
            pytest.fail("SORTIE_REQUIRE_BROWSER=1 but no chromium is installed (apt-get install chromium)")
        pytest.skip("chromium is not installed (apt-get install chromium); SORTIE_REQUIRE_BROWSER=1 makes this a failure")
    url = finished_report.as_uri()
    dom = _run_browser(browser, tmp_path / "profile", "--virtual-time-budget=10000", "--dump-dom", url)
    assert dom.returncode == 0, dom.stderr[-2000:]
    body = re.search(r"<body[^>]*>", dom.stdout)
    assert body is not None, dom.stdout[:500]
    attrs: dict[str, Any] = dict(re.findall(r'([\w-]+)="([^"]*)"', body.group(0)))
    assert attrs.get("data-images-ok") == "yes", f"broken images: {attrs.get('data-broken-images')}"
    assert int(attrs["data-images"]) == 5
    assert "data-script-errors" not in attrs
    shot = tmp_path / "page.png"
    result = _run_browser(browser, tmp_path / "profile", f"--screenshot={shot}", "--window-size=1280,4000", url)
    assert result.returncode == 0 and shot.is_file(), result.stderr[-2000:]
    pixels = imread(shot)[..., :3]
    assert pixels.shape[:2] == (4000, 1280)
    assert float(pixels.std()) > 0.05, "the screenshot is blank"
    inked = float(np.mean(pixels.mean(axis=2) < 0.9))
    assert inked > 0.03, f"only {inked:.1%} of the page is drawn on"
