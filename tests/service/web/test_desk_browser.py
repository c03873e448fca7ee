"""The desk in a real browser: Debian's chromium driven by Selenium through chromedriver, over real HTTP.

One walk through the desk as a submitter, a steward and an admin would take it, with a screenshot
of every page written to a folder for a person to look at (``SEALFOLD_SCREENSHOTS`` names it;
otherwise the test's tmp dir, printed). Without chromium, chromedriver or selenium the test is
skipped with the reason printed, or fails when SEALFOLD_REQUIRE_ALL=1 (CI).
"""

from __future__ import annotations

import os
import shutil
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from service.gate.policy import default_policy
from service.gate.verdict import ChampionFolds, PlanFacts, judge
from tests.support.api import Api
from tests.support.reviews import RAW_HOLDOUT, make_submission
from tests.support.servers import ServedApp, skip_or_fail

pytestmark = [pytest.mark.browser, pytest.mark.slow]

PHONE_WIDTH = 390



def _gone(element: Any) -> bool:
    """Whether ``element``'s page has been replaced (chromium reports it either way while swapping)."""
    try:
        element.is_enabled()
    except _page_in_flux():
        return True
    return False


def _settled(driver: Any) -> Any:
    """A 30 s wait that rides over the moment a page is swapped for the next one."""
    from selenium.webdriver.support.ui import WebDriverWait

    return WebDriverWait(driver, 30, ignored_exceptions=_page_in_flux())


def _page_in_flux() -> tuple[type[Exception], ...]:
    """What a wait may meet while the browser swaps one page for the next: an element of the old document."""
    from selenium.common.exceptions import StaleElementReferenceException, WebDriverException

    return (StaleElementReferenceException, WebDriverException)

def _binary(name: str, *others: str) -> str:
    for candidate in (name, *others):
        found = shutil.which(candidate) or (f"/usr/bin/{candidate}" if Path(f"/usr/bin/{candidate}").is_file()
                                            else None)
        if found:
            return found
    skip_or_fail(f"{name} is not installed (apt-get install chromium chromium-driver)")
    raise AssertionError("unreachable")


@pytest.fixture
def browser() -> Iterator[Any]:
    try:
        from selenium import webdriver
        from selenium.webdriver.chrome.service import Service
    except ImportError:
        skip_or_fail("selenium is not installed (pip install -e '.[dev]')")
        raise
    options = webdriver.ChromeOptions()
    options.binary_location = _binary("chromium", "chromium-browser")
    for flag in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
                 "--disable-background-networking", "--disable-component-update", "--no-first-run",
                 "--window-size=1280,900"):
        options.add_argument(flag)
    driver = webdriver.Chrome(service=Service(_binary("chromedriver")), options=options)
    driver.set_page_load_timeout(60)
    try:
        yield driver
    finally:
        driver.quit()


class Shots:
    """Writes a full-page screenshot per step, numbered in the order taken."""

    def __init__(self, driver: Any, folder: Path) -> None:
        self.driver, self.folder, self.count = driver, folder, 0
        folder.mkdir(parents=True, exist_ok=True)

    def take(self, name: str, width: int = 1280) -> Path:
        self.count += 1
        height = int(self.driver.execute_script("return document.documentElement.scrollHeight"))
        self.driver.set_window_size(width, min(max(height + 140, 600), 8000))
        path = self.folder / f"{self.count:02d}-{name}.png"
        assert self.driver.save_screenshot(str(path)), path
        self.driver.set_window_size(1280, 900)
        return path


def _click(driver: Any, element: Any, url_part: str) -> None:
    """Click a link or button and wait for the page it leads to (form posts return before it loads).

    The page clicked on may itself carry ``url_part`` (a sign-in page's ``next``), so the wait is for the
    old page to be gone as well.
    """
    from selenium.webdriver.support import expected_conditions
    from selenium.webdriver.support.ui import WebDriverWait

    element.click()
    WebDriverWait(driver, 30).until(lambda _d: _gone(element))
    WebDriverWait(driver, 30).until(expected_conditions.url_contains(url_part))
    WebDriverWait(driver, 30, ignored_exceptions=_page_in_flux()).until(
        lambda d: d.execute_script("return document.readyState") == "complete")


def _sign_in(driver: Any, token: str, lands_on: str) -> None:
    from selenium.webdriver.common.by import By

    assert "/desk/sign-in" in driver.current_url, driver.current_url
    driver.find_element(By.ID, "key").send_keys(token)
    _click(driver, driver.find_element(By.CSS_SELECTOR, "form[action='/desk/sign-in'] button[type=submit]"), lands_on)


