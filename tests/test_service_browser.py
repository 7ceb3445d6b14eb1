"""The review page in a real browser: Debian's headless Chromium driven by Selenium through
Debian's chromedriver (packages chromium and chromium-driver, installed by scripts/system-deps.sh).

Keyboard only: the page is reached with Tab and Enter, a pair is marked with the S key, and the
catalog is then read directly to see the verdict stored. The first view lists the pairs to judge;
a click on Same there stores a verdict and brings the next pair, and the D key marks that one. Search by choosing a file finds the
photo a transformed upload came from. Screenshots (desktop and a 390 px phone width) are saved
under test-artifacts/ (git-ignored) and their paths printed.
"""

import shutil
import time
from pathlib import Path

import pytest

from nearsight.indexer.storage.catalog import Catalog

from .service_support import API_KEY, COPIED, ServerProcess, artifacts_dir, resized_copy_group, transformed

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
CHROMEDRIVER = shutil.which("chromedriver") or ("/usr/bin/chromedriver" if Path("/usr/bin/chromedriver").exists() else None)

pytestmark = pytest.mark.skipif(
    not (CHROMIUM and CHROMEDRIVER),
    reason="headless Chromium is not installed (Debian packages chromium and chromium-driver; "
           "`bash scripts/system-deps.sh` as root installs them)",
)


@pytest.fixture(scope="module")
def browser():
    from selenium import webdriver  # in the test extra: a missing selenium is an install error, not a skip
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for arg in ("--headless=new", "--no-sandbox", "--disable-dev-shm-usage", "--disable-gpu",
                "--window-size=1280,900", "--disable-extensions", "--no-first-run"):
        options.add_argument(arg)
    driver = webdriver.Chrome(service=Service(executable_path=CHROMEDRIVER), options=options)
    driver.set_page_load_timeout(60)
    yield driver
    driver.quit()


def _wait(predicate, timeout=30, what="condition"):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            value = predicate()
        except Exception:  # the page may be between renders
            value = None
        if value:
            return value
        time.sleep(0.1)
    raise AssertionError(f"timed out waiting for {what}")


def _tab_to(driver, css_class, limit=60):
    """Press Tab until the focused element has `css_class` (keyboard only, as a person would)."""
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.keys import Keys

    for _ in range(limit):
        ActionChains(driver).send_keys(Keys.TAB).perform()
        if css_class in (driver.switch_to.active_element.get_attribute("class") or "").split():
            return driver.switch_to.active_element
    raise AssertionError(f"Tab never reached an element of class {css_class}")


def _press(driver, key):
    from selenium.webdriver.common.action_chains import ActionChains

    ActionChains(driver).send_keys(key).perform()


def test_review_a_pair_with_the_keyboard_and_the_verdict_is_stored(browser, live_server):
    from selenium.webdriver.common.keys import Keys

    driver = browser
    # The address `nearsight serve` prints: the key travels in the fragment, never to the server.
    driver.get(live_server.base + "/#key=" + API_KEY)
    _wait(lambda: driver.find_element("id", "view-judge").is_displayed(), what="the first view")
    assert "#key=" not in driver.current_url            # the page drops the key from the address
    _wait(lambda: "generation" in driver.find_element("id", "status-line").text, what="status line")
    driver.get(live_server.base + "/#/groups")
    _wait(lambda: driver.find_elements("css selector", ".group-card"), what="group cards")

    card = _tab_to(driver, "group-card")
    gid = card.get_attribute("href").rsplit("/", 1)[1]
    _press(driver, Keys.ENTER)
    _wait(lambda: driver.find_elements("css selector", "#pair-list button.compare"), what="pair list")
    _tab_to(driver, "compare")
    _press(driver, Keys.ENTER)
    _wait(lambda: driver.find_element("id", "view-pair").is_displayed(), what="pair view")
    _wait(lambda: driver.execute_script(
        "const a = document.getElementById('img-a'), b = document.getElementById('img-b');"
        "return a.complete && b.complete && a.naturalWidth > 0 && b.naturalWidth > 0;"), what="both previews")
    shot = artifacts_dir() / "review-pair.png"
    driver.save_screenshot(str(shot))
    print(f"screenshot: {shot}")

    caption_a = driver.find_element("id", "cap-a").text
    caption_b = driver.find_element("id", "cap-b").text
    a, b = (int(text.split("#", 1)[1].split(" ", 1)[0]) for text in (caption_a, caption_b))
    _press(driver, "s")
    _wait(lambda: "Marked same" in driver.find_element("id", "toast").text, what="confirmation")

    with Catalog(live_server.store / "catalog.sqlite") as catalog:
        stored = [v for v in catalog.latest_verdicts() if {v["file_a"], v["file_b"]} == {a, b}]
    assert [(v["verdict"], v["origin"]) for v in stored] == [("same", "review")]

    # The group page now shows the pair as judged.
    driver.get(f"{live_server.base}/#/group/{gid}")
    _wait(lambda: "marked same" in driver.find_element("id", "pair-list").text, what="verdict badge")


