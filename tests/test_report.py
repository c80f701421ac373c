"""report.html of a real short North Carolina run: opens offline in headless Chromium,
shows the flagged areas and cautions, and never prints a small count.

Data: Cressie (1993) SIDS counts via libpysal (see fixtures_runs.py). The browser is
driven through Chromium's DevTools protocol over ``--remote-debugging-pipe`` (NUL-framed
JSON on file descriptors 3 and 4), which needs no websocket client; written here by hand
because no package in the environment speaks it and a page check needs only a few calls.
"""
from __future__ import annotations

import base64
import fcntl
import hashlib
import json
import os
import re
import shutil
import subprocess
import time
from html.parser import HTMLParser
from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd
import pytest

from fixtures_runs import nc_run_dir  # noqa: F401 - session fixture
from smootharea.cli import main as cli_main
from smootharea.report import NOT_SHOWN, status_banner, write_report

pytestmark = pytest.mark.slow  # the shared fixture samples a model

CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                  "--no-first-run", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync")
needs_chromium = pytest.mark.skipif(not CHROMIUM.exists(),
                                    reason="/usr/bin/chromium is absent (Debian package 'chromium')")


# --- a minimal DevTools-protocol client over the debugging pipe --------------------------

class DevToolsPipe:
    """Chromium with ``--remote-debugging-pipe``: it reads commands on fd 3, answers on fd 4."""

    def __init__(self, profile: Path, timeout: float = 60.0):
        self.timeout = timeout
        self.events: list[dict] = []
        self.buffer = b""
        self.next_id = 0
        to_browser_read, self.to_browser = os.pipe()
        self.from_browser, from_browser_write = os.pipe()

        def wire_fds() -> None:  # runs in the child before exec
            read_copy = fcntl.fcntl(to_browser_read, fcntl.F_DUPFD, 10)
            write_copy = fcntl.fcntl(from_browser_write, fcntl.F_DUPFD, 10)
            os.dup2(read_copy, 3)
            os.dup2(write_copy, 4)

        self.process = subprocess.Popen(
            [str(CHROMIUM), *CHROMIUM_FLAGS, "--remote-debugging-pipe",
             f"--user-data-dir={profile}", "about:blank"],
            stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
            pass_fds=(3, 4), preexec_fn=wire_fds)
        os.close(to_browser_read)
        os.close(from_browser_write)

    def send(self, method: str, params: dict | None = None, session: str | None = None) -> dict:
        self.next_id += 1
        message = {"id": self.next_id, "method": method, "params": params or {}}
        if session:
            message["sessionId"] = session
        os.write(self.to_browser, json.dumps(message).encode() + b"\0")
        reply = self.wait(lambda m: m.get("id") == self.next_id)
        if "error" in reply:
            raise RuntimeError(f"{method}: {reply['error']}")
        return reply.get("result", {})

    def wait(self, matches, deadline: float | None = None) -> dict:
        deadline = deadline or time.monotonic() + self.timeout
        while True:
            while b"\0" in self.buffer:
                raw, self.buffer = self.buffer.split(b"\0", 1)
                message = json.loads(raw)
                if "method" in message:
                    self.events.append(message)
                if matches(message):
                    return message
            if time.monotonic() > deadline:
                raise TimeoutError("no answer from Chromium")
            chunk = os.read(self.from_browser, 1 << 20)
            if not chunk:
                raise RuntimeError("Chromium closed the debugging pipe")
            self.buffer += chunk

    def close(self) -> None:
        try:
            self.send("Browser.close")
        except (RuntimeError, TimeoutError, OSError):
            pass
        try:
            self.process.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.process.kill()
        os.close(self.to_browser)
        os.close(self.from_browser)


