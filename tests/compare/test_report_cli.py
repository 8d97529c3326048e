"""The comparison report renders in a real browser; the ``compare`` command's files and exit codes.

The browser check runs Debian's Chromium headless (``apt-get install -y
chromium``): the page is loaded with a tiny inline script appended to a copy
of it, which writes, for every ``img``, whether it uses a ``data:`` URI and
its decoded ``naturalWidth``; ``--dump-dom`` prints the DOM after the load
event, so a figure that did not decode shows up as width 0.
"""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import pandas as pd
import pytest

from poolbandit.cli.main import main

HERE = Path(__file__).parent
DESIGN = HERE / "small.toml"

_PROBE = """
<script>
window.addEventListener('load', function () {
  var out = [];
  document.querySelectorAll('img').forEach(function (img) {
    out.push((img.src.indexOf('data:image/png;base64,') === 0 ? 'data' : 'other') + ':' + img.naturalWidth);
  });
  var d = document.createElement('div');
  d.id = 'probe-result';
  d.textContent = 'IMAGES[' + out.join(',') + ']';
  document.body.appendChild(d);
});
</script>
"""


@pytest.fixture(scope="module")
def cli_out(tmp_path_factory):
    out = tmp_path_factory.mktemp("compare")
    status = main(["compare", str(DESIGN), "--replicates", "3", "--seed", "4", "--workers", "1",
                   "--power-sizes", "8,16", "--power-replicates", "4", "--out", str(out)])
    assert status == 0
    return out


def test_compare_writes_every_table(cli_out):
    """Every documented file exists; tables have one row per policy / point / size."""
    for name in ["replicates", "summary", "differences", "curves", "frontier", "sweep", "power", "power_studies"]:
        assert (cli_out / f"{name}.csv").is_file(), name
    summary = pd.read_csv(cli_out / "summary.csv")
    assert list(summary["policy"]) == ["control", "solo", "ucb", "greedy"]
    assert len(pd.read_csv(cli_out / "replicates.csv")) == 3 * (4 + 2)  # 4 policies + 2 sweep points
    assert list(pd.read_csv(cli_out / "power.csv")["size"]) == [8, 16]
    assert len(pd.read_csv(cli_out / "curves.csv")) == 6 * 10


@pytest.mark.parametrize("args, message", [
    (["--replicates", "1"], "--replicates"),
    (["--weight", "2"], "--weight"),
    (["--power-sizes", "10,x"], "--power-sizes"),
    (["--power-sizes", "2"], "--power-sizes"),
    (["--workers", "0"], "--workers"),
    (["--policies", "nope"], "nope"),
    (["--reference", "nope"], "--reference"),
])
def test_bad_input_exits_2(tmp_path, capsys, args, message):
    """Bad options: exit 2 with a message naming the option (nothing written)."""
    status = main(["compare", str(DESIGN), "--out", str(tmp_path / "o"), *args])
    assert status == 2
    assert message in capsys.readouterr().err
    assert not (tmp_path / "o" / "summary.csv").exists()


def _chromium() -> str | None:
    return shutil.which("chromium") or shutil.which("chromium-browser")


def test_report_renders_every_figure_in_chromium(cli_out, tmp_path):
    """Headless Chromium loads report.html; every figure is a decoded data-URI PNG (naturalWidth > 0)."""
    exe = _chromium()
    if exe is None:
        pytest.skip("chromium is not installed (apt-get install -y chromium)")
    page = (cli_out / "report.html").read_text(encoding="utf-8")
    # curves, differences, frontier, sweep, power: five figures
    assert page.count('src="data:image/png;base64,') == 5
    probe = tmp_path / "probe.html"
    probe.write_text(page.replace("</body>", _PROBE + "</body>"), encoding="utf-8")
    cmd = [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={tmp_path / 'profile'}", "--virtual-time-budget=5000", "--dump-dom",
           probe.as_uri()]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    found = re.search(r"IMAGES\[((?:(?:data|other):\d+,?)+)\]", done.stdout)  # the result, not the script
    assert found, done.stderr[-2000:]
    images = found.group(1).split(",")
    assert len(images) == 5
    for item in images:
        kind, width = item.split(":")
        assert kind == "data" and int(width) > 0, images
