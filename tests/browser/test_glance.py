"""The sidebar tells you when it matters and lets you look before you load, in real chromium.

One JupyterLab per module over jobs of the embedded TAP service. Covered: the quick look in a
job's details (sky map and a histogram picked from the keyboard), details that follow a running
job live, notifications with their actions (once across two tabs and a reload; off by the
setting), sorting and the notebook menu, and an automated accessibility check (axe-core) of the
panel and the details in the light and the dark theme. With JOBDESK_REFRESH_SCREENSHOT=1 the
screenshots in docs/ are refreshed.

The lab loads this checkout's bundle (jobdesk/labextension, built by ``npm run build`` in
labextension/) through a JUPYTER_DATA_DIR in the test's temporary directory
(tests/server/jupyter_launch.py), never the copy installed in the environment.
"""

from __future__ import annotations

import json
import os
import time
from pathlib import Path

import pytest
import requests

from lab_helpers import open_sidebar, start_lab
from jobdesk.desk import Desk
from jobdesk.localtap import serve

REPO = Path(__file__).resolve().parents[2]
DOCS = REPO / "docs"
# axe-core (Deque Systems, MPL-2.0), the npm devDependency of labextension/ (4.14.1 when
# written): its rules follow WCAG 2.x; impacts "serious" and "critical" must not appear.
AXE = REPO / "labextension" / "node_modules" / "axe-core" / "axe.min.js"
SKY_QUERY = "SELECT orrery_id, ra, dec, mag_lime, parallax FROM orrery.sources"
SMALL = "SELECT TOP 5 orrery_id, ra, dec FROM orrery.sources ORDER BY orrery_id"
SETTINGS = "lab/api/settings/jobdesk-labextension:sidebar"


@pytest.fixture(scope="module")
def taps(tmp_path_factory):
    with serve(state=tmp_path_factory.mktemp("fast"), rows=4000, exec_delay=0.5) as fast, \
            serve(state=tmp_path_factory.mktemp("slowish"), rows=4000, exec_delay=8) as slowish:
        yield fast, slowish


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    work = tmp_path_factory.mktemp("glance")
    with start_lab(work, work / "desk") as jp:
        yield jp


@pytest.fixture
def context(browser):
    ctx = browser.new_context(viewport={"width": 1400, "height": 900})
    yield ctx
    ctx.close()


def set_prefs(lab, **values) -> None:
    answer = requests.put(lab.url(SETTINGS), headers=lab.auth, timeout=30,
                          data=json.dumps({"raw": json.dumps(values)}))
    assert answer.status_code in (200, 204), answer.text


def row(page, job_id: str):
    return page.locator(f'#jobdesk-sidebar .jd-row[data-job-id="{job_id}"]')


def toasts(page, text: str):
    return page.locator(".jp-toast-message", has_text=text)


WATCH_TOASTS = """() => {
    window.__jdToasts = [];
    new MutationObserver(() => {
        for (const m of document.querySelectorAll('.jp-toast-message')) {
            if (!m.dataset.jdSeen) {
                m.dataset.jdSeen = '1';
                window.__jdToasts.push(m.textContent);
            }
        }
    }).observe(document.body, {childList: true, subtree: true});
}"""


def announced(page, text: str) -> int:
    """Toasts with ``text`` this page has shown (recorded as they appear: they close alone)."""
    return page.evaluate("(t) => (window.__jdToasts || []).filter(m => m.includes(t)).length",
                         text)


def axe(page, selector: str) -> list[dict]:
    if not page.evaluate("() => typeof window.axe !== 'undefined'"):
        page.add_script_tag(path=str(AXE))
    return page.evaluate("""async (sel) => {
        const r = await window.axe.run(document.querySelector(sel));
        return r.violations.filter(v => v.impact === 'serious' || v.impact === 'critical')
            .map(v => ({id: v.id, impact: v.impact, help: v.help,
                        nodes: v.nodes.slice(0, 3).map(n => n.target.join(' '))}));
    }""", selector)


def set_theme(page, name: str) -> None:
    page.evaluate("(t) => window.jupyterapp.commands.execute('apputils:change-theme', "
                  "{theme: t})", name)
    light = name == "JupyterLab Light"
    page.wait_for_function("(light) => document.body.dataset.jpThemeLight === String(light)",
                           arg=light, timeout=30_000)
    page.wait_for_timeout(800)


def shoot(page, selector: str, name: str, tmp_path: Path) -> None:
    refresh = os.environ.get("JOBDESK_REFRESH_SCREENSHOT") == "1"
    target = (DOCS if refresh else tmp_path) / name
    page.locator(selector).screenshot(path=str(target))
    assert target.stat().st_size > 5_000


