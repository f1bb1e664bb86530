"""Report section "Photos left out or flagged": counts per brand x source and thumbnails of examples."""

from __future__ import annotations

import re
import sys
from pathlib import Path

import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))

import report_synthetic as synth  # noqa: E402

from explore.report import write_report  # noqa: E402


def test_left_out_section_lists_commercial_posts_with_thumbnails(tmp_path):
    out = synth.make_output_folder(tmp_path, 40, with_compare=False)
    images = pd.read_parquet(out / "images.parquet")
    consumer = images.index[(images["status"] == "ok") & (images["source"] == "consumer")]
    excluded, counted = consumer[:3], consumer[3:4]
    images["commercial_flagged"] = False
    images["commercial_reason"] = ""
    images.loc[excluded.union(counted), "commercial_flagged"] = True
    images.loc[excluded.union(counted), "commercial_reason"] = "plain background (97 % of the border)"
    images.loc[excluded, "status"] = "commercial"
    images.loc[excluded, "reason"] = "looks like a shop listing: plain background"
    images.to_parquet(out / "images.parquet", index=False)

    text = write_report(out).read_text(encoding="utf-8")
    m = re.search(r'<div class="left-out-kind" data-kind="commercial">(.*?)</div>\s*(?:<div class="left-out-kind"|</section>)',
                  text, re.S)
    assert m, "no commercial block in the left-out section"
    block = m.group(1)
    cells = [tuple(r) for r in re.findall(r"<tr><td>(.*?)</td><td>(.*?)</td><td class=\"num\">(\d+)</td><td class=\"num\">(\d+)</td></tr>", block)]
    expected = images.loc[excluded.union(counted)].assign(ex=lambda d: d["status"] == "commercial")
    want = sorted((b, s, str(int(g["ex"].sum())), str(int((~g["ex"]).sum())))
                  for (b, s), g in expected.groupby(["brand", "source"]))
    assert sorted(cells) == want
    assert sum(int(c[2]) for c in cells) == 3 and sum(int(c[3]) for c in cells) == 1
    assert block.count('<img src="data:image/webp;base64,') == 4
    for rel in images.loc[excluded, "relpath"]:
        assert rel in block
    assert 'images.commercial_posts = "exclude"' in block
