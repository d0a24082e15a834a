"""Render the digest in headless Chromium: every embedded chart must load, and the page must lay out.
(Common practice, no source.)"""

from __future__ import annotations

import copy
import re
import subprocess
from datetime import date, datetime, timezone
from pathlib import Path

import pytest

from drift.config import Config
from drift.delivery import digest as dg
from drift.store import open_store
from tests.delivery.digest_payloads import make_payload

CHROMIUM = Path("/usr/bin/chromium")
#: per-subprocess limit, seconds (a page of a few charts loads in about one second)
TIMEOUT = 60

pytestmark = [
    pytest.mark.browser,
    pytest.mark.skipif(not CHROMIUM.exists(), reason="needs headless Chromium at /usr/bin/chromium"),
]

PROBE = """<script>
window.addEventListener('load', function () {
  var imgs = Array.prototype.slice.call(document.images);
  var bad = imgs.filter(function (i) { return !i.complete || i.naturalWidth === 0; }).length;
  document.title = 'images:' + imgs.length + ';broken:' + bad;
});
</script>"""


def _chromium(profile: Path, *args: str) -> subprocess.CompletedProcess[str]:
    cmd = [str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={profile}", "--virtual-time-budget=5000", *args]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=TIMEOUT, check=False)


def _probe(tmp_path: Path, html: str, name: str) -> tuple[int, int]:
    page = tmp_path / f"{name}.html"
    page.write_text(html.replace("</body>", PROBE + "</body>", 1), encoding="utf-8")
    res = _chromium(tmp_path / f"profile-{name}", "--dump-dom", page.as_uri())
    m = re.search(r"<title>images:(\d+);broken:(\d+)</title>", res.stdout)
    assert m, f"no probe title in Chromium's DOM dump (exit {res.returncode}): {res.stderr[-500:]}"
    return int(m.group(1)), int(m.group(2))


@pytest.fixture(scope="module")
def digest_html(tmp_path_factory: pytest.TempPathFactory) -> str:
    tmp = tmp_path_factory.mktemp("digest")
    store = open_store(f"sqlite:///{tmp / 'drift.db'}")
    try:
        rid = store.start_run("check", as_of=date(2025, 12, 29))
        light = copy.deepcopy(make_payload("k001", "keep", seed=3))
        light["charts"].pop("coefficients")
        store.save_verdicts(rid, date(2025, 12, 29), [make_payload("<b>x</b>", "refit"), light])
        store.finish_run(rid, "ok")
        d = dg.run_digest(Config(base_dir=tmp, alerts={"digest_path": "out"}), store,
                          now=datetime(2025, 12, 29, 8, tzinfo=timezone.utc))
    finally:
        store.dispose()
    return d.path.read_text(encoding="utf-8")


def test_every_image_loads(tmp_path: Path, digest_html: str) -> None:
    n_img = digest_html.count("<img ")
    assert n_img >= 5
    assert _probe(tmp_path, digest_html, "digest") == (n_img, 0)


def test_the_probe_sees_a_broken_image(tmp_path: Path, digest_html: str) -> None:
    # negative control: corrupt one embedded PNG, the probe must count it
    broken = digest_html.replace("data:image/png;base64,iVBOR", "data:image/png;base64,AAAA", 1)
    n_img = digest_html.count("<img ")
    assert _probe(tmp_path, broken, "broken") == (n_img, 1)


def test_screenshot(tmp_path: Path, digest_html: str) -> None:
    page = tmp_path / "digest.html"
    page.write_text(digest_html, encoding="utf-8")
    shot = tmp_path / "digest.png"
    res = _chromium(tmp_path / "profile-shot", "--window-size=1000,1600", f"--screenshot={shot}", page.as_uri())
    assert shot.exists(), res.stderr[-500:]
    from PIL import Image

    with Image.open(shot) as img:
        assert img.size == (1000, 1600)
        # the page is not blank: the headline band and charts give many colours
        assert len(img.convert("RGB").getcolors(maxcolors=1 << 16) or range(1 << 16)) > 50
