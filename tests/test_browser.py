"""The report in a real browser: headless Chromium (Debian's ``chromium``) loads report.html from disk.

A copy of the report gets a small inline script that, once the page has loaded, writes into attributes of
``<body>`` how many images there are, how many decoded (``naturalWidth > 0``), which tables exist and the
page height; ``--dump-dom`` prints the resulting DOM. A second run takes a full-page screenshot, kept as
``tests/artifacts/report.png`` (the folder ignores itself in git). Without chromium the test is skipped,
saying how to install it. The browser runs with networking features off and a throw-away profile; the page
is a local file with no external references, so nothing is fetched.
"""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import pytest
from test_report import mixed_run

ARTIFACTS = Path(__file__).resolve().parent / "artifacts"
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--hide-scrollbars", "--mute-audio"]  # fmt: skip

PROBE = """<script>
window.addEventListener("load", function () {
  var imgs = Array.prototype.slice.call(document.images);
  var ok = imgs.filter(function (i) { return i.complete && i.naturalWidth > 0; });
  var b = document.body;
  b.setAttribute("data-images", String(imgs.length));
  b.setAttribute("data-images-loaded", String(ok.length));
  b.setAttribute("data-tables", Array.prototype.map.call(document.querySelectorAll("table"),
                 function (t) { return t.id + ":" + t.querySelectorAll("tbody tr").length; }).join(","));
  b.setAttribute("data-height", String(document.documentElement.scrollHeight));
});
</script>"""


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    return "/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None


CHROMIUM = _chromium()
pytestmark = pytest.mark.skipif(
    CHROMIUM is None,
    reason="chromium is not installed: the browser test needs Debian's chromium package "
    "(apt-get install -y chromium; .ci/run installs it when it can)",
)


def _run(args: list[str], profile: Path) -> str:
    assert CHROMIUM is not None
    proc = subprocess.run([CHROMIUM, *FLAGS, f"--user-data-dir={profile}", *args], capture_output=True, text=True,
                          timeout=120, check=False)  # fmt: skip
    assert proc.returncode == 0, proc.stderr[-2000:]
    return proc.stdout


def test_report_renders_in_chromium(tmp_path: Path) -> None:
    """Every image of the report decodes in Chromium, every table is there with its rows; screenshot kept."""
    run, folder = mixed_run()
    html = (folder / "report.html").read_text(encoding="utf-8")
    page = tmp_path / "report.html"
    page.write_text(html.replace("</body>", PROBE + "</body>"), encoding="utf-8")
    profile = tmp_path / "profile"

    dom = _run(["--virtual-time-budget=10000", "--dump-dom", page.as_uri()], profile)
    body = re.search(r"<body([^>]*)>", dom)
    assert body is not None, dom[:500]
    attrs = dict(re.findall(r'([\w-]+)="([^"]*)"', body.group(1)))
    n_images = html.count("<img ")
    # slots x2, the bridge's time-space diagram, grid shares, convergence, one per agent
    assert n_images == 2 + 1 + 1 + 1 + len(run.agents)
    assert attrs.get("data-images") == str(n_images), attrs
    assert attrs.get("data-images-loaded") == str(n_images), "some images did not load: " + str(attrs)
    tables = dict(t.split(":") for t in attrs["data-tables"].split(","))
    assert tables == {"summary-table": tables["summary-table"], "agents-table": "6", "slot-prices": "4",
                      "prices-grid": "2"}  # fmt: skip
    assert int(tables["summary-table"]) >= 10
    assert "planning and research tool, not a safety controller" in dom

    ARTIFACTS.mkdir(exist_ok=True)
    (ARTIFACTS / ".gitignore").write_text("*\n")
    shot = ARTIFACTS / "report.png"
    height = min(int(attrs["data-height"]) + 20, 16000)
    _run([f"--window-size=1000,{height}", f"--screenshot={shot}", "--virtual-time-budget=10000", page.as_uri()],
         profile)  # fmt: skip
    from PIL import Image

    with Image.open(shot) as im:
        assert im.size == (1000, height)
        lo, hi = im.convert("L").getextrema()
        assert lo < 80 and hi > 240  # dark text on a light page, not a blank frame
