"""Make docs/report.png: the demo's run report, photographed in Debian's headless Chromium (offline).

    python tools/report_screenshot.py [--out docs/report.png] [--keep DIR]

Builds the sample warehouse in a temporary folder (or DIR), runs its job for
two vintages (2024-12, then the latest, so the accuracy charts have data),
writes the report and saves a 1280 px wide picture of its top. Needs the
extras ``report`` and ``test`` (plotly, selenium) and the packages
``chromium`` and ``chromium-driver`` (``apt-get install chromium chromium-driver``).
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

from arflow.demo import prepare_demo
from arflow.job import run_job
from arflow.job_file import load_job
from arflow.report import write_report
from arflow.report.browser import screenshot

ROOT = Path(__file__).resolve().parents[1]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=ROOT / "docs" / "report.png")
    parser.add_argument("--keep", type=Path, help="build the demo here and keep it (default: a temporary folder)")
    parser.add_argument("--height", type=int, default=1700)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = args.keep or Path(tmp)
        spec = load_job(prepare_demo(folder))
        run_job(spec, as_of="2024-12")
        run_job(spec)
        report = write_report(spec, folder / "vellmar_report.html")
        png = screenshot(report.path, args.out, height=args.height)
    print(f"wrote {png} ({report.charts} charts in the report)")


if __name__ == "__main__":
    main()