def test_search_by_choosing_a_file_finds_the_original(browser, live_server, service_store, tmp_path):
    name = next(n for n in service_store.originals if n not in COPIED)
    query = transformed(service_store.originals[name], tmp_path / f"query-{name}.jpg")
    driver = browser
    driver.get(live_server.base + "/#/search")
    chooser = _wait(lambda: driver.find_element("id", "search-file"), what="file input")
    chooser.send_keys(str(query))
    _wait(lambda: driver.find_elements("css selector", "#search-results li"), what="results")
    first = driver.find_element("css selector", "#search-results li .path").text
    assert first == str(service_store.originals[name])
    shot = artifacts_dir() / "review-search.png"
    driver.save_screenshot(str(shot))
    print(f"screenshot: {shot}")


def test_the_page_fits_a_phone_width(browser, live_server):
    driver = browser
    driver.set_window_size(390, 844)
    try:
        # The resize reaches the renderer asynchronously: on a busy machine the first layout can
        # still be the desktop one, so wait for the viewport before loading and measuring.
        _wait(lambda: driver.execute_script("return window.innerWidth;") <= 390, what="a 390 px viewport")
        measure = ("return [document.documentElement.scrollWidth - document.documentElement.clientWidth, "
                   "window.innerWidth];")
        for view, ready in (("groups", ".group-card"), ("judge", "#judge-list li button.judge-open")):
            driver.get(f"{live_server.base}/#/{view}")
            _wait(lambda: driver.find_elements("css selector", ready), what=f"the {view} view")
            overflow, width = driver.execute_script(measure)
            if overflow > 0:  # measured mid-layout? measure again once the page has settled
                time.sleep(1.0)
                overflow, width = driver.execute_script(measure)
            assert overflow <= 0, f"the {view} view is {overflow} px wider than a {width} px screen"
            shot = artifacts_dir() / f"review-phone-{view}.png"
            driver.save_screenshot(str(shot))
            print(f"screenshot: {shot}")
        # The pair to judge takes one screen: one picture at a time, in the same place; T shows the other.
        shown = ("return Array.from(document.querySelectorAll('#judge-side > figure'))"
                 ".map((f) => getComputedStyle(f).display !== 'none');")
        _wait(lambda: driver.execute_script(shown) == [True, False], what="one picture of the pair")
        _press(driver, "t")
        _wait(lambda: driver.execute_script(shown) == [False, True], what="the other picture in its place")
        _press(driver, "t")
    finally:
        driver.set_window_size(1280, 900)


@pytest.fixture
def queue_server(service_store):
    """A server of its own: the verdict clicked below reaches no other test."""
    process = ServerProcess(service_store.copy("browser-queue")).start()
    yield process
    process.stop()


def _shown_pair(driver) -> tuple[int, int]:
    return tuple(int(driver.find_element("id", cap).text.split("#", 1)[1].split(" ", 1)[0])
                 for cap in ("judge-cap-a", "judge-cap-b"))


def test_the_first_view_lists_pairs_to_judge_and_a_click_stores_a_verdict(browser, queue_server):
    driver = browser
    driver.get(queue_server.base + "/#key=" + API_KEY)
    _wait(lambda: driver.find_element("id", "view-judge").is_displayed(), what="the pairs to judge")
    listed = _wait(lambda: driver.find_elements("css selector", "#judge-list li button.judge-open"), what="listed pairs")
    assert len(listed) > 1
    _wait(lambda: driver.find_element("id", "judge-cap-a").text.startswith("#"), what="the pair shown")
    a, b = _shown_pair(driver)
    shot = artifacts_dir() / "review-judge.png"
    driver.save_screenshot(str(shot))
    print(f"screenshot: {shot}")

    driver.find_element("id", "judge-same").click()
    _wait(lambda: "Marked same" in driver.find_element("id", "toast").text, what="confirmation")
    with Catalog(queue_server.store / "catalog.sqlite") as catalog:
        stored = [v for v in catalog.latest_verdicts() if {v["file_a"], v["file_b"]} == {a, b}]
    assert [(v["verdict"], v["origin"]) for v in stored] == [("same", "review")]
    # The next pair comes, and the judged one is no longer listed.
    _wait(lambda: set(_shown_pair(driver)) != {a, b}, what="the next pair")
    assert len(driver.find_elements("css selector", "#judge-list li button.judge-open")) == len(listed) - 1
    # The group view's keys work here too: D marks the pair shown now as different.
    c, d = _shown_pair(driver)
    _press(driver, "d")
    _wait(lambda: "Marked different" in driver.find_element("id", "toast").text, what="second confirmation")
    with Catalog(queue_server.store / "catalog.sqlite") as catalog:
        stored = [v for v in catalog.latest_verdicts() if {v["file_a"], v["file_b"]} == {c, d}]
    assert [(v["verdict"], v["origin"]) for v in stored] == [("different", "review")]


