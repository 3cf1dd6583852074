"""The HTML report: one file that holds the figures (PNG, base64), the tables with intervals,
the diagnostics and provenance. The reference for every number is the public object it
reports (LagScan.table, CKResult.table, Macrostates.populations), read back from the HTML
with the standard library's HTML parser; PNG files are recognised by their 8-byte signature
(PNG specification, ISO/IEC 15948, section 5.2)."""
import base64
import html.parser
import io
import os

import numpy as np
import pytest

import msmkit as mk
from msmkit import demo
from msmkit.errors import InputError
from msmkit.reduce import TICA
from msmkit.report import lag_cautions, report_html, write_report
from msmkit.states import Microstates

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


class _Page(html.parser.HTMLParser):
    """Images, tables (as lists of rows of cell texts), headings and every src/href."""

    def __init__(self):
        super().__init__()
        self.images, self.tables, self.headings, self.links = [], [], [], []
        self._cell = self._row = None
        self._heading = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        for key in ("src", "href"):
            if key in a:
                self.links.append(a[key])
        if tag == "img":
            self.images.append(a)
        elif tag == "table":
            self.tables.append([])
        elif tag == "tr":
            self._row = []
        elif tag in ("td", "th"):
            self._cell = ""
        elif tag == "h2":
            self._heading = ""

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._row is not None:
            self._row.append(self._cell.strip())
            self._cell = None
        elif tag == "tr" and self.tables:
            self.tables[-1].append(self._row)
            self._row = None
        elif tag == "h2":
            self.headings.append(self._heading.strip())
            self._heading = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell += data
        if self._heading is not None:
            self._heading += data


def parse(text):
    page = _Page()
    page.feed(text)
    return page


@pytest.fixture(scope="module")
def analysis():
    trajs = demo.trajectories(seed=1, n_runs=6, min_frames=800, max_frames=1200)
    coords = list(TICA(10, dim=2).fit(trajs).transform(trajs))
    labels = Microstates(12, seed=0).fit(coords).labels_
    scan = mk.lag_scan(labels, [1, 2, 5], dt=demo.DT, unit=demo.UNIT, n_samples=5, seed=0)
    model = scan.model(2)
    ck = mk.chapman_kolmogorov(model, labels, n_sets=2, multiples=3, n_samples=5, seed=0)
    macro = model.find_macrostates(2, labels=labels, n_samples=5, seed=0)
    return model, scan, ck, macro


def test_report_holds_figures_tables_diagnostics_and_provenance(analysis, tmp_path):
    model, scan, ck, macro = analysis
    path = write_report(tmp_path / "analysis", model, scan=scan, ck=ck, macrostates=macro,
                        settings={"features": ["a", "b"], "microstates": {"n_states": 12}})
    assert path == tmp_path / "analysis.html"
    text = path.read_text(encoding="utf-8")
    page = parse(text)
    # self-contained: every image is inline PNG, nothing is fetched
    assert page.links and all(x.startswith("data:image/png;base64,") for x in page.links)
    assert len(page.images) >= 3  # populations, implied timescales, Chapman–Kolmogorov
    from PIL import Image
    for img in page.images:
        png = base64.b64decode(img["src"].split(",", 1)[1])
        assert png[:8] == PNG_SIGNATURE
        w, h = Image.open(io.BytesIO(png)).size
        assert w > 300 and h > 200
    for h in ("Settings", "Diagnostics and cautions", "Lag scan", "Chapman–Kolmogorov test", "Macrostates",
              "Provenance"):
        assert h in page.headings
    # the scan table: every row of LagScan.table(), interval included
    df = scan.table()
    scan_rows = next(t for t in page.tables if t and "resolved" in t[0])[1:]
    assert len(scan_rows) == len(df)
    for row, (_, ref) in zip(scan_rows, df.iterrows()):
        assert row[3] == f"{ref.timescale:.4g}"
        assert row[4] == f"{ref.lower:.4g} – {ref.upper:.4g}"
    # the test table: one row per (from, to, k)
    ck_rows = next(t for t in page.tables if t and "interval of the estimate" in t[0])[1:]
    assert len(ck_rows) == len(ck.table())
    # macrostate populations with their bootstrap interval
    pops = macro.populations()
    macro_rows = next(t for t in page.tables if t and t[0][:2] == ["macrostate", "population"])[1:]
    assert [r[1] for r in macro_rows] == [f"{p:.4g}" for p in pops["population"]]
    assert [r[2] for r in macro_rows] == [f"{a:.4g} – {b:.4g}" for a, b in
                                          zip(pops["population_lower"], pops["population_upper"])]
    # state populations with the intervals of the macrostates' sampled models, most populated first
    states = macro.samples.populations().sort_values("estimate", ascending=False, kind="stable").head(20)
    state_rows = next(t for t in page.tables if t and t[0][:3] == ["state", "population", "95% interval"])[1:]
    assert [r[0] for r in state_rows] == [str(int(x)) for x in states["state"]]
    assert [r[2] for r in state_rows] == [f"{a:.4g} – {b:.4g}" for a, b in zip(states["lower"], states["upper"])]
    # passage times and rates between macrostates with their intervals, in the model's unit
    kin = macro.kinetics_table()
    kin_rows = next(t for t in page.tables if t and t[0][:3] == ["from", "to", f"mean first-passage time ({model.unit})"])
    assert kin_rows[0][4] == f"rate constant (1/{model.unit})"
    for row, ref in zip(kin_rows[1:], kin.itertuples()):
        assert row[2] == f"{ref.passage_time:.4g}" and row[4] == f"{ref.rate_constant:.4g}"
        assert row[3] == f"{ref.passage_time_lower:.4g} – {ref.passage_time_upper:.4g}"
        assert row[5] == f"{ref.rate_constant_lower:.4g} – {ref.rate_constant_upper:.4g}"
    np.testing.assert_allclose(kin["passage_time"], [model.passage_time(macro.members[0], macro.members[1]),
                                                     model.passage_time(macro.members[1], macro.members[0])])
    # provenance: versions and the data fingerprint
    prov = dict(r for r in page.tables[-1] if len(r) == 2)
    assert prov["numpy"] == np.__version__ and prov["msmkit"] == mk.__version__
    assert prov["data fingerprint (SHA-256 of the labels)"] == model.metadata["labels_sha256"]
    settings = dict(r for r in page.tables[0] if len(r) == 2)
    assert settings["preparation: features"] == "a, b" and settings["preparation: microstates.n_states"] == "12"
    assert ck.criterion.split(":")[0] in text
    for caution in lag_cautions(scan, model.lag):
        assert caution.split("(")[0] in text