def test_quick_look_live_details_order_and_accessibility(lab, context, taps, tmp_path,
                                                          monkeypatch):
    if not AXE.exists():
        pytest.skip("needs axe-core: cd labextension && npm install")
    fast, slowish = taps
    set_prefs(lab, notifications=False)
    desk = Desk(lab.desk_root, wait_window=2)
    monkeypatch.setenv("JPY_SESSION_NAME", "surveys/north.ipynb")
    sky = desk.submit(fast.url, SKY_QUERY, label="the whole catalogue").wait(
        timeout=90, progress=False)
    monkeypatch.setenv("JPY_SESSION_NAME", "surveys/south.ipynb")
    small = desk.submit(fast.url, SMALL, label="five sources").wait(timeout=60, progress=False)

    page = context.new_page()
    open_sidebar(page, lab)
    row(page, sky.id).wait_for(timeout=20_000)

    # Order: sort by rows from the keyboard; the notebook menu lists both notebooks.
    sort = page.locator("#jobdesk-sidebar .jd-sort")
    sort.focus()
    sort.select_option("rows")
    page.wait_for_function(
        "(id) => document.querySelector('#jobdesk-sidebar .jd-row')?.dataset.jobId === id",
        arg=sky.id, timeout=10_000)
    notebooks = page.locator("#jobdesk-sidebar .jd-notebook-filter option")
    labels = notebooks.all_inner_texts()
    assert any(t.startswith("north.ipynb — 1 job") and "cached" in t for t in labels), labels
    page.locator("#jobdesk-sidebar .jd-notebook-filter").select_option("surveys/south.ipynb")
    page.wait_for_function(
        "() => document.querySelectorAll('#jobdesk-sidebar .jd-row').length === 1",
        timeout=10_000)
    assert row(page, small.id).is_visible()
    page.locator("#jobdesk-sidebar .jd-notebook-filter").select_option(label="All notebooks")
    row(page, sky.id).wait_for(timeout=10_000)

    # Keyboard only: a row, Enter for details, then Tab to the histogram controls.
    row(page, sky.id).focus()
    page.keyboard.press("Enter")
    details = page.locator(f"#jobdesk-job-{sky.id}")
    svg = details.locator(".jd-quicklook-sky svg")
    svg.wait_for(timeout=30_000)
    title = svg.locator("title").text_content()
    assert f"{sky.record['rows']:,} sources" in title, title
    assert "ra [deg]" in svg.inner_html()  # the service's FIELD unit
    column = details.locator(".jd-quicklook-column")
    column.focus()
    column.select_option("mag_lime")
    page.keyboard.press("Tab")
    assert page.evaluate("() => document.activeElement.textContent") == "Draw histogram"
    page.keyboard.press("Enter")
    hist = details.locator(".jd-quicklook-hist svg")
    hist.wait_for(timeout=30_000)
    assert "mag_lime [mag]" in hist.inner_html()

    # Accessibility, light theme then dark: no serious or critical findings. First, that the
    # check can fail: an image without alt text in the panel is a critical finding.
    page.evaluate("() => document.querySelector('#jobdesk-sidebar').append("
                  "Object.assign(document.createElement('img'), {id: 'jd-bad-img', src: "
                  "'data:image/gif;base64,R0lGODlhAQABAAAAACw='}))")
    assert "image-alt" in [v["id"] for v in axe(page, "#jobdesk-sidebar")]
    page.evaluate("() => document.getElementById('jd-bad-img').remove()")
    assert axe(page, "#jobdesk-sidebar") == []
    assert axe(page, f"#jobdesk-job-{sky.id}") == []
    shoot(page, "#jobdesk-sidebar", "sidebar-light.png", tmp_path)
    shoot(page, f"#jobdesk-job-{sky.id} .jd-quicklook", "quicklook-light.png", tmp_path)
    set_theme(page, "JupyterLab Dark")
    assert axe(page, "#jobdesk-sidebar") == []
    assert axe(page, f"#jobdesk-job-{sky.id}") == []
    shoot(page, "#jobdesk-sidebar", "sidebar-dark.png", tmp_path)
    shoot(page, f"#jobdesk-job-{sky.id} .jd-quicklook", "quicklook-dark.png", tmp_path)
    set_theme(page, "JupyterLab Light")

    # Live details: opened while the job runs, they fill in as the row does, with no reload.
    monkeypatch.delenv("JPY_SESSION_NAME")
    running = desk.submit(slowish.url, SMALL.replace("TOP 5", "TOP 4"),
                          label="followed live")
    row(page, running.id).wait_for(timeout=20_000)
    row(page, running.id).focus()
    page.keyboard.press("Enter")
    live = page.locator(f"#jobdesk-job-{running.id}")
    cache_cell = live.locator("table.jd-facts tr", has_text="Cache")
    cache_cell.wait_for(timeout=20_000)
    assert "not cached" in cache_cell.inner_text()
    page.wait_for_selector(f'.jd-row[data-job-id="{running.id}"][data-phase="COMPLETED"]',
                           timeout=90_000)
    live.locator("table.jd-facts tr", has_text="personal cache").wait_for(timeout=15_000)
    assert "4 rows" in live.locator("table.jd-facts tr", has_text="Rows").inner_text()


