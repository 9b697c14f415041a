"""Make docs/img/brief.png: the demo study's brief, as headless Chromium draws it.

Run:  python scripts/screenshot_brief.py   (needs Debian's chromium)
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

from tracker.brief import build_brief, write_brief
from tracker.demo import build_demo

OUT = Path(__file__).resolve().parent.parent / "docs" / "img" / "brief.png"


def main() -> None:
    chromium = shutil.which("chromium") or sys.exit("chromium not found: apt-get install chromium")
    with tempfile.TemporaryDirectory() as tmp:
        study, _ = build_demo(Path(tmp) / "demo")
        page = write_brief(build_brief(study, wave="2025-Q2"), Path(tmp) / "brief.html")
        subprocess.run([chromium, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                        "--disable-background-networking", "--disable-component-update", "--disable-sync",
                        f"--user-data-dir={Path(tmp) / 'profile'}", "--virtual-time-budget=30000",
                        "--window-size=1000,1500", "--hide-scrollbars", f"--screenshot={OUT}", page.as_uri()],
                       check=True, capture_output=True)
    print(f"wrote {OUT}")


if __name__ == "__main__":
    main()
