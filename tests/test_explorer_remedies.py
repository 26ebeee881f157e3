"""The explorer's "try the remedies" button (views.remedies_panel), headless: on full-batch gradient descent
on least squares at 1.1 × 2/λmax (diverges: the classical stability condition, λmax from
numpy.linalg.eigvalsh in tests/test_remedies.py), the over-stability-limit finding's halved learning rate
must converge, so the verdict table must say "gone" on its row; without a model the button is off and says why."""
from __future__ import annotations

import re

import pytest

import nbkit
from nbkit.views.compare import Comparison
from tests.test_remedies import diverging_run


@pytest.fixture(scope="module")
def diverging(tmp_path_factory):
    return diverging_run(tmp_path_factory.mktemp("explorer-remedies"))


def _rows(table_html: str) -> list[str]:
    return re.findall(r"<tr>(.*?)</tr>", table_html)


def test_try_the_remedies_runs_in_the_background_and_shows_the_verdict(diverging):
    run, model = diverging
    view = nbkit.explore(run, model=model)
    try:
        assert view.wait_for_findings(120)
        picks = [k for k, f in enumerate(view.findings) if f.kind == "over-stability-limit"]
        assert picks, [f.kind for f in view.findings]
        view.findings_list.value = picks[0]           # the user's pick in the findings list
        finding = view.findings[picks[0]]
        assert view.remedies.finding is finding and not view.remedies.button.disabled
        view.remedies.button.click()                  # the click handler, as the browser calls it
        assert view.remedies.running and view.remedies.button.disabled
        view.step = int(run.steps[3])                 # the view stays usable meanwhile
        assert view.step == int(run.steps[3])
        assert view.remedies.wait(300)
        assert not view.remedies.running and not view.remedies.button.disabled
        table = view.remedies.verdict.value
        rows = _rows(table)
        halved = [r for r in rows if "lower-lr" in r and "× 0.5 " in r]
        assert len(halved) == 1 and "<td>gone</td>" in halved[0], table
        assert "<td>better</td>" in halved[0], table
        assert sum("lower-lr" in r for r in rows) == 3, table           # × 0.5, × 0.25, × 0.1
        assert "still shows it" in table and "heuristics" in table
        # the progress bar followed the replay's step counter (set only from the replay's own bar)
        assert view.remedies.progress.max >= len(range(view.remedies.tried.start, run.steps[-1] + 1)) - 1
        assert view.remedies.progress.value == view.remedies.progress.max
        comparison = view.remedies.comparison
        assert isinstance(comparison, Comparison)
        assert comparison.names[0] == "control" and len(comparison.names) == 4
        assert comparison.step == comparison.snap(finding.first_step)
        assert view.remedies.comparison_box.children == (comparison,)
    finally:
        view.close()


def test_without_a_model_the_button_is_off_and_says_why(diverging):
    run, _ = diverging
    view = nbkit.explore(run)
    try:
        assert view.wait_for_findings(120) and view.findings
        view.findings_list.value = 0
        assert view.remedies.button.disabled
        assert "pass model= to nbkit.explore" in view.remedies.note.value
        assert view.remedies.request() is None and view.remedies.thread is None
    finally:
        view.close()
