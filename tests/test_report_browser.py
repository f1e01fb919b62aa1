"""Render report.html in headless Chromium: every figure has a non-zero natural size, no console errors,
no attempt to load anything from outside the file.

Chromium comes from Debian's package (`apt-get install -y chromium`). The page is copied with a probe
script and a strict Content-Security-Policy put in front of it: console errors, script errors and CSP
violations (any external load) are recorded and written into the DOM, which `--dump-dom` prints.
"""

import json
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from grid_fixture import build_report

# Found on PATH (Debian installs /usr/bin/chromium; other systems name it chromium-browser).
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking", "--no-first-run",
         "--disable-component-update", "--disable-sync", "--virtual-time-budget=10000"]
PROBE = """<meta http-equiv="Content-Security-Policy" content="default-src 'none'; img-src data:;
style-src 'unsafe-inline'; script-src 'unsafe-inline'">
<script>
window.__problems = [];
const original = console.error;
console.error = (...args) => { window.__problems.push("console.error: " + args.join(" ")); original(...args); };
window.addEventListener("error", e => window.__problems.push("error: " + (e.message || e.target.src || e.type)), true);
document.addEventListener("securitypolicyviolation", e => window.__problems.push("csp: " + e.blockedURI));
window.addEventListener("load", () => {
  const images = [...document.images].map(i => [i.naturalWidth, i.naturalHeight, i.complete]);
  const out = document.createElement("pre");
  out.id = "probe-result";
  out.textContent = JSON.stringify({images, problems: window.__problems});
  document.body.appendChild(out);
});
</script>"""


@pytest.fixture(scope="module")
def report_path(tmp_path_factory):
    if CHROMIUM is None:
        pytest.skip("headless Chromium test skipped: no chromium or chromium-browser on PATH "
                    "(Debian: apt-get install -y chromium)")
    _, out = build_report(tmp_path_factory.mktemp("browser"), {"figure_dpi": 50}, n_boot=100)
    return out


def test_report_renders_in_chromium_with_sized_figures_and_no_errors(report_path, tmp_path):
    page = report_path.read_text(encoding="utf-8")
    probed = tmp_path / "probed.html"
    probed.write_text(page.replace("<head>", "<head>" + PROBE, 1), encoding="utf-8")
    profile = tmp_path / "profile"
    result = subprocess.run([str(CHROMIUM), *FLAGS, f"--user-data-dir={profile}", "--dump-dom", probed.as_uri()],
                            capture_output=True, text=True, timeout=90)
    shutil.rmtree(profile, ignore_errors=True)
    match = re.search(r'<pre id="probe-result">(.*?)</pre>', result.stdout, flags=re.S)
    assert match, f"probe did not run; chromium said: {result.stderr[-800:]}"
    probe = json.loads(match.group(1).replace("&quot;", '"').replace("&amp;", "&"))
    expected = page.count("<img ")
    assert len(probe["images"]) == expected >= 5
    assert all(width > 0 and height > 0 and complete for width, height, complete in probe["images"])
    assert probe["problems"] == []
    # the unprobed page, too, logs no console message at all
    console = subprocess.run([str(CHROMIUM), *FLAGS, f"--user-data-dir={profile}", "--enable-logging=stderr",
                              "--v=0", "--dump-dom", report_path.as_uri()], capture_output=True, text=True, timeout=90)
    assert "CONSOLE" not in console.stderr, console.stderr[-800:]
