"""Opening an HTML file in a real browser for tests: Debian's headless Chromium.

:func:`loaded_images` opens a copy of the page with one script added (the page itself is
not changed) that, once the window has loaded, writes every image's natural size into the
DOM; Chromium's ``--dump-dom`` then prints it. An image that failed to load has natural
size 0 x 0 (HTML Living Standard, "img" element: naturalWidth of a broken image is 0).

Without Chromium a test is skipped, except on CI (``CI`` or ``VOICER_DATASETS=required``,
set by ``.ci/run``, which installs the ``chromium`` package), where it fails.
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from pathlib import Path

from needs import skip_or_fail

INSTALL_HINT = "install Debian's chromium (apt-get install chromium)"
_PROBE = """<script>
window.addEventListener("load", () => {
  const sizes = Array.from(document.images, im => [im.alt, im.naturalWidth, im.naturalHeight, im.complete]);
  document.body.setAttribute("data-image-sizes", JSON.stringify(sizes));
});
</script>"""


def chromium() -> str:
    """Path of the Chromium binary, or skip/fail the calling test."""
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    skip_or_fail(f"headless Chromium is missing: {INSTALL_HINT}")


def loaded_images(page: Path, work: Path) -> list[tuple[str, int, int, bool]]:
    """(alt, naturalWidth, naturalHeight, complete) of every image of ``page`` as
    Chromium loads it (from a copy with the probe script, written into ``work``)."""
    binary = chromium()
    text = page.read_text(encoding="utf-8")
    probe = work / f"probe-{page.name}"
    probe.write_text(text.replace("</body>", _PROBE + "</body>"), encoding="utf-8")
    result = subprocess.run(
        [binary, "--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
         f"--user-data-dir={work / 'chromium-profile'}", "--virtual-time-budget=10000", "--dump-dom",
         probe.resolve().as_uri()],
        capture_output=True, text=True, timeout=120)
    m = re.search(r'data-image-sizes="([^"]*)"', result.stdout)
    assert m, f"Chromium did not run the page's load handler (exit {result.returncode}): {result.stderr[-2000:]}"
    return [tuple(x) for x in json.loads(m.group(1).replace("&quot;", '"'))]