DOM_FACTS = """JSON.stringify({
  flaggedHeaders: [...document.querySelectorAll('#flagged-areas thead th')].map(c => c.textContent.trim()),
  flaggedRows: [...document.querySelectorAll('#flagged-areas tbody tr')].map(r => [...r.cells].map(c => c.textContent.trim())),
  cautions: document.getElementById('cautions') ? document.getElementById('cautions').innerText : null,
  firstFigure: document.querySelector('figure') ? document.querySelector('figure').id : null,
  mapBeforeTable: !!(document.querySelector('figure') && document.getElementById('flagged-areas') &&
    (document.querySelector('figure').compareDocumentPosition(document.getElementById('flagged-areas'))
     & Node.DOCUMENT_POSITION_FOLLOWING)),
  imagesDrawn: [...document.images].every(i => i.complete && i.naturalWidth > 0),
  imageCount: document.images.length,
  imageSchemes: [...new Set([...document.images].map(i => i.src.slice(0, 22)))],
  outsideReferences: document.querySelectorAll('script, iframe, link[rel=stylesheet], object, embed').length,
  notConvergedBanner: !!document.getElementById('not-converged')
})"""


def inspect_page(page: Path, profile: Path, screenshot: Path) -> tuple[dict, list[dict]]:
    """Open ``page``; return DOM facts and every DevTools event seen."""
    browser = DevToolsPipe(profile)
    try:
        target = browser.send("Target.createTarget", {"url": "about:blank"})["targetId"]
        session = browser.send("Target.attachToTarget",
                               {"targetId": target, "flatten": True})["sessionId"]
        for domain in ("Network", "Runtime", "Log", "Page"):
            browser.send(f"{domain}.enable", session=session)
        browser.send("Emulation.setDeviceMetricsOverride",
                     {"width": 1000, "height": 1400, "deviceScaleFactor": 1, "mobile": False},
                     session=session)
        browser.send("Page.navigate", {"url": page.resolve().as_uri()}, session=session)
        browser.wait(lambda m: m.get("method") == "Page.loadEventFired"
                     and m.get("sessionId") == session)
        facts = browser.send("Runtime.evaluate", {"expression": DOM_FACTS, "returnByValue": True},
                             session=session)["result"]["value"]
        shot = browser.send("Page.captureScreenshot", {"format": "png"}, session=session)
        screenshot.write_bytes(base64.b64decode(shot["data"]))
        return json.loads(facts), list(browser.events)
    finally:
        browser.close()


def page_problems(events: list[dict], page: Path) -> list[str]:
    """Failed or outside requests, uncaught exceptions and console or log errors."""
    own = page.resolve().as_uri()
    problems = []
    for event in events:
        method, params = event["method"], event.get("params", {})
        if method == "Network.requestWillBeSent":
            url = params["request"]["url"]
            if url != own and not url.startswith("data:"):
                problems.append(f"request to {url}")
        elif method == "Network.loadingFailed":
            problems.append(f"failed load: {params.get('errorText')}")
        elif method == "Runtime.exceptionThrown":
            problems.append(f"exception: {params['exceptionDetails'].get('text')}")
        elif method == "Runtime.consoleAPICalled" and params.get("type") in ("error", "assert"):
            problems.append(f"console {params['type']}: {params.get('args')}")
        elif method == "Log.entryAdded" and params["entry"].get("level") == "error":
            problems.append(f"log error: {params['entry'].get('text')}")
    return problems


# --- reading tables out of the HTML (stdlib parser) -------------------------------------

class TableReader(HTMLParser):
    """Collects every table as a list of rows of cell texts (headers included)."""

    def __init__(self):
        super().__init__()
        self.tables: list[list[list[str]]] = []
        self.row: list[str] | None = None
        self.cell: list[str] | None = None
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        if tag == "table":
            self.tables.append([])
        elif tag == "tr":
            self.row = []
        elif tag in ("td", "th"):
            self.cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self.cell is not None and self.row is not None:
            self.row.append("".join(self.cell).strip())
            self.cell = None
        elif tag == "tr" and self.row is not None and self.tables:
            self.tables[-1].append(self.row)
            self.row = None

    def handle_data(self, data):
        self.text.append(data)
        if self.cell is not None:
            self.cell.append(data)


def read_tables(page: Path) -> TableReader:
    reader = TableReader()
    reader.feed(page.read_text(encoding="utf-8"))
    return reader