@pytest.fixture
def keeper_server(service_store):
    """A server of its own: the keeper picked below reaches no other test."""
    process = ServerProcess(service_store.copy("browser-keeper")).start()
    yield process
    process.stop()


# Every element that lays out a box must hold its content: scrollWidth > clientWidth means text or an image
# sticks out of it (a mid-word break shows as overflow of a word-wrapping box too). Inline boxes (clientWidth 0)
# are measured through their block parents.
_OVERFLOWING = """
return Array.from(document.querySelectorAll(arguments[0] + ' *'))
  .filter((e) => e.offsetParent !== null && e.clientWidth > 0 && e.scrollWidth > e.clientWidth + 1)
  .map((e) => `${e.tagName.toLowerCase()}#${e.id}.${e.className}: ${e.scrollWidth} > ${e.clientWidth}`);
"""


def _no_overflow(driver, view: str, shot_name: str, *, scope: str | None = None) -> None:
    for width in (1280, 390):
        driver.set_window_size(width, 900)
        _wait(lambda: abs(driver.execute_script("return window.innerWidth;") - width) < 20, what=f"{width} px")
        time.sleep(0.3)  # one layout after the resize
        found = driver.execute_script(_OVERFLOWING, scope or f"#view-{view}")
        shot = artifacts_dir() / f"{shot_name}-{width}.png"
        driver.save_screenshot(str(shot))
        print(f"screenshot: {shot}")
        assert not found, f"at {width} px: {found}"
    driver.set_window_size(1280, 900)


def test_a_group_shows_metadata_side_by_side_and_a_click_changes_the_keeper(browser, keeper_server):
    """The group page shows the keeper's reason (the plan's own words, from GET /v1/groups/<gid>), each file's
    metadata, and a "Keep this one" button whose click is stored in the catalog and makes that file the keeper.
    The pair page outlines the common region on both images. Nothing overflows at 1280 or 390 px."""
    driver = browser
    client = keeper_server.client()
    groups = client.get("/v1/groups?limit=200").json()["groups"]
    group, photo = resized_copy_group(groups)
    smaller = next(m["id"] for m in group["members"] if m["path"].endswith(f"/{photo}-smaller.jpg"))
    reason = client.get(f"/v1/groups/{group['gid']}").json()["now"]["keeper_reason"]
    client.close()

    driver.get(keeper_server.base + "/#key=" + API_KEY)
    _wait(lambda: driver.find_element("id", "view-judge").is_displayed(), what="the first view")
    driver.get(f"{keeper_server.base}/#/group/{group['gid']}")
    _wait(lambda: driver.find_elements("css selector", "#pair-list li.keeper dl.meta"), what="the keeper's card")
    assert reason in driver.find_element("id", "group-facts").text
    assert "Captured" in driver.find_element("css selector", "#pair-list li.keeper dl.meta").text
    _no_overflow(driver, "group", "review-group")

    card = next(c for c in driver.find_elements("css selector", "#pair-list li.member")
                if c.find_element("css selector", ".name").text == f"{photo}-smaller.jpg")
    card.find_element("css selector", "button.keep-this").click()
    _wait(lambda: driver.find_element("css selector", "#pair-list li.keeper .name").text == f"{photo}-smaller.jpg",
          what="the picked file as the keeper")
    assert "chosen by a person" in driver.find_element("id", "group-facts").text
    with Catalog(keeper_server.store / "catalog.sqlite") as catalog:
        picked = [r["file_id"] for r in catalog.conn.execute("SELECT file_id FROM keeper_picks")]
    assert picked == [smaller]

    # The original beside its 75 % resize: verification outlines (nearly) the whole of both.
    card = next(c for c in driver.find_elements("css selector", "#pair-list li.member")
                if c.find_element("css selector", ".name").text == f"{photo}.jpg")
    card.find_element("css selector", "button.compare").click()
    _wait(lambda: driver.find_element("id", "view-pair").is_displayed(), what="pair view")
    _wait(lambda: driver.execute_script(
        "const a = document.getElementById('img-a'), b = document.getElementById('img-b');"
        "return a.complete && b.complete && a.naturalWidth > 0 && b.naturalWidth > 0;"), what="both previews")
    for frame in ("frame-a", "frame-b"):
        region = driver.find_element("css selector", f"#{frame} .region").size
        image = driver.find_element("css selector", f"#{frame} img").size
        assert region["width"] * region["height"] >= 0.7 * image["width"] * image["height"], (frame, region, image)
    assert "keypoints agree" in driver.find_element("id", "pair-match").text
    _no_overflow(driver, "pair", "review-pair-region")


