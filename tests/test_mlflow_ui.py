"""The MLflow UI as a person sees it: stage runs nested under their pipeline run, readable names, and the
compare view of a progressive stage next to a consistency stage with the same metric names.

Slow (marked `slow`, outside the default suite): both methods run at tiny size through the `distillrun`
console script into one SQLite store, `mlflow server` serves it on 127.0.0.1 (one worker, stopped by
process group in a finally block), and headless Chromium (Debian package `chromium`) opens the experiment's
run list and the compare view of two stages. Chromium is driven over its DevTools protocol with aiohttp's
websocket client (aiohttp comes with mlflow): the run list's expanded rows, columns and the Run Name width
are the UI's own saved view state (localStorage), as a user's clicks would leave it.

Outside references: the server's REST API (/api/2.0/mlflow/runs/search) for runs, names, the
mlflow.parentRunId tag and metric values; the rendered page (DOM) for what the UI shows: every stage listed
and indented under its pipeline, no name cut short, and in the compare view each quality row holding the two
runs' values as the API has them; the PNG screenshots (matplotlib.image.imread) for not being blank.

  pytest -m slow tests/test_mlflow_ui.py          the check (1 min 45 s on 2 cores, measured)
  python tests/test_mlflow_ui.py [DOCS_DIR]       also writes docs/mlflow-runs.png, docs/mlflow-compare.png
"""
from __future__ import annotations

import asyncio
import base64
import contextlib
import json
import math
import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
import urllib.error
import urllib.request
from pathlib import Path

import pytest

from test_pipeline import TINY

pytestmark = pytest.mark.slow

EXPERIMENT = "distillrun"  # the default experiment name, as a user sees it (the store is a fresh one)
# one run per method; consistency at 2 then 1 steps so both methods have a 2-step stage to compare
PIPELINES = {"prog": ["method=progressive"], "cons": ["method=consistency", "method.steps=[2,1]"]}
STAGE_NAME = re.compile(r"^(progressive|consistency) · stage \d+ · (1 step|\d+ steps)$")
SHOWN_METRICS = ["quality/sw2", "quality/nll_gap", "baseline/sw2"]
BLANK_VARIANCE = 1e-3  # pixel variance of a rendered MLflow page is ~5e-3; a blank page is 0
WAIT_S = {"pipeline": 900, "server": 120, "page": 60}  # bounded waits (hang guards), never asserted on
VIEWPORT = (1600, 1000)


def child_env() -> dict:
    return {**os.environ, "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1", "MLFLOW_DISABLE_TELEMETRY": "true",
            "PYTHONUNBUFFERED": "1"}


def tools() -> dict[str, str]:
    """Paths of the programs this check needs; skips (with the reason) when one is missing."""
    found = {name: shutil.which(name) for name in ("chromium", "mlflow", "distillrun")}
    missing = [name for name, path in found.items() if path is None]
    if missing:
        pytest.skip(f"not installed: {', '.join(missing)} (Chromium: apt-get install chromium)")
    pytest.importorskip("aiohttp", reason="aiohttp (the DevTools websocket client) is not installed")
    return found


# ---------------------------------------------------------------- runs and server

def run_pipelines(root: Path, store: str) -> None:
    """Both methods into one experiment, through the console script, as a user runs them."""
    for folder, method in PIPELINES.items():
        cmd = [shutil.which("distillrun"), *TINY, "stop.tolerance=1000", *method, f"run_dir={root / folder}",
               f"tracking.uri={store}", f"tracking.experiment={EXPERIMENT}", f"tracking.artifacts={root / 'artifacts'}"]
        done = subprocess.run(cmd, env=child_env(), cwd=root, capture_output=True, text=True,
                              timeout=WAIT_S["pipeline"])
        assert done.returncode == 0, f"{' '.join(cmd)}\n{done.stdout[-2000:]}\n{done.stderr[-3000:]}"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def get_json(url: str, body: dict | None = None) -> dict:
    data = None if body is None else json.dumps(body).encode()
    req = urllib.request.Request(url, data=data, headers={"Content-Type": "application/json"})
    with urllib.request.urlopen(req, timeout=10) as resp:
        return json.loads(resp.read())


