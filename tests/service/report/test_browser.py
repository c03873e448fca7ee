"""The report page renders in a real browser: headless Chromium (Debian's ``chromium``) over real HTTP.

The app is served by waitress on a free port behind a tiny WSGI wrapper that adds the bearer key
(a browser's command line cannot send headers), so the page arrives with its real headers,
Content-Security-Policy included. Without Chromium the test is skipped with the reason printed,
or fails when SEALFOLD_REQUIRE_ALL=1 (CI).
"""

from __future__ import annotations

import os
import shutil
import struct
import subprocess
import tempfile
import zlib
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pytest

from tests.support.reviews import make_submission, verdict
from tests.support.servers import ServedApp, skip_or_fail

if TYPE_CHECKING:
    from tests.support.api import Api

pytestmark = [pytest.mark.browser, pytest.mark.slow]

CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync", "--no-first-run"]


def _chromium() -> str:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    skip_or_fail("headless Chromium is not installed (apt-get install chromium)")
    raise AssertionError("unreachable")


def _with_key(app: Any, token: str) -> Callable[..., Iterable[bytes]]:
    def wrapped(environ: dict[str, Any], start_response: Callable[..., Any]) -> Iterable[bytes]:
        environ["HTTP_AUTHORIZATION"] = f"Bearer {token}"
        return app(environ, start_response)  # type: ignore[no-any-return]

    return wrapped


def _run(argv: list[str]) -> subprocess.CompletedProcess[str]:
    with tempfile.TemporaryDirectory(prefix="sealfold-chromium-") as profile:
        return subprocess.run([*argv[:1], *CHROMIUM_FLAGS, f"--user-data-dir={profile}", *argv[1:]],
                              capture_output=True, text=True, timeout=120, check=False)


def _png_pixels_vary(path: Path) -> tuple[int, int, bool]:
    """Width, height, and whether the decoded scanlines hold more than one byte value (not blank)."""
    data = path.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n", "not a PNG"
    width, height = struct.unpack(">II", data[16:24])
    idat, pos = b"", 8
    while pos < len(data):
        length = struct.unpack(">I", data[pos:pos + 4])[0]
        kind = data[pos + 4:pos + 8]
        if kind == b"IDAT":
            idat += data[pos + 8:pos + 8 + length]
        pos += 12 + length
    pixels = zlib.decompress(idat)
    return width, height, len(set(pixels[: 1 << 20])) > 8


def test_the_report_renders_in_headless_chromium(api: Api, dataset: dict[str, Any], tmp_path: Path) -> None:
    browser = _chromium()
    engine, owner = api.engine, api.key_ids["submitter"]
    champion = make_submission(engine, dataset, owner, label="champion ridge", scores=[55, 56, 54, 57, 53])
    api.post("steward", f"/v1/datasets/{dataset['id']}/champion", json={"submission": champion})
    coefficients = {(0, f): {"names": ["bmi", "s5", "bp"], "outputs": ["target"], "intercept": [152.0],
                             "values": [[520.0 + 9 * f, 470.0 - 6 * f, (-1) ** f * 15.0]]} for f in range(5)}
    sub_id = make_submission(
        engine, dataset, owner, label="ridge <b>bold</b> & co", scores=[52.1, 55.3, 50.2, 57.9, 53.4],
        verdict_doc=verdict("pass", reasons=["beats the baseline: p = 0.0004 (corrected resampled t)",
                                             "not worse than the champion by more than 2.0"], champion=champion),
        champion_id=champion, coefficients=coefficients)
    with ServedApp(_with_key(api.app, api.tokens["submitter"])) as served:
        url = f"{served.url}/v1/submissions/{sub_id}/report"
        dom = _run([browser, "--dump-dom", url])
        assert dom.returncode == 0, dom.stderr[-2000:]
        shot = tmp_path / "report.png"
        taken = _run([browser, f"--screenshot={shot}", "--window-size=1200,1600", url])
    assert "<svg" in dom.stdout and ">pass<" in dom.stdout, dom.stdout[:2000]
    assert "ridge &lt;b&gt;bold&lt;/b&gt; &amp; co" in dom.stdout  # escaped text, not a <b> element
    assert "<b>" not in dom.stdout
    assert taken.returncode == 0 and shot.is_file(), taken.stderr[-2000:]
    assert shot.stat().st_size > 10_000
    assert _png_pixels_vary(shot) == (1200, 1600, True)
    keep = os.environ.get("SEALFOLD_KEEP_SCREENSHOT")
    if keep:
        shutil.copyfile(shot, keep)