def test_report_refuses_to_overwrite_and_leaves_no_partial_file(analysis, tmp_path):
    model, scan, ck, macro = analysis
    target = tmp_path / "r.html"
    target.write_text("keep me")
    with pytest.raises(InputError, match="exists"):
        write_report(target, model)
    assert target.read_text() == "keep me"
    write_report(target, model, overwrite=True)
    assert target.read_text().startswith("<!DOCTYPE html>")
    # a failure while making the report writes nothing (no file, no temporary file)
    with pytest.raises(InputError, match="ck tests a model at lag"):
        write_report(tmp_path / "bad.html", scan.model(1), ck=ck)
    with pytest.raises(InputError, match="macrostates were found for another model"):
        write_report(tmp_path / "bad.html", model, macrostates=_two_state_macrostates())
    with pytest.raises(InputError, match="folder"):
        write_report(tmp_path / "missing" / "r.html", model)
    assert sorted(os.listdir(tmp_path)) == ["r.html"]


def _two_state_macrostates():
    """Macrostates of a model on states 0 and 1 only (not the 12 states of the analysis)."""
    rng = np.random.default_rng(0)
    return mk.build_model([rng.integers(0, 2, 300)], lag=1).find_macrostates(2)


def test_lag_cautions_need_a_scanned_lag(analysis):
    _, scan, _, _ = analysis
    with pytest.raises(InputError, match="not scanned"):
        lag_cautions(scan, 3)


def test_cli_report(analysis, tmp_path, capsys):
    from msmkit.cli import main

    model, *_ = analysis
    saved = mk.save_model(model, tmp_path / "m.npz")
    out = tmp_path / "m.html"
    assert main(["report", str(saved), "-o", str(out)]) == 0
    page = parse(out.read_text(encoding="utf-8"))
    assert len(page.images) >= 1 and "Provenance" in page.headings
    before = out.read_bytes()
    assert main(["report", str(saved), "-o", str(out)]) == 1
    assert "--force" in capsys.readouterr().err and out.read_bytes() == before
    assert main(["report", str(saved), "-o", str(out), "--force", "-q"]) == 0


def test_report_html_is_deterministic_for_a_given_time(analysis):
    import datetime

    model, scan, *_ = analysis
    when = datetime.datetime(2020, 1, 2, 3, 4, 5, tzinfo=datetime.timezone.utc)
    a = report_html(model, scan=scan, now=when)
    assert "2020-01-02T03:04:05+00:00" in a and a == report_html(model, scan=scan, now=when)
