"""The HTML report on a synthetic store: every section, graceful gaps, the stage wrapper."""

from __future__ import annotations

import re
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from test_report_synthetic import build_synthetic_store

from pipeline.report import CAUTION, SECTIONS, build_report
from pipeline.report.page import esc, table_block
from pipeline.report.stage import _section
from pipeline.session import Session


class _Collect(HTMLParser):
    """Collect img src/alt, figcaptions, and check tags are balanced (stdlib html.parser)."""

    def __init__(self) -> None:
        super().__init__()
        self.images: list[dict[str, str | None]] = []
        self.captions: list[str] = []
        self.scripts = 0
        self._in_caption = False
        self.stack: list[str] = []

    def handle_starttag(self, tag, attrs):
        if tag == "img":
            self.images.append(dict(attrs))
        elif tag not in ("meta", "br"):
            self.stack.append(tag)
        self.scripts += tag == "script"
        self._in_caption = tag == "figcaption"

    def handle_endtag(self, tag):
        assert self.stack and self.stack[-1] == tag, (tag, self.stack[-3:])
        self.stack.pop()
        self._in_caption = False

    def handle_data(self, data):
        if self._in_caption:
            self.captions.append(data)


@pytest.fixture(scope="module")
def full_report(tmp_path_factory):
    root = tmp_path_factory.mktemp("rep") / "out"
    build_synthetic_store(root, np.random.default_rng(7))
    return build_report(Session.open(root), root / "report")


def test_full_report_has_every_section_and_image(full_report: Path):
    text = full_report.read_text(encoding="utf-8")
    p = _Collect()
    p.feed(text)
    assert p.stack == [] and p.scripts == 0  # balanced tags, no JavaScript
    for key, _title, _needs, _fn in SECTIONS:
        assert f'<section id="{key}">' in text
    assert "Not run" not in text and "could not be shown" not in text
    assert esc(CAUTION) in text
    srcs = [img["src"] for img in p.images]
    assert len(srcs) >= 12 and len(p.captions) == len(srcs)
    for src in srcs:
        png = full_report.parent / src
        # reference: the PNG signature, ISO/IEC 15948 section 5.2 (from memory)
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert all(len(c) > 40 for c in p.captions)  # each caption says what and how
    assert "http://" not in text and "https://" not in text  # offline
    # warnings of every stage are listed
    assert "2 volumes flagged" in text and "1 pulse dropped" in text


def test_missing_stages_show_not_run(tmp_path, rng):
    root = tmp_path / "out"
    build_synthetic_store(root, rng, skip=("decode", "tuning", "align"))
    text = build_report(Session.open(root), root / "report").read_text()
    for stage in ("decode", "tuning", "align"):
        assert f"Not run: stage <code>{stage}</code>" in text
    assert 'id="motion"' in text and "01_motion.png" in text


def test_a_broken_section_does_not_break_the_page(tmp_path, rng):
    root = tmp_path / "out"
    build_synthetic_store(root, rng, skip=("decode", "tuning"))
    (root / "cells.parquet").write_bytes(b"not parquet")  # the cells table is corrupted
    sess = Session.open(root)

    from pipeline.report.stage import _Ctx

    ctx = _Ctx(sess, tmp_path)
    sec = _section(ctx, *next(s for s in SECTIONS if s[0] == "traces"))
    assert "could not be shown" in sec.body
    text = build_report(sess, root / "report").read_text()
    assert "01_motion.png" in text and "could not be shown" in text


def test_html_escaping():
    out = table_block([{"a": "<b>&", "n": 0.123456}])
    assert "&lt;b&gt;&amp;" in out and "0.1235" in out
    assert "no rows" in table_block([])


def test_report_stage_writes_through_the_store(tmp_path, rng):
    from pipeline.config import parse_config
    from pipeline.stages import _REGISTRY  # the full registry needs every stage module
    from pipeline.store import Store

    root = tmp_path / "out"
    build_synthetic_store(root, rng, skip=("decode", "tuning"))
    settings = parse_config({"session": {"output": str(root), "name": "demo <1>"},
                             "imaging": {"raw": "r/*.tif", "voxel_size_um": [4, 1, 1],
                                         "volume_rate_hz": 2.0, "planes_per_volume": 3},
                             "report": {"n_raster_cells": 3}},
                            base_dir=tmp_path, check_files=False)
    st = _REGISTRY["report"]
    assert st.requires == () and st.sections == ("report",)
    sub = Store(root).stage_store("report", "h", resumable=False)
    st.fn(settings, sub, None)
    assert not (root / "report").exists()  # staged until commit
    sub.commit()
    text = (root / "report" / "index.html").read_text()
    assert "forkmap report: demo &lt;1&gt;" in text
    assert re.search(r"dF/F of the 3 cells \(of 5\)", text)


def test_caption_warns_when_the_null_cannot_reach_p_005():
    from pipeline.report.stage import _too_few_nulls

    # permutation p >= 1 / (n + 1) (Phipson & Smyth 2010): 5 refits cannot give p < 0.05,
    # 20 can (1/21 = 0.048)
    assert "decode.n_null_bouts" in _too_few_nulls(5, "bout_auc")
    assert "1/6 = 0.17" in _too_few_nulls(5, "bout_auc")
    assert "decode.n_null " in _too_few_nulls(19, "turn_r2") + " "
    assert _too_few_nulls(20, "bout_auc") == "" and _too_few_nulls(0, "turn_r2") == ""