def _sign_out(driver: Any) -> None:
    from selenium.webdriver.common.by import By

    _click(driver, driver.find_element(By.CSS_SELECTOR, "form[action='/desk/sign-out'] button"), "/desk/sign-out")
    assert "You are signed out." in driver.page_source


def _board_rows(driver: Any) -> list[Any]:
    from selenium.webdriver.common.by import By

    return list(driver.find_elements(By.CSS_SELECTOR, "#board ~ form tbody tr"))


def test_the_desk_in_a_real_browser(api: Api, dataset: dict[str, Any], browser: Any, tmp_path: Path) -> None:
    from selenium.webdriver.common.by import By

    folder = Path(os.environ.get("SEALFOLD_SCREENSHOTS") or tmp_path / "screenshots")
    shots = Shots(browser, folder)
    print(f"desk screenshots: {folder}")
    owner, ds_id = api.key_ids["submitter"], dataset["id"]
    champion = make_submission(api.engine, dataset, owner, label="ridge, four columns", scores=[55, 56, 54, 57, 53])
    api.post("steward", f"/v1/datasets/{ds_id}/champion", json={"submission": champion})
    tries = [make_submission(api.engine, dataset, owner, label=f"gradient boosting, try {i + 1}",
                             scores=[50 + i / 20, 52 + i / 15, 49 + i / 25, 53 + i / 20, 51 + i / 10],
                             decision="fail" if i % 5 == 4 else "pass") for i in range(22)]
    # One judged for real against the champion: worse by 2.56 rmse on every fold (the gate's own verdict).
    champion_scores = [55.0, 56.0, 54.0, 57.0, 53.0]
    worse_scores = [c + d for c, d in zip(champion_scores, [2.4, 2.7, 2.5, 2.6, 2.6], strict=True)]
    cells = [(0, f) for f in range(5)]
    plan = dataset["fold_plan"]
    key = (plan["scheme"], plan["folds"], plan["seed"])
    judged = judge(default_policy("regression"), dict(zip(cells, worse_scores, strict=True)),
                   {c: v * 1.3 for c, v in zip(cells, worse_scores, strict=True)},
                   ChampionFolds(champion, dict(zip(cells, champion_scores, strict=True)), key), None,
                   PlanFacts(key, {c: (283, 71) for c in cells}), policy_version=0)
    worse = make_submission(api.engine, dataset, owner, label="random forest, deeper", scores=worse_scores,
                            verdict_doc=judged, champion_id=champion)
    with ServedApp(api.app) as served:
        # A report link pasted in a chat, opened without a session: sign-in first, then the report.
        browser.get(f"{served.url}/v1/submissions/{tries[0]}/report")
        assert "/desk/sign-in?next=" in browser.current_url
        shots.take("sign-in")
        _sign_in(browser, api.tokens["submitter"], "/report")
        assert browser.current_url == f"{served.url}/desk/submissions/{tries[0]}/report"
        assert browser.find_element(By.TAG_NAME, "h1").text == "Review of gradient boosting, try 1"
        shots.take("report-after-sign-in")
        browser.get(f"{served.url}/desk/submissions/{worse}/report")
        verdict_box = browser.find_element(By.CSS_SELECTOR, "section.verdict").text
        assert "Worse than the champion by 2.56 rmse, beyond the margin of 0; the folds show it clearly." in verdict_box
        assert "Figures: Worse than champion" in verdict_box and "one-sided p" in verdict_box
        shots.take("report-plain-reasons")
        # A submitter may not edit the policy.
        browser.get(f"{served.url}/desk/datasets/{ds_id}/policy")
        assert "This page needs a steward key" in browser.page_source
        shots.take("policy-refused-to-a-submitter")
        _sign_out(browser)
        shots.take("signed-out")

        # A steward: the datasets, a dataset, its board page by page.
        browser.get(f"{served.url}/desk/")
        _sign_in(browser, api.tokens["steward"], "/desk/")
        assert browser.current_url == f"{served.url}/desk/"
        shots.take("datasets")
        _click(browser, browser.find_element(By.LINK_TEXT, "diabetes"), "/desk/datasets/")
        assert browser.find_element(By.TAG_NAME, "h1").text == "diabetes"
        first_page = _board_rows(browser)
        assert len(first_page) == 20
        assert "champion" not in first_page[0].text
        shots.take("dataset")
        shots.take("dataset-phone", width=PHONE_WIDTH)
        browser.set_window_size(PHONE_WIDTH, 900)
        overflow = browser.execute_script("return document.documentElement.scrollWidth - window.innerWidth")
        browser.set_window_size(1280, 900)
        assert overflow <= 0, f"the page is {overflow}px wider than a phone; wide tables must scroll in their box"
        _click(browser, browser.find_element(By.LINK_TEXT, "Next page"), "cursor=")
        second_page = _board_rows(browser)
        assert len(second_page) == 4  # 24 on the board: 22 tries, the champion (rmse 55), the worse one (57.56)
        assert "champion" in second_page[2].text and "random forest" in second_page[3].text
        shots.take("board-page-2")
        _click(browser, browser.find_element(By.LINK_TEXT, "First page"), "per=20")

        # A report from the board, and back.
        _click(browser, _board_rows(browser)[0].find_element(By.CSS_SELECTOR, "a[href*='/report']"), "/report")
        assert browser.find_element(By.TAG_NAME, "h1").text == "Review of gradient boosting, try 1"
        assert str(RAW_HOLDOUT)[:6] not in browser.page_source
        _click(browser, browser.find_element(By.LINK_TEXT, "Back to the board"), "#board")

        # Two submissions side by side.
        rows = _board_rows(browser)
        rows[0].find_element(By.CSS_SELECTOR, "input[name=a]").click()
        rows[1].find_element(By.CSS_SELECTOR, "input[name=b]").click()
        _click(browser, browser.find_element(By.XPATH, "//button[text()='Compare A with B']"), "/desk/compare?")
        assert "/desk/compare?" in browser.current_url
        page = browser.page_source
        assert "Paired fold scores" in page and "corrected resampled t = " in page
        shots.take("compare")

        # The policy: refused with the API's message, then saved as version 1.
        browser.get(f"{served.url}/desk/datasets/{ds_id}")
        _click(browser, browser.find_element(By.LINK_TEXT, "Edit the policy"), "/policy")
        margin = browser.find_element(By.ID, "f-champion_margin")
        margin.clear()
        margin.send_keys("-1")
        browser.find_element(By.XPATH, "//button[text()='Save as a new version']").click()
        _settled(browser).until(lambda d: d.find_elements(By.ID, "f-champion_margin-error"))
        message = api.problem(api.call("steward", "PUT", f"/v1/datasets/{ds_id}/policy",
                                       json={"champion_margin": -1}), 422)["errors"][0]["detail"]
        assert message in browser.find_element(By.ID, "f-champion_margin-error").text
        shots.take("policy-refused-field")
        margin = browser.find_element(By.ID, "f-champion_margin")
        margin.clear()
        margin.send_keys("1.5")
        _click(browser, browser.find_element(By.XPATH, "//button[text()='Save as a new version']"), "#policy")
        assert browser.current_url.endswith(f"/desk/datasets/{ds_id}#policy")
        assert "margin allowed behind the champion" in browser.page_source
        assert api.get("steward", f"/v1/datasets/{ds_id}/policy").get_json()["champion_margin"] == 1.5

        # Promote the best passing submission, after the confirmation.
        _click(browser, _board_rows(browser)[0].find_element(By.PARTIAL_LINK_TEXT, "promote"), "/promote?")
        assert browser.find_element(By.TAG_NAME, "h1").text == "Promote a champion?"
        shots.take("promote-confirm")
        _click(browser, browser.find_element(By.XPATH, "//button[text()='Yes, promote it']"), "#champion")
        assert browser.current_url.endswith("#champion")
        assert "champion" in _board_rows(browser)[0].text
        assert api.get("steward", f"/v1/datasets/{ds_id}/champion").get_json()["champion"]["submission"] == tries[0]
        shots.take("promoted")
        _click(browser, browser.find_element(By.LINK_TEXT, "Audit trail"), "/desk/audit")
        assert "promoted a champion" in browser.page_source and "set a policy" in browser.page_source
        shots.take("audit-trail")
        _sign_out(browser)

        # An admin: create a key and revoke it.
        browser.get(f"{served.url}/desk/keys")
        _sign_in(browser, api.tokens["admin"], "/desk/keys")
        browser.find_element(By.ID, "key-name").send_keys("night shift")
        browser.find_element(By.XPATH, "//button[text()='Create the key']").click()
        _settled(browser).until(lambda d: d.find_elements(By.CSS_SELECTOR, ".done code"))
        token = browser.find_element(By.CSS_SELECTOR, ".done code").text
        assert api.get(token, "/v1/datasets").status_code == 200
        shots.take("key-created")
        browser.find_element(By.CSS_SELECTOR, "button[aria-label='revoke night shift']").click()
        _settled(browser).until(lambda d: "revoked" in d.find_element(By.TAG_NAME, "main").text)
        assert api.get(token, "/v1/datasets").status_code == 401
        shots.take("keys")
        _sign_out(browser)
        browser.get(f"{served.url}/desk/")
        assert "/desk/sign-in" in browser.current_url
    taken = sorted(folder.glob("*.png"))
    assert len(taken) == shots.count and all(p.stat().st_size > 5_000 for p in taken)
