"""``rwls replay --report``: a self-contained HTML report from the bundled demo history.

One section per configured channel, a summary table first, PNG plots embedded, and every number
it shows for a channel's final state equal to what ``--json`` gives for the same run.
"""

from __future__ import annotations

import json
import re
from html.parser import HTMLParser
from pathlib import Path

import pytest

from service.cli import main
from service.config.settings import load_config

ROOT = Path(__file__).resolve().parents[2]
DATA = ROOT / "examples" / "larkspur_sub7.csv"
CONFIG = ROOT / "examples" / "larkspur_sub7.toml"


class _Cells(HTMLParser):
    """Text of elements carrying a class of interest, with the attributes of the enclosing row."""

    def __init__(self) -> None:
        super().__init__()
        self.row: dict[str, str] = {}
        self.capture: str | None = None
        self.found: list[tuple[dict[str, str], str, str]] = []
        self.sections: list[str] = []
        self.images = 0
        self.text = ""

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = {k: v or "" for k, v in attrs}
        if tag == "tr":
            self.row = a
        if tag == "section" and "channel" in a.get("class", ""):
            self.sections.append(a["data-channel"])
        if tag == "img" and a.get("src", "").startswith("data:image/png;base64,"):
            self.images += 1
        if tag in ("span", "td") and a.get("class") in ("estimate", "num samples", "num rejected", "num noise",
                                                         "alarms"):
            self.capture = a["class"]
            self.text = ""
            self.found_attrs = {**self.row, **a}

    def handle_data(self, data: str) -> None:
        if self.capture is not None:
            self.text += data

    def handle_endtag(self, tag: str) -> None:
        if self.capture is not None and tag in ("span", "td"):
            self.found.append((self.found_attrs, self.capture, self.text.strip()))
            self.capture = None


@pytest.fixture(scope="module")
def report(tmp_path_factory: pytest.TempPathFactory) -> tuple[str, dict[str, object]]:
    out = tmp_path_factory.mktemp("report") / "sub7.html"
    json_path = out.with_suffix(".json")
    import contextlib
    import io
    buffer = io.StringIO()
    with contextlib.redirect_stdout(buffer):
        code = main(["replay", str(DATA), "--config", str(CONFIG), "--report", str(out), "--json", "--no-progress"])
    assert code == 0
    json_path.write_text(buffer.getvalue())
    return out.read_text(encoding="utf-8"), json.loads(buffer.getvalue())


def test_one_section_per_channel_after_a_summary_with_plots(report: tuple[str, dict[str, object]]) -> None:
    page, _ = report
    cells = _Cells()
    cells.feed(page)
    channels = list(load_config(CONFIG).channels)
    assert cells.sections == channels
    assert page.index('id="summary"') < page.index('class="channel"')
    # parameters (one per term) + sigma + three detectors + innovations, per channel
    terms = sum(len(ch.terms) for ch in load_config(CONFIG).channels.values())
    assert cells.images == terms + 5 * len(channels)
    assert "not a safety" in page and "Advisory use only" in page
    assert not re.search(r"<script(?![^>]*application/json)", page)       # no code: a document


def test_the_numbers_shown_are_those_of_the_json_output(report: tuple[str, dict[str, object]]) -> None:
    page, result = report
    channels = result["channels"]
    assert isinstance(channels, dict)
    cells = _Cells()
    cells.feed(page)
    checked = 0
    for attrs, kind, text in cells.found:
        ch = channels[attrs["data-channel"]]
        if kind == "estimate":
            assert float(text) == pytest.approx(ch["parameters"][attrs["data-term"]], rel=1e-9)
        elif kind == "num samples":
            assert int(text) == ch["samples"]
        elif kind == "num rejected":
            assert int(text) == ch["rejected"]
        elif kind == "num noise":
            assert float(text) == pytest.approx(ch["noise_sigma"], rel=1e-9)
        elif kind == "alarms":
            assert int(attrs["data-count"]) == sum(a["action"] == "condition_on" for a in ch["alarms"])
        checked += 1
    assert checked == sum(len(ch["terms"]) + 4 for ch in channels.values())
    embedded = re.search(r'<script type="application/json" id="replay-json">(.*?)</script>', page, re.S)
    assert embedded is not None and json.loads(embedded.group(1).replace("<\\/", "</")) == result


def test_overrides_change_the_run_and_are_named_in_the_report(tmp_path: Path) -> None:
    out = tmp_path / "tight.html"
    code = main(["replay", str(DATA), "--config", str(CONFIG), "--report", str(out), "--no-progress",
                 "--forgetting-factor", "0.99", "--offset-h", "4", "--drift-alpha", "1e-3"])
    assert code == 0
    page = out.read_text(encoding="utf-8")
    assert "forgetting_factor = 0.99" in page and "offset_h = 4" in page and "drift_alpha = 0.001" in page
    assert page.count("\u03bb = 0.99<") == len(load_config(CONFIG).channels)


@pytest.mark.parametrize(("flag", "value"), [("--offset-h", "0"), ("--variance-h", "-1"), ("--drift-alpha", "1.5")])
def test_a_bad_override_is_a_usage_error(flag: str, value: str, tmp_path: Path) -> None:
    assert main(["replay", str(DATA), "--config", str(CONFIG), flag, value, "--no-progress"]) == 2


def test_the_report_speaks_plainly_and_never_contradicts_itself(report: tuple[str, dict[str, object]]) -> None:
    page, _ = report
    visible = re.sub(r"<script.*?</script>|<[^>]+>", " ", page, flags=re.DOTALL)
    # Internal journal codes stay in the JSON; people read words.
    assert "condition_on" not in visible and "condition_off" not in visible
    assert "condition raised" in visible
    # A range of one value is that value.
    assert not re.search(r"(?<![\w.])(-?\d[\d.e+-]*) to \1(?![\w.])", visible)
    # Equal weights: WLS is OLS, and the gain says exactly that.
    tables = re.findall(r'<table class="comparison">.*?</table>(<p class="muted">Every sample had the same weight)?',
                        page, flags=re.DOTALL)
    equal_weight_tables = re.findall(r'(<table class="comparison">(?:(?!</table>).)*</table>)<p class="muted">Every '
                                     r"sample had the same weight", page, flags=re.DOTALL)
    assert tables and equal_weight_tables         # the demo's flowmeter has unit weights
    for table in equal_weight_tables:
        gains = re.findall(r'<td class="num gain">([^<]*)</td>', table)
        assert gains and set(gains) == {"1"}, gains