@contextlib.contextmanager
def mlflow_server(store: str, log: Path):
    """`mlflow server` on a free loopback port, one worker; yields its base URL; stopped by process group."""
    port = free_port()
    cmd = [shutil.which("mlflow"), "server", "--backend-store-uri", store, "--host", "127.0.0.1",
           "--port", str(port), "--workers", "1"]
    with open(log, "w") as out:
        proc = subprocess.Popen(cmd, stdout=out, stderr=subprocess.STDOUT, env=child_env(), start_new_session=True)
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + WAIT_S["server"]
        while True:
            try:
                urllib.request.urlopen(base + "/health", timeout=2).close()
                break
            except (urllib.error.URLError, OSError):
                if proc.poll() is not None or time.monotonic() > deadline:
                    raise RuntimeError(f"mlflow server did not come up:\n{log.read_text()[-3000:]}") from None
                time.sleep(0.5)
        yield base
    finally:
        stop_group(proc)


def stop_group(proc: subprocess.Popen) -> None:
    """SIGTERM the process group, then SIGKILL it if it is still there after 15 s."""
    with contextlib.suppress(ProcessLookupError):
        os.killpg(proc.pid, signal.SIGTERM)
    try:
        proc.wait(timeout=15)
    except subprocess.TimeoutExpired:
        with contextlib.suppress(ProcessLookupError):
            os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(timeout=15)


def search_runs(base: str) -> tuple[str, list[dict]]:
    """Experiment id and its runs, each as {id, name, status, parent, tags, metrics}, from the REST API."""
    exp = get_json(f"{base}/api/2.0/mlflow/experiments/get-by-name?experiment_name={EXPERIMENT}")["experiment"]
    found = get_json(f"{base}/api/2.0/mlflow/runs/search",
                     {"experiment_ids": [exp["experiment_id"]], "max_results": 100})
    runs = []
    for r in found.get("runs", []):
        tags = {t["key"]: t["value"] for t in r["data"].get("tags", [])}
        runs.append({"id": r["info"]["run_id"], "name": r["info"]["run_name"], "status": r["info"]["status"],
                     "parent": tags.get("mlflow.parentRunId"), "tags": tags,
                     "metrics": {m["key"]: m["value"] for m in r["data"].get("metrics", [])}})
    return exp["experiment_id"], runs


# ---------------------------------------------------------------- browser (Chromium DevTools protocol)

class Tab:
    """One Chromium page over the DevTools protocol: send a command, evaluate JS, wait for a condition, shoot."""

    def __init__(self, ws):
        self.ws, self.count = ws, 0

    async def send(self, method: str, **params):
        self.count += 1
        await self.ws.send_str(json.dumps({"id": self.count, "method": method, "params": params}))
        while True:  # events in between are not needed here
            msg = json.loads((await asyncio.wait_for(self.ws.receive(), 60)).data)
            if msg.get("id") == self.count:
                if "error" in msg:
                    raise RuntimeError(f"{method}: {msg['error']}")
                return msg["result"]

    async def js(self, expression: str):
        result = await self.send("Runtime.evaluate", expression=expression, returnByValue=True, awaitPromise=True)
        if "exceptionDetails" in result:
            raise RuntimeError(f"JS failed: {result['exceptionDetails'].get('text')} in {expression[:200]}")
        return result["result"].get("value")

    async def wait_for(self, expression: str, timeout: float = WAIT_S["page"]) -> bool:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if await self.js(f"(() => {{ try {{ return !!({expression}); }} catch (e) {{ return false; }} }})()"):
                return True  # (a page being reloaded has no body yet: not ready, not an error)
            await asyncio.sleep(0.5)
        return False

    async def open(self, url: str, ready: str) -> bool:
        await self.send("Page.navigate", url=url)
        return await self.wait_for(ready)

    async def viewport(self, width: int, height: int) -> None:
        await self.send("Emulation.setDeviceMetricsOverride", width=width, height=height, deviceScaleFactor=1,
                        mobile=False)

    async def shoot(self, path: Path, height: float | None = None) -> Path:
        """PNG of the viewport (cut to `height` CSS pixels from the top when given)."""
        params = {"format": "png"}
        if height is not None:
            width = await self.js("window.innerWidth")
            height = min(height, await self.js("window.innerHeight"))
            params["clip"] = {"x": 0, "y": 0, "width": width, "height": height, "scale": 1}
        path.write_bytes(base64.b64decode((await self.send("Page.captureScreenshot", **params))["data"]))
        return path