def true_counts(run_dir: Path) -> pd.Series:
    idata = az.from_netcdf(run_dir / "posterior.nc", engine="h5netcdf")
    counts = idata.observed_data["observed"]
    return pd.Series(counts.values, index=[str(a) for a in counts["area"].values])


# --- the tests -------------------------------------------------------------------------

@needs_chromium
@pytest.mark.browser
def test_report_opens_offline_in_chromium_with_flagged_table_and_cautions(nc_run_dir, tmp_path):
    page = nc_run_dir / "report.html"
    screenshot = tmp_path / "report.png"
    facts, events = inspect_page(page, tmp_path / "profile", screenshot)

    assert page_problems(events, page) == []
    assert screenshot.stat().st_size > 10_000
    assert facts["outsideReferences"] == 0
    assert facts["imagesDrawn"] and facts["imageCount"] >= 8
    assert facts["imageSchemes"] == ["data:image/png;base64,"]
    # The relative-risk map comes first, before the flagged table.
    assert facts["firstFigure"] == "figure-relative_risk" and facts["mapBeforeTable"]
    # The flagged table lists exactly the areas with P(RR > 1) > 0.8 in areas.csv.
    table = pd.read_csv(nc_run_dir / "areas.csv", dtype={"area_id": str})
    flagged = set(table.loc[table["p_above_1"] > 0.8, "area_id"])
    # Cells read "Name (id)" when the job names a name column, else just the id.
    shown = {re.sub(r"^.*\((.+)\)$", r"\1", row[0].strip())
             for row in facts["flaggedRows"] if len(row) > 1}
    assert shown == flagged
    names = dict(zip(table["area_id"], table["area_name"]))
    assert all(row[0].startswith(names[re.sub(r"^.*\((.+)\)$", r"\1", row[0].strip())])
               for row in facts["flaggedRows"] if len(row) > 1)
    assert "P(RR > 1)" in facts["flaggedHeaders"]
    assert any("rank interval" in h for h in facts["flaggedHeaders"])
    cautions = facts["cautions"].lower()
    for phrase in ("small numbers", "ecological fallacy", "not as evidence of a cause",
                   "suppressed", "diagnoses", "data-protection"):
        assert phrase in cautions
    model = json.loads((nc_run_dir / "model.json").read_text())
    assert facts["notConvergedBanner"] == (not model["diagnostics"]["converged"])


def test_no_small_count_in_report_tables_or_published_files(nc_run_dir):
    # Reference data: SID74 of libpysal's sids2.shp (Cressie 1993), the counts the model used.
    import geopandas as gpd
    import libpysal
    suppress_below = json.loads((nc_run_dir / "model.json").read_text())["suppress_below"]
    sids = gpd.read_file(libpysal.examples.get_path("sids2.shp"))
    reference = pd.Series(sids["SID74"].to_numpy(), index=sids["FIPS"].astype(str))
    counts = true_counts(nc_run_dir)
    assert counts.loc[reference.index].tolist() == reference.tolist()  # model used true counts
    small = set(counts.index[counts < suppress_below])
    assert len(small) > 10

    table = pd.read_csv(nc_run_dir / "areas.csv", dtype={"area_id": str})
    layer = gpd.read_file(nc_run_dir / "results.gpkg", layer="areas")
    layer["area_id"] = layer["area_id"].astype(str)
    for published in (table, layer):
        hidden = published[published["area_id"].isin(small)]
        assert hidden["suppressed"].astype(bool).all()
        for column in ("observed", "smr", "smr_lower", "smr_upper"):
            assert hidden[column].isna().all()
        visible = pd.to_numeric(published["observed"]).dropna()
        assert (visible >= suppress_below).all()

    tables = read_tables(nc_run_dir / "report.html").tables
    checked_rows = 0
    for rows in tables:
        header = rows[0]
        if "Observed" not in header:
            continue
        observed_at, smr_at = header.index("Observed"), header.index("SMR")
        for row in rows[1:]:
            if len(row) != len(header):
                continue
            cell = row[observed_at]
            assert cell == NOT_SHOWN or int(cell) >= suppress_below
            if re.sub(r"^.*\((.+)\)$", r"\1", row[0].strip()) in small:  # "Name (id)" or "id"
                assert row[observed_at] == NOT_SHOWN and row[smr_at] == NOT_SHOWN
                checked_rows += 1
    assert checked_rows >= len(small)  # every small area appears in the all-areas table


