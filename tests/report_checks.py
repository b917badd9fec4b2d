"""Checks shared by the report and figure tests: an HTML page's parts (standard-library
html.parser), PNG headers (PNG specification, ISO/IEC 15948: 8-byte signature, then the IHDR
chunk with width and height), overlapping text in a matplotlib figure, and a headless
Chromium render."""

from __future__ import annotations

import base64
import shutil
import struct
import subprocess
from html.parser import HTMLParser
from pathlib import Path

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"          # PNG specification, section 5.2
CHROMIUM = "/usr/bin/chromium"                # Debian's package installs it here
CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync", "--no-first-run"]


def png_size(data: bytes) -> tuple[int, int]:
    """(width, height) from a PNG's IHDR chunk; AssertionError if it is not a PNG."""
    assert data[:8] == PNG_SIGNATURE, "not a PNG"
    assert data[12:16] == b"IHDR", "first chunk is not IHDR"
    return struct.unpack(">II", data[16:24])


class Page(HTMLParser):
    """What the tests look at in a page: every tag with its attributes, images, tables (id,
    number of body rows), figures, preformatted blocks and the visible text."""

    def __init__(self, text: str):
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict]] = []
        self.images: list[dict] = []
        self.tables: dict[str, int] = {}
        self.figures: list[str] = []
        self.pre: dict[str, str] = {}
        self.text: list[str] = []
        self._table: str | None = None
        self._in_body = 0
        self._pre: str | None = None
        self.feed(text)
        self.close()

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append((tag, a))
        if tag == "img":
            self.images.append(a)
        elif tag == "table":
            self._table = a.get("id", "")
            self.tables[self._table] = 0
        elif tag == "tbody":
            self._in_body += 1
        elif tag == "tr" and self._table is not None and self._in_body:
            self.tables[self._table] += 1
        elif tag == "figure":
            self.figures.append(a.get("id", ""))
        elif tag == "pre":
            self._pre = a.get("id", "")
            self.pre[self._pre] = ""

    def handle_endtag(self, tag):
        if tag == "table":
            self._table = None
        elif tag == "tbody":
            self._in_body -= 1
        elif tag == "pre":
            self._pre = None

    def handle_data(self, data):
        self.text.append(data)
        if self._pre is not None:
            self.pre[self._pre] += data

    @property
    def visible_text(self) -> str:
        return " ".join(" ".join(self.text).split())


def image_bytes(img: dict) -> bytes:
    """The PNG inside an <img src="data:image/png;base64,..."> (RFC 2397 data URL)."""
    src = img["src"]
    head = "data:image/png;base64,"
    assert src.startswith(head), src[:40]
    return base64.b64decode(src[len(head):], validate=True)


def assert_self_contained(page: Page) -> None:
    """Nothing the page would load from elsewhere: no scripts, style sheets, frames, objects
    or embeds, and every src/href/srcset/poster attribute is a data: URL or a same-page
    anchor."""
    for tag, attrs in page.tags:
        assert tag not in ("script", "link", "iframe", "object", "embed", "base"), tag
        for name in ("src", "href", "srcset", "poster", "action", "data"):
            value = attrs.get(name)
            if value is not None:
                assert value.startswith(("data:", "#")), (tag, name, value[:60])
    style = " ".join(page.text)
    assert "@import" not in style and "url(" not in style and "@font-face" not in style


def text_overlaps(fig) -> list[tuple[str, str]]:
    """Pairs of text items of a drawn figure whose boxes overlap by more than one pixel each
    way: suptitles, axes titles, axis labels and legends against each other and against tick
    labels (tick labels among themselves and text inside the data area are not checked)."""
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    major, ticks = [], []

    def add(kind, name, artist):
        if artist is not None and artist.get_visible() and (not hasattr(artist, "get_text")
                                                            or artist.get_text()):
            kind.append((name, artist.get_window_extent(renderer)))

    figures = [fig] + list(getattr(fig, "subfigs", []))
    for f in figures:
        add(major, "suptitle", getattr(f, "_suptitle", None))
    for i, ax in enumerate(fig.get_axes()):
        for t in (ax.title, ax._left_title, ax._right_title):
            add(major, f"axes {i} title", t)
        add(major, f"axes {i} x label", ax.xaxis.label)
        add(major, f"axes {i} y label", ax.yaxis.label)
        add(major, f"axes {i} legend", ax.get_legend())
        for axis, (lo, hi) in ((ax.xaxis, ax.get_xlim()), (ax.yaxis, ax.get_ylim())):
            lo, hi = min(lo, hi), max(lo, hi)
            for loc, t in zip(axis.get_majorticklocs(), axis.get_majorticklabels()):
                if lo <= loc <= hi:               # ticks outside the view are not drawn
                    add(ticks, f"axes {i} tick {t.get_text()}", t)
    bad = []

    def hit(a, b) -> bool:
        w = min(a.x1, b.x1) - max(a.x0, b.x0)
        h = min(a.y1, b.y1) - max(a.y0, b.y0)
        return w > 1 and h > 1

    for i, (na, a) in enumerate(major):
        for nb, b in major[i + 1:] + ticks:
            if hit(a, b):
                bad.append((na, nb))
    return bad


def chromium_or_skip():
    """The Chromium binary, or a pytest skip saying why it is not here."""
    import pytest
    path = CHROMIUM if Path(CHROMIUM).exists() else shutil.which("chromium")
    if not path:
        pytest.skip("headless Chromium is not installed (/usr/bin/chromium from Debian's "
                    "'chromium' package; .ci/run installs it where it can)")
    return path


def chromium(path: str, profile: Path, *args: str, timeout_s: float = 180) -> str:
    """Run headless Chromium with the flags above and a throw-away profile; stdout."""
    proc = subprocess.run([path, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", *args],
                          capture_output=True, text=True, timeout=timeout_s)
    assert proc.returncode == 0, proc.stderr[-2000:]
    return proc.stdout
