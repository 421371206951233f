"""The lab's HTML report: self-contained, with a decodable map and timeline per vehicle."""

from __future__ import annotations

import base64
import io
import struct
import zlib
from html.parser import HTMLParser
from pathlib import Path

import pytest
from PIL import Image

from livematch.cli import main
from livematch.feed.replaylog import ReplayLogWriter, read_replay_log
from livematch.lab.report import markdown_table

SAMPLES = Path(__file__).resolve().parents[1] / "replay_logs"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2


class _Page(HTMLParser):
    """Collects every tag with its attributes, and the text of table cells."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.cells: list[str] = []
        self._in_cell = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, dict(attrs)))
        self._in_cell = tag in ("td", "th")

    def handle_endtag(self, tag: str) -> None:
        self._in_cell = False

    def handle_data(self, data: str) -> None:
        if self._in_cell:
            self.cells.append(data)


def _ihdr(png: bytes) -> tuple[int, int]:
    """Width and height from the IHDR chunk, after checking its CRC (PNG spec 5.3, 11.2.2)."""
    length, kind = struct.unpack(">I4s", png[8:16])
    assert kind == b"IHDR" and length == 13
    data = png[16:16 + length]
    (crc,) = struct.unpack(">I", png[16 + length:20 + length])
    assert zlib.crc32(kind + data) == crc
    width, height = struct.unpack(">II", data[:8])
    return width, height


@pytest.fixture(scope="module")
def report(tmp_path_factory: pytest.TempPathFactory) -> dict:
    """The first 330 s of the sample (bus-21's detour included) under two settings."""
    base = tmp_path_factory.mktemp("report")
    log = base / "head.jsonl.gz"
    entries = list(read_replay_log(SAMPLES / "larkmoor-morning.jsonl.gz"))
    with ReplayLogWriter(log) as w:
        for e in entries:
            if e.at < entries[0].at + 330.0:
                w.write(e.at, e.topic, e.payload)
    a, b = base / "a.toml", base / "b.toml"
    a.write_text("[matcher]\neps_levels = [10.0, 20.0, 40.0]\n")
    b.write_text("[matcher]\neps_levels = [15.0, 30.0, 60.0]\n")
    out = base / "out"
    code = main(["replay", str(log), "--network", str(SAMPLES / "larkmoor.geojson"),
                 "--routes", str(SAMPLES / "larkmoor-routes.geojson"),
                 "--fences", str(SAMPLES / "larkmoor-fences.geojson"), "--out", str(out),
                 "--config", str(a), "--config", str(b), "--report",
                 "--vehicles", "bus-21,van-3,nobody"])
    assert code == 0
    page = _Page()
    text = (out / "report.html").read_text(encoding="utf-8")
    page.feed(text)
    return {"out": out, "text": text, "page": page}


def test_report_embeds_every_image_as_a_decodable_png(report):
    """Each <img> is a base64 PNG data URI with a valid IHDR and real picture content."""
    images = [attrs["src"] for tag, attrs in report["page"].tags if tag == "img"]
    assert len(images) == 4  # map + timeline for bus-21 and van-3; none for "nobody"
    for src in images:
        assert src is not None and src.startswith("data:image/png;base64,")
        png = base64.b64decode(src.split(",", 1)[1], validate=True)
        assert png[:8] == PNG_SIGNATURE
        width, height = _ihdr(png)
        assert width > 300 and height > 100
        with Image.open(io.BytesIO(png)) as img:
            img.load()  # decodes every IDAT chunk
            assert img.size == (width, height)
            colours = img.convert("RGB").getcolors(maxcolors=1 << 20)
            assert colours is not None and len(colours) > 20  # not a blank canvas


def test_report_needs_nothing_from_outside(report):
    """No script, stylesheet link or remote URL: the page opens offline as it is."""
    tags = report["page"].tags
    assert not [t for t, _ in tags if t in ("script", "link", "iframe", "object")]
    for _, attrs in tags:
        for name in ("src", "href"):
            value = attrs.get(name)
            assert value is None or value.startswith("data:"), value
    assert "http://" not in report["text"] and "https://" not in report["text"]


def test_report_table_matches_compare_md(report):
    """The report's table holds the same cells as compare.md's table."""
    md = (report["out"] / "compare.md").read_text()
    table = md[md.index("| measure |"):].split("\n\n")[0]
    md_cells = [c.strip() for line in table.splitlines() if not line.startswith("|---")
                for c in line.strip("|").split("|")]
    html_cells = [c.strip() for c in report["page"].cells]
    assert html_cells[:len(md_cells)] == md_cells


def test_report_names_the_vehicles_and_says_when_one_is_missing(report):
    """One section per asked vehicle; one without fixes in the log says so."""
    text = report["text"]
    for vehicle in ("bus-21", "van-3", "nobody"):
        assert f"<h2>Vehicle {vehicle}</h2>" in text
    assert "No decodable fix of this vehicle in the log." in text


def test_markdown_table_of_no_numbers():
    """A run without any measured value shows dashes, never 0 or NaN."""
    assert markdown_table([{"setting": "x"}]).splitlines()[2] == "| committed share | – |"
