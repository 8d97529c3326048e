"""``poolbandit demo``: the whole tour runs end to end on a tiny setting and writes one report.

Outside reference: the report's figures are checked as decoded PNG images
with matplotlib's own reader (``matplotlib.image.imread``), not by our code.
"""

from __future__ import annotations

import base64
import io
import re

import pandas as pd
from matplotlib.image import imread

from poolbandit.cli.main import main


def test_demo_tour_small(tmp_path, capsys):
    """Tiny demo (2 replicates, 20 learners, short fit): every table and one report with every figure."""
    out = tmp_path / "demo"
    status = main(["demo", "--out", str(out), "--replicates", "2", "--participants", "20", "--workers", "1",
                   "--power-sizes", "8", "--power-replicates", "2", "--draws", "30", "--seed", "3"])
    assert status == 0, capsys.readouterr().err
    for name in ["summary", "replicates", "curves", "sweep", "power", "log", "truth", "categories", "effects",
                 "prevalence"]:
        assert (out / f"{name}.csv").is_file(), name
    log = pd.read_csv(out / "log.csv")
    assert set(log["policy"]) == {"pooled"}
    assert log["participant"].nunique() == 20
    page = (out / "report.html").read_text(encoding="utf-8")
    images = re.findall(r'src="data:image/png;base64,([^"]+)"', page)
    # comparison: curves, differences, frontier, sweep, power; study: probabilities, prevalence
    assert len(images) == 7
    for data in images:
        pixels = imread(io.BytesIO(base64.b64decode(data)), format="png")
        assert pixels.shape[0] > 100 and pixels.shape[1] > 100
        assert pixels.std() > 0.01  # not a blank image
