"""The status page in a real browser: headless Chromium (Debian's, driven by Playwright's Python
package) against `stockrelay serve` and a solve worker as real processes. The browser is
challenged for the key and signs in with it as the HTTP Basic password; the page shows the
networks, their versions and solve states, and the policy heatmap as an inline SVG.

A full-page screenshot is kept in tests/artifacts/ (git-ignored) for a person to look at."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import httpx2
import pytest

from tests.e2e.live import Live, api_key, demo_document, migrate, wait_until_solved

CHROMIUM = Path("/usr/bin/chromium")
ARTIFACTS = Path(__file__).resolve().parents[1] / "artifacts"
SECOND_NAME = "Garden hoses <& sprinklers>"


def _chromium_or_skip() -> Any:
    if not CHROMIUM.exists():
        pytest.skip(
            f"no Chromium at {CHROMIUM}: install Debian's package "
            "(apt-get install -y --no-install-recommends chromium); .ci/run tries to"
        )
    sync_api = pytest.importorskip("playwright.sync_api", reason="playwright (test extra)")
    return sync_api


def test_status_page_in_chromium(tmp_path: Path, live: Live) -> None:
    sync_api = _chromium_or_skip()
    url = f"sqlite:///{tmp_path / 'stockrelay.db'}"
    migrate(url)
    base = live.api(url)
    live.worker(url)
    key = api_key(url)
    with httpx2.Client(
        base_url=base, timeout=10, headers={"authorization": f"Bearer {key}"}
    ) as client:
        first = client.post("/v1/networks", json={**demo_document(), "criteria": ["discounted"]})
        assert first.status_code == 201, first.text
        second = client.post(
            "/v1/networks", json={**demo_document(), "name": SECOND_NAME, "discount": 0.95}
        )
        assert second.status_code == 201, second.text
        first_id, second_id = first.json()["id"], second.json()["id"]
        for network_id in (first_id, second_id):
            wait_until_solved(live, client, network_id, ["discounted"])

    with sync_api.sync_playwright() as playwright:
        browser = playwright.chromium.launch(executable_path=str(CHROMIUM))
        try:
            # Without credentials the browser gets the challenge that makes a person's browser
            # ask for them (headless, with nothing to answer, Chromium ends the navigation).
            anonymous = browser.new_context()
            refused = anonymous.request.get(base + "/status")
            assert refused.status == 401
            assert refused.headers["www-authenticate"].startswith('Basic realm="stockrelay"')
            with pytest.raises(sync_api.Error, match="ERR_INVALID_AUTH_CREDENTIALS"):
                anonymous.new_page().goto(base + "/status")
            anonymous.close()

            context = browser.new_context(
                http_credentials={"username": "operations", "password": key},
                viewport={"width": 1280, "height": 900},
            )
            page = context.new_page()
            response = page.goto(base + "/status")
            assert response is not None and response.status == 200

            rows = page.locator("table.networks tbody tr")
            assert rows.count() == 2
            demo_row = page.locator(f'table.networks tr[data-network="{first_id}"]')
            assert demo_row.locator("td").nth(1).inner_text() == demo_document()["name"]
            assert demo_row.locator("td").nth(2).inner_text() == "1"
            assert demo_row.locator('td[data-criterion="discounted"] .state').inner_text() == (
                "ready"
            )
            assert demo_row.locator('td[data-criterion="average"]').inner_text() == (
                "not requested"
            )
            hostile_row = page.locator(f'table.networks tr[data-network="{second_id}"]')
            assert hostile_row.locator("td").nth(1).inner_text() == SECOND_NAME

            heading = page.locator("#policy h2")
            assert heading.inner_text() == f"Policy of {demo_document()['name']}"
            heatmap = page.locator("#policy svg.heatmap")
            assert heatmap.is_visible()
            box = heatmap.bounding_box()
            assert box is not None and box["width"] > 300 and box["height"] > 200
            assert page.locator("#recent table.recent tbody tr").count() == 2
            assert page.locator("p.caution").is_visible()
            assert page.locator("#closing table.closing tbody tr").count() == 2
            spark = page.locator(f'#solve-times tr[data-network="{first_id}"] svg.spark')
            assert spark.is_visible()

            ARTIFACTS.mkdir(exist_ok=True)
            screenshot = ARTIFACTS / "status-page.png"
            page.screenshot(path=str(screenshot), full_page=True)
            print(f"status page screenshot: {screenshot}")

            # Following a network's link keeps the sign-in and pictures that network.
            page.get_by_role("link", name=SECOND_NAME).click()
            page.wait_for_url(f"**/status?network={second_id}")
            assert page.locator("#policy h2").inner_text() == f"Policy of {SECOND_NAME}"
            assert page.locator("#policy svg.heatmap").is_visible()
            context.close()
        finally:
            browser.close()
