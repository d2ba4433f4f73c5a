"""Parsing and checking a self-contained report.html (shared by the report and demo tests).

PNG validity by the PNG signature (ISO/IEC 15948, 8-byte magic) and a decode with Pillow; SVG by
parsing as XML; nothing may be fetched (only in-page anchors and data URIs).
"""

from __future__ import annotations

import base64
import io
import re
import xml.etree.ElementTree as ET
from html.parser import HTMLParser

from PIL import Image

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
SECTIONS = (
    "summary",
    "cautions",
    "scan",
    "defects",
    "projections",
    "cracks",
    "registration",
    "assessment",
    "record",
)


class _Collect(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.ids: set[str] = set()
        self.imgs: list[str] = []
        self.links: list[tuple[str, str]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "id" in a:
            self.ids.add(a["id"])
        if tag == "img":
            self.imgs.append(a.get("src", ""))
        for key in ("src", "href"):
            if key in a:
                self.links.append((tag, a[key]))

    def handle_data(self, data):
        self.text.append(data)


def parse(text: str) -> _Collect:
    p = _Collect()
    p.feed(text)
    return p


def check_images(text: str, parsed: _Collect) -> int:
    """Every embedded image decodes; returns how many there are."""
    for src in parsed.imgs:
        assert src.startswith("data:image/png;base64,"), src[:40]
        data = base64.b64decode(src.split(",", 1)[1], validate=True)
        assert data[:8] == PNG_MAGIC
        with Image.open(io.BytesIO(data)) as im:
            im.verify()
        with Image.open(io.BytesIO(data)) as im:
            im.load()
            assert im.width > 200 and im.height > 100
    svgs = re.findall(r"<svg\b.*?</svg>", text, flags=re.S)
    for svg in svgs:
        ET.fromstring(svg)
    # nothing is fetched: only in-page anchors and data URIs
    for tag, link in parsed.links:
        assert link.startswith(("#", "data:")), (tag, link)
    return len(parsed.imgs) + len(svgs)