@contextlib.asynccontextmanager
async def chromium(profile: Path):
    import aiohttp

    proc = subprocess.Popen([shutil.which("chromium"), "--headless", "--no-sandbox", "--disable-gpu",
                             f"--window-size={VIEWPORT[0]},{VIEWPORT[1]}", "--remote-debugging-address=127.0.0.1",
                             "--remote-debugging-port=0", f"--user-data-dir={profile}", "--no-first-run",
                             "about:blank"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    try:
        port_file, deadline = profile / "DevToolsActivePort", time.monotonic() + WAIT_S["page"]
        while not (port_file.exists() and port_file.read_text().strip()):
            if proc.poll() is not None or time.monotonic() > deadline:
                raise RuntimeError("chromium did not open its DevTools port")
            await asyncio.sleep(0.2)
        port = port_file.read_text().split()[0]
        async with aiohttp.ClientSession() as session:
            async with session.get(f"http://127.0.0.1:{port}/json/list") as resp:
                pages = [t for t in await resp.json() if t["type"] == "page"]
            async with session.ws_connect(pages[0]["webSocketDebuggerUrl"], max_msg_size=0) as ws:
                tab = Tab(ws)
                await tab.send("Page.enable")
                await tab.viewport(*VIEWPORT)
                yield tab
    finally:
        stop_group(proc)


def view_state_key(experiment_id: str) -> str:
    return f'MLflowLocalStorage-1.1-ExperimentPage-["{experiment_id}"]-ReactComponentState'


async def save_view_state(tab: Tab, experiment_id: str, state: dict) -> None:
    """Merge `state` into the run list's saved view state (what the UI stores after a user's clicks)."""
    key = json.dumps(view_state_key(experiment_id))
    await tab.js(f"""(() => {{
        const old = JSON.parse(localStorage.getItem({key}) || '{{}}');
        localStorage.setItem({key}, JSON.stringify({{...old, ...{json.dumps(state)}}}));
        localStorage.setItem('mlflow.assistant.panelOpen_v1', 'false');  // the side chat panel, closed
        return true; }})()""")


def page_text_has(*texts: str) -> str:
    return " && ".join(f"document.body.innerText.includes({json.dumps(t)})" for t in texts)


async def shoot_run_list(tab: Tab, base: str, experiment_id: str, runs: list[dict], out: Path) -> dict:
    """The experiment's run list in the Model training view, every pipeline expanded to show its stages."""
    url = f"{base}/#/experiments/{experiment_id}/runs?workflowType=machine_learning"
    parents = [r["id"] for r in runs if r["parent"] is None]
    children = [r["name"] for r in runs if r["parent"] is not None]
    assert await tab.open(url, page_text_has("matching runs")), "the run list did not render"
    columns = ["params.`steps`", *[f"metrics.`{m}`" for m in SHOWN_METRICS], "tags.`distillrun.verdict`"]
    await save_view_state(tab, experiment_id, {"runsExpanded": {p: True for p in parents}, "selectedColumns": columns})
    await tab.send("Page.reload")
    await tab.wait_for(page_text_has(*children), timeout=20)
    # the Run Name column wide enough for the stage names: the UI applies saved widths with the column order
    order = await tab.js("[...document.querySelectorAll('.ag-header-row-column .ag-header-cell[col-id]')]"
                         ".map(e => e.getAttribute('col-id'))")
    await save_view_state(tab, experiment_id, {"columnOrder": order, "columnWidths": {"attributes.`Run Name`": 340}})
    await tab.send("Page.reload")
    if not await tab.wait_for(page_text_has(*children), timeout=20):  # saved state not taken: click the expanders
        await tab.js("""document.querySelectorAll('.ag-row [col-id="attributes.`Run Name`"] button')"""
                     ".forEach(b => b.click())")
        await tab.wait_for(page_text_has(*children), timeout=20)
    await asyncio.sleep(1.5)  # let the grid settle after the last render
    grid = await tab.js("(() => { const g = document.querySelector('.ag-root'); return g ? g.innerText : ''; })()")
    # names the column shows cut short (CSS ellipsis): their text is wider than its box
    cut = await tab.js("""[...document.querySelectorAll('.ag-row [col-id="attributes.`Run Name`"] a')]
        .filter(a => [a, ...a.querySelectorAll('*')].some(e => e.scrollWidth > e.clientWidth + 1))
        .map(a => a.textContent.trim())""")
    bottom = await tab.js("Math.max(...[...document.querySelectorAll('.ag-row')]"
                          ".map(r => r.getBoundingClientRect().bottom))")
    shot = await tab.shoot(out, height=bottom + 60)
    # where each name starts: the UI indents a child run under its parent
    left = await tab.js("""Object.fromEntries(
        [...document.querySelectorAll('.ag-row [col-id="attributes.`Run Name`"] a')]
        .map(a => [a.textContent.trim(), a.getBoundingClientRect().left]))""")
    return {"grid": grid, "cut": cut, "left": left, "shot": shot}


async def shoot_compare(tab: Tab, base: str, experiment_id: str, pair: list[dict], out: Path) -> dict:
    """The compare view of two stage runs: run names, parameters, and the metrics table at quality/*."""
    await tab.viewport(VIEWPORT[0], 1300)
    ids = json.dumps([r["id"] for r in pair])
    url = f'{base}/#/compare-runs?runs={ids}&experiments=["{experiment_id}"]&workflowType=machine_learning'
    ready = page_text_has(*(r["name"] for r in pair), "Metrics", "baseline/sw2")
    assert await tab.open(url, ready), "the compare view did not render"
    await tab.js("localStorage.setItem('mlflow.assistant.panelOpen_v1', 'false')")  # the side chat panel, closed
    await tab.send("Page.reload")
    assert await tab.wait_for(ready), "the compare view did not render after a reload"
    await asyncio.sleep(1)
    # fold the parallel-coordinates plot away so names, parameters and metrics fit one screen
    await tab.js("""(() => { const h = [...document.querySelectorAll('.du-bois-light-collapse-header')]
        .find(e => e.textContent.trim().startsWith('Visualizations')); if (h) h.click(); return true; })()""")
    await asyncio.sleep(1)
    # scroll the metrics table to quality/*. It is two virtualized grids, names and values, kept in step by
    # the page: scrolling the values (as a wheel does) moves the names to where the values were one scroll
    # event before. So the values are scrolled twice, the second time by one pixel, leaving both at the
    # same row; the rows are then read back (cells are placed by their `top`) to check that they line up.
    scroll_values = "[...document.querySelectorAll('.ReactVirtualized__Grid')][1].scrollTop = {};".format

    async def scroll_to(top: float) -> None:
        for y in (top + 1, top):
            await tab.js(scroll_values(y))
            await asyncio.sleep(1)

    await scroll_to(18 * (await tab.js(METRICS_TABLE_JS))["row"])  # past baseline/*, divergence/*, its_per_s, loss
    names = (await tab.js(METRICS_TABLE_JS))["names"]
    quality = {name: float(top) for top, name in names.items() if name.startswith("quality/")}
    if quality:  # from quality/mode_tv: mode coverage, NLL gap and sliced W2 with their errors, whole rows
        await scroll_to(quality.get("quality/mode_tv", min(quality.values())))
    table = await tab.js(METRICS_TABLE_JS)
    text = await tab.js("document.body.innerText")
    bottom = await tab.js("""(() => { const g = [...document.querySelectorAll('.ReactVirtualized__Grid')];
        return g.length ? Math.max(...g.map(e => e.getBoundingClientRect().bottom)) : window.innerHeight; })()""")
    shot = await tab.shoot(out, height=bottom + 30)
    rows = {name: table["values"].get(top, []) for top, name in table["names"].items()}
    return {"text": text, "rows": rows, "scroll": table["scroll"], "shot": shot}


# the compare view's metrics table, read as the page shows it: {names: {top: metric}, values: {top: [run1, run2]},
# scroll: [names grid, values grid], row: row height}; cells are positioned by their `top` style
METRICS_TABLE_JS = """(() => {
    const grids = [...document.querySelectorAll('.ReactVirtualized__Grid')];
    const cells = g => [...g.querySelectorAll('.ReactVirtualized__Grid__innerScrollContainer > *')];
    const names = {}, values = {};
    cells(grids[0]).forEach(c => { names[parseFloat(c.style.top)] = c.textContent.trim(); });
    cells(grids[1]).sort((a, b) => parseFloat(a.style.left) - parseFloat(b.style.left))
        .forEach(c => { (values[parseFloat(c.style.top)] ||= []).push(c.textContent.trim()); });
    const row = cells(grids[0]).length ? cells(grids[0])[0].getBoundingClientRect().height : 45;
    return {names, values, row, scroll: grids.map(g => g.scrollTop)};
})()"""


def pick_pair(runs: list[dict]) -> list[dict]:
    """The 2-step stage of each method: same cost, different method."""
    two = {r["name"].split(" · ")[0]: r for r in runs if r["parent"] is not None and r["name"].endswith("· 2 steps")}
    return [two["progressive"], two["consistency"]]


async def browse(base: str, experiment_id: str, runs: list[dict], out_dir: Path, profile: Path) -> dict:
    async with chromium(profile) as tab:
        listed = await shoot_run_list(tab, base, experiment_id, runs, out_dir / "runs.png")
        pair = pick_pair(runs)
        compared = await shoot_compare(tab, base, experiment_id, pair, out_dir / "compare.png")
    return {"list": listed, "compare": compared, "pair": pair}


def check_everything(root: Path) -> dict:
    """Run both pipelines, serve the store, browse it; returns what the API and the browser saw."""
    tools()
    store = f"sqlite:///{root / 'store.db'}"
    run_pipelines(root, store)
    with mlflow_server(store, root / "server.log") as base:
        experiment_id, runs = search_runs(base)
        seen = asyncio.run(browse(base, experiment_id, runs, root, root / "chromium-profile"))
    return {"runs": runs, **seen}


# ---------------------------------------------------------------- tests

@pytest.fixture(scope="module")
def ui(tmp_path_factory):
    return check_everything(tmp_path_factory.mktemp("ui"))


def not_blank(png: Path) -> float:
    import matplotlib.image

    pixels = matplotlib.image.imread(str(png))[..., :3]
    return float(pixels.var())


def test_api_nests_one_stage_run_per_stage_under_each_pipeline(ui):
    runs = ui["runs"]
    parents = {r["id"]: r for r in runs if r["parent"] is None}
    children = [r for r in runs if r["parent"] is not None]
    assert sorted(p["name"] for p in parents.values()) == ["consistency · archipelago · cons",
                                                           "progressive · archipelago · prog"]
    assert all(r["status"] == "FINISHED" for r in runs)
    by_parent = {pid: sorted(c["name"] for c in children if c["parent"] == pid) for pid in parents}
    assert sorted(by_parent.values()) == [
        ["consistency · stage 1 · 2 steps", "consistency · stage 2 · 1 step"],
        ["progressive · stage 1 · 4 steps", "progressive · stage 2 · 2 steps", "progressive · stage 3 · 1 step"]]
    for pid, names in by_parent.items():
        assert all(n.startswith(parents[pid]["name"].split(" · ")[0] + " · ") for n in names)
    assert all(STAGE_NAME.match(c["name"]) for c in children)


def test_every_stage_of_both_methods_has_the_same_metric_names(ui):
    children = [r for r in ui["runs"] if r["parent"] is not None]
    keys = {frozenset(c["metrics"]) for c in children}
    assert len(keys) == 1, [sorted(k) for k in keys]
    assert set(SHOWN_METRICS) | {"loss", "steps", "verdict"} <= next(iter(keys))


def test_run_list_shows_stages_nested_and_readable(ui):
    grid = ui["list"]["grid"]
    names = [r["name"] for r in ui["runs"]]
    for name in names:  # every pipeline expanded: its stages are listed under it
        assert name in grid, (name, grid)
    assert ui["list"]["cut"] == []  # whole names in a 340-pixel Run Name column, none cut short
    left = ui["list"]["left"]
    parents = [r["name"] for r in ui["runs"] if r["parent"] is None]
    children = [r["name"] for r in ui["runs"] if r["parent"] is not None]
    assert min(left[c] for c in children) > max(left[p] for p in parents) + 10, left  # indented: nested
    assert not_blank(ui["list"]["shot"]) > BLANK_VARIANCE


def test_compare_view_lines_up_a_stage_of_each_method(ui):
    seen, pair = ui["compare"], ui["pair"]
    assert [r["name"] for r in pair] == ["progressive · stage 2 · 2 steps", "consistency · stage 1 · 2 steps"]
    for r in pair:
        assert r["name"] in seen["text"] and r["id"] in seen["text"]
    assert "progressive" in seen["text"] and "consistency" in seen["text"]  # the method parameter, side by side
    # the metrics table as shown: names and values scrolled together, and each quality row holds the two runs'
    # values (as the API has them, to the UI's rounding) under the one metric name
    assert abs(seen["scroll"][0] - seen["scroll"][1]) <= 1, seen["scroll"]  # names beside their values
    for metric in SHOWN_METRICS[:2]:
        shown = [float(v) for v in seen["rows"][metric]]
        wanted = [r["metrics"][metric] for r in pair]
        assert len(shown) == 2 and all(math.isclose(a, b, rel_tol=5e-3, abs_tol=1e-3) for a, b in zip(shown, wanted)), \
            (metric, shown, wanted)
    assert not_blank(seen["shot"]) > BLANK_VARIANCE


# ---------------------------------------------------------------- README pictures

def save_for_docs(src: Path, dest: Path, max_bytes: int = 400_000) -> None:
    """Copy a screenshot, downscaling until it is under max_bytes."""
    from PIL import Image

    image = Image.open(src).convert("RGB")
    scale = 1.0
    while True:
        size = (round(image.width * scale), round(image.height * scale))
        image.resize(size, Image.LANCZOS).save(dest, optimize=True) if scale < 1 else image.save(dest, optimize=True)
        if dest.stat().st_size <= max_bytes or scale < 0.4:
            return
        scale *= 0.85


if __name__ == "__main__":
    docs = Path(sys.argv[1] if len(sys.argv) > 1 else Path(__file__).resolve().parents[1] / "docs")
    docs.mkdir(exist_ok=True)
    with tempfile.TemporaryDirectory() as tmp:
        seen = check_everything(Path(tmp))
        save_for_docs(seen["list"]["shot"], docs / "mlflow-runs.png")
        save_for_docs(seen["compare"]["shot"], docs / "mlflow-compare.png")
    for name in ("mlflow-runs.png", "mlflow-compare.png"):
        print(docs / name, (docs / name).stat().st_size, "bytes")