def test_report_morans_i_after_smoothing_matches_esda(nc_run_dir):
    # Reference: esda.Moran (row-standardised queen weights from libpysal) on Pearson
    # residuals (O - E * RR) / sqrt(E * RR) of the posterior mean relative risk.
    import esda
    import geopandas as gpd
    from libpysal.weights import Queen
    layer = gpd.read_file(nc_run_dir / "results.gpkg", layer="areas")
    layer["area_id"] = layer["area_id"].astype(str)
    observed = true_counts(nc_run_dir).loc[layer["area_id"]].to_numpy(dtype=float)
    fitted = layer["expected"].to_numpy() * layer["rr_mean"].to_numpy()
    weights = Queen.from_dataframe(layer, use_index=False)
    weights.transform = "r"
    reference = esda.Moran((observed - fitted) / np.sqrt(fitted), weights, permutations=0).I
    text = (nc_run_dir / "report.html").read_text(encoding="utf-8")
    shown = re.search(r"Smoothed model, Pearson residuals[^<]*</td><td>(-?[0-9.]+)</td>", text)
    assert shown is not None
    assert float(shown.group(1)) == pytest.approx(reference, abs=6e-4)


def test_banner_for_runs_not_converged_or_approximate(nc_run_dir, tmp_path):
    run_dir = tmp_path / "run"
    run_dir.mkdir()
    for name in ("areas.csv", "results.gpkg", "model.json", "posterior.nc"):
        shutil.copy(nc_run_dir / name, run_dir / name)
    model = json.loads((run_dir / "model.json").read_text())
    model["approximate"] = "Laplace approximation"
    model["diagnostics"].update(converged=False, reasons=["R-hat of sigma is 1.2 (above 1.01)"])
    (run_dir / "model.json").write_text(json.dumps(model))
    text = write_report(run_dir, formats=()).read_text(encoding="utf-8")
    first_figure = text.index("<figure")
    assert text.index('id="not-converged"') < first_figure
    assert text.index('id="approximate"') < first_figure
    assert "R-hat of sigma is 1.2 (above 1.01)" in text
    assert "APPROXIMATE: Laplace approximation" in text

    model["approximate"] = None
    model["diagnostics"].update(converged=True, reasons=[])
    assert status_banner(model) == ""


def test_report_command_redraws_from_files_without_sampling(nc_run_dir, tmp_path, capsys):
    run_dir = tmp_path / "run"
    run_dir.mkdir()
    for name in ("areas.csv", "results.gpkg", "model.json", "posterior.nc"):
        shutil.copy(nc_run_dir / name, run_dir / name)
    posterior_hash = hashlib.sha256((run_dir / "posterior.nc").read_bytes()).hexdigest()
    started = time.perf_counter()
    code = cli_main(["report", str(run_dir), "--threshold", "1", "--threshold", "1.5",
                     "--formats", "png", "--palette", "blue-red"])
    seconds = time.perf_counter() - started
    assert code == 0
    assert capsys.readouterr().out.strip() == str(run_dir / "report.html")
    assert seconds < 90  # seconds on an idle machine; generous for a shared CI runner
    for stem in ("relative_risk", "exceedance_1.5", "exceedance_1.5_continuous", "funnel"):
        assert (run_dir / "maps" / f"{stem}.png").is_file()
    assert not list((run_dir / "maps").glob("*.svg"))
    text = (run_dir / "report.html").read_text(encoding="utf-8")
    assert "P(RR &gt; 1.5)" in text
    assert hashlib.sha256((run_dir / "posterior.nc").read_bytes()).hexdigest() == posterior_hash


def test_report_command_rejects_a_folder_without_a_run(tmp_path):
    assert cli_main(["report", str(tmp_path)]) == 1
    assert cli_main(["report", str(tmp_path), "--formats", "gif"]) == 1