@pytest.fixture
def bulk_server(service_store):
    """A server of its own: the verdicts clicked below reach no other test."""
    process = ServerProcess(service_store.copy("browser-bulk")).start()
    yield process
    process.stop()


def test_a_whole_group_is_judged_with_one_click_and_taken_back_with_undo(browser, bulk_server):
    """"This group is wrong" stores "different" for each copy against the keeper (read back from the catalog
    with sqlite3), the group splits, and Undo takes exactly those verdicts back: the group is whole again."""
    driver = browser
    client = bulk_server.client()
    groups = client.get("/v1/groups?limit=200").json()["groups"]
    group = next(g for g in groups if any(m["path"].endswith("/astronaut-smaller.jpg") for m in g["members"]))
    driver.get(bulk_server.base + "/#key=" + API_KEY)
    _wait(lambda: driver.find_element("id", "view-judge").is_displayed(), what="the first view")
    driver.get(f"{bulk_server.base}/#/group/{group['gid']}")
    _wait(lambda: driver.find_elements("css selector", "#pair-list li.keeper"), what="the group")
    driver.find_element("id", "group-wrong").click()
    _wait(lambda: driver.find_element("id", "undo-bar").is_displayed(), what="the undo bar")

    def stored():
        with Catalog(bulk_server.store / "catalog.sqlite") as catalog:
            return sorted((v["verdict"], v["file_a"], v["file_b"]) for v in catalog.latest_verdicts())

    judged = stored()
    assert len(judged) == group["size"] - 1 and {v for v, _, _ in judged} == {"different"}
    assert all(g["gid"] != group["gid"] for g in client.get("/v1/groups?limit=200").json()["groups"])  # split

    driver.find_element("id", "undo-button").click()
    _wait(lambda: not driver.find_element("id", "undo-bar").is_displayed(), what="the undo to finish")
    assert stored() == []
    _wait(lambda: driver.find_elements("css selector", "#pair-list li.keeper"), what="the group again")
    assert any(g["gid"] == group["gid"] for g in client.get("/v1/groups?limit=200").json()["groups"])
    client.close()


def test_the_group_list_the_pairs_to_judge_and_the_reports_fit_both_widths(browser, live_server, service_store,
                                                                            tmp_path, run_cli):
    """The overflow check (no element's scrollWidth over its clientWidth) at 1280 and 390 px on the review
    page's group list and pairs to judge, and on the HTML reports of `groups` and `check` opened from disk;
    screenshots of each are kept in test-artifacts/."""
    driver = browser
    for view, ready in (("groups", ".group-card"), ("judge", "#judge-list li button.judge-open")):
        driver.get(f"{live_server.base}/#/{view}")
        _wait(lambda: driver.find_elements("css selector", ready), what=f"the {view} view")
        _no_overflow(driver, view, f"review-{view}")
    reports = tmp_path / "reports"
    run_cli("groups", "--store", live_server.store, "--format", "html", "--out", reports / "groups.html", check_exit=0)
    donated = [transformed(p, tmp_path / f"donated-{p.name}") for p in list(service_store.originals.values())[:3]]
    run_cli("check", *donated, "--store", live_server.store, "--format", "html", "--out", reports / "check.html",
            check_exit=0)
    for name in ("groups", "check"):
        driver.get((reports / f"{name}.html").as_uri())
        _wait(lambda: driver.find_elements("css selector", "section figure img"), what=f"the {name} report")
        _no_overflow(driver, name, f"report-{name}", scope="body")
