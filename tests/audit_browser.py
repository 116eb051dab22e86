"""Load a page in Debian's Chromium through playwright; record console errors, requests and layout.

The browser is the system one (``/usr/bin/chromium``, installed by ``make test`` when it is
missing); playwright only drives it, and ``playwright install`` is never run. A missing
browser is a failure, not a skip: the report's layout is part of what the tests check.
"""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

from playwright.sync_api import Browser, sync_playwright

#: How CI and the tests start Chromium: no sandbox (CI runs as root), nothing fetched in the background.
LAUNCH_ARGS = ["--no-sandbox", "--headless", "--disable-gpu", "--disable-background-networking",
               "--disable-component-update", "--disable-sync", "--no-first-run"]

#: Elements wider than the viewport, or scrolling sideways inside it (a table in an
#: overflow:auto box counts: the reader still has to scroll).
_OVERFLOW_JS = """
() => {
  const vw = document.documentElement.clientWidth;
  const out = [];
  if (document.documentElement.scrollWidth > vw) out.push('document ' + document.documentElement.scrollWidth);
  for (const el of document.querySelectorAll('body *')) {
    const r = el.getBoundingClientRect();
    if (r.width === 0 && r.height === 0) continue;
    const name = el.tagName.toLowerCase() + (el.id ? '#' + el.id : '') + (el.className && el.className.baseVal === undefined ? '.' + el.className : '');
    if (r.right > vw + 0.5) out.push(name + ' right=' + Math.round(r.right));
    const ox = getComputedStyle(el).overflowX;
    if ((ox === 'auto' || ox === 'scroll') && el.scrollWidth > el.clientWidth + 1)
      out.push(name + ' scrolls ' + el.scrollWidth + '>' + el.clientWidth);
  }
  return out.slice(0, 20);
}
"""


def chromium_path() -> str:
    """Path of the system Chromium; an error naming the fix when it is missing."""
    path = shutil.which("chromium")
    if not path:
        raise RuntimeError("no 'chromium' on PATH: run 'make test' (it installs Debian's chromium with "
                           "apt-get when /usr/bin/chromium is missing) or 'apt-get install -y chromium'")
    return path


@contextmanager
def browser() -> Iterator[Browser]:
    """A headless system Chromium driven by playwright."""
    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=chromium_path(), args=LAUNCH_ARGS)
        try:
            yield b
        finally:
            b.close()


@dataclass
class PageLoad:
    """What happened while a page loaded at one width."""

    width: int
    console_errors: list[str] = field(default_factory=list)
    requests: list[str] = field(default_factory=list)
    title: str = ""
    overflow: list[str] = field(default_factory=list)
    section_titles: list[str] = field(default_factory=list)
    section_ids: list[str] = field(default_factory=list)
    height: int = 0
    hidden_in_print: int = 0
    pdf: bytes = b""


def load_page(b: Browser, page_path: Path, width: int, screenshot: Path | None = None,
              pdf: bool = False) -> PageLoad:
    """Open ``page_path`` at ``width`` px; collect errors, requests, overflow, sections, optionally a PDF."""
    url = page_path.resolve().as_uri()
    result = PageLoad(width=width)
    page = b.new_page(viewport={"width": width, "height": 900})
    page.on("console", lambda m: result.console_errors.append(m.text) if m.type in ("error", "warning") else None)
    page.on("pageerror", lambda e: result.console_errors.append(str(e)))
    page.on("request", lambda r: result.requests.append(r.url) if r.url != url else None)
    page.goto(url, wait_until="load")
    page.wait_for_timeout(200)  # late console messages
    result.title = page.title()
    result.overflow = page.evaluate(_OVERFLOW_JS)
    result.section_ids = page.evaluate("() => [...document.querySelectorAll('main > section')].map(s => s.id)")
    result.section_titles = page.evaluate(
        "() => [...document.querySelectorAll('main > section > h2')].map(h => h.textContent.trim())")
    result.height = page.evaluate("() => document.documentElement.scrollHeight")
    if screenshot is not None:
        page.screenshot(path=str(screenshot), full_page=True)
    if pdf:
        page.emulate_media(media="print")
        # every table row inside a collapsed <details> must be printed
        result.hidden_in_print = page.evaluate(
            "() => [...document.querySelectorAll('details tr, details p')].filter(e => !e.checkVisibility()).length")
        result.pdf = page.pdf(format="A4", print_background=True)
    page.close()
    return result