def test_notifications_once_across_tabs_and_reloads_and_the_setting(lab, context, taps):
    _, slowish = taps
    set_prefs(lab, notifications=True, notifyAfterSeconds=0)
    first, second = context.new_page(), context.new_page()  # two tabs of one browser profile
    for page in (first, second):
        open_sidebar(page, lab)
        page.evaluate(WATCH_TOASTS)
    desk = Desk(lab.desk_root, wait_window=2)
    job = desk.submit(slowish.url, SMALL.replace("TOP 5", "TOP 3"), label="announce me once")
    for page in (first, second):
        row(page, job.id).wait_for(timeout=20_000)
    for page in (first, second):
        page.wait_for_selector(f'.jd-row[data-job-id="{job.id}"][data-phase="COMPLETED"]',
                               timeout=90_000)
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline and not sum(announced(p, "announce me once")
                                                  for p in (first, second)):
        first.wait_for_timeout(250)
    first.wait_for_timeout(3000)  # room for a second, wrong announcement
    counts = [announced(p, "announce me once") for p in (first, second)]
    assert sorted(counts) == [0, 1], counts
    shown = first if counts[0] else second
    toast = toasts(shown, "announce me once").locator("xpath=ancestor::*[contains(@class, "
                                                      "'Toastify__toast')][1]")
    assert toast.get_by_role("button", name="Insert code").count() == 1
    toast.get_by_role("button", name="Open details").click()
    shown.locator(f"#jobdesk-job-{job.id}.jd-details").wait_for(timeout=20_000)

    # A reload does not announce it again.
    shown.reload()
    shown.locator("#jobdesk-sidebar").wait_for(state="attached", timeout=60_000)
    shown.evaluate(WATCH_TOASTS)
    shown.wait_for_timeout(4000)
    assert announced(shown, "announce me once") == 0

    # A truncated result is announced even when short completed jobs pass quietly.
    set_prefs(lab, notifications=True, notifyAfterSeconds=3600)
    shown.reload()
    open_sidebar(shown, lab)
    shown.evaluate(WATCH_TOASTS)
    cut = desk.submit(slowish.url, SMALL.replace("TOP 5", "TOP 6"), maxrec=2,
                      label="cut at two rows")
    shown.wait_for_selector(f'.jd-row[data-job-id="{cut.id}"][data-phase="COMPLETED"]',
                            timeout=90_000)
    # Either open tab may win the announcement (they share one claim per browser profile).
    deadline = time.monotonic() + 20
    while time.monotonic() < deadline and not sum(announced(p, "cut at two rows")
                                                  for p in (first, second)):
        shown.wait_for_timeout(250)
    assert desk.job(cut.id).record["truncated"] == 1
    words = " | ".join(p.evaluate("() => window.__jdToasts.join(' | ')") for p in (first, second))
    assert "Result truncated (not the full answer): cut at two rows" in words, words

    # The setting turns them off.
    set_prefs(lab, notifications=False, notifyAfterSeconds=0)
    for page in (first, second):
        page.reload()
        open_sidebar(page, lab)
        page.evaluate(WATCH_TOASTS)
    quiet = desk.submit(slowish.url, SMALL.replace("TOP 5", "TOP 2"), label="not announced")
    row(first, quiet.id).wait_for(timeout=20_000)
    first.wait_for_selector(f'.jd-row[data-job-id="{quiet.id}"][data-phase="COMPLETED"]',
                            timeout=90_000)
    first.wait_for_timeout(3000)
    assert announced(first, "not announced") + announced(second, "not announced") == 0


def test_fetch_progress_shows_in_the_row_and_the_details(lab, context):
    # The figures a fetching process records (jobdesk/transfer.py), written the way it writes
    # them: through the index the server reads. The service is invented and never contacted.
    from jobdesk.index import Index

    index = Index(lab.desk_root / "index.sqlite")
    job_id = "f0e1d2c3b4a59687"
    index.insert({"id": job_id, "key": "9" * 64, "service": "http://tap.delta.invalid/tap",
                  "adql": "SELECT * FROM orrery.visits", "label": "a long download",
                  "phase": "EXECUTING", "created": time.time(), "layer": "personal"})
    index.update(job_id, fetch={"stage": "download", "bytes": 12_000_000,
                                "total": 34_000_000, "rows": None, "percent": 35.3})
    page = context.new_page()
    open_sidebar(page, lab)
    bar = row(page, job_id).locator(".jd-fetch")
    bar.wait_for(timeout=20_000)
    assert "downloading 12 MB of 34 MB (35 %)" in bar.inner_text()
    assert float(bar.locator("progress").get_attribute("value")) == pytest.approx(35.3)
    row(page, job_id).focus()
    page.keyboard.press("Enter")
    facts = page.locator(f"#jobdesk-job-{job_id}.jd-details table.jd-facts")
    facts.locator("tr", has_text="downloading").wait_for(timeout=20_000)
    # Conversion follows; the row and the open details follow the index without a reload.
    index.update(job_id, fetch={"stage": "convert", "bytes": 34_000_000, "total": 34_000_000,
                                "rows": 147_930, "percent": 80.0})
    facts.locator("tr", has_text="converting 147,930 rows (80 %)").wait_for(timeout=20_000)
    # The row redraws on the same change feed, maybe a moment after the details.
    row(page, job_id).locator(".jd-fetch", has_text="converting 147,930 rows").wait_for(
        timeout=20_000)
    index.forget(job_id)
