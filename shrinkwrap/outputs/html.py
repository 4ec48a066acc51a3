"""The HTML pieces every report page shares (a run's report.html, a search's): the style sheet, tables, the
two bits of Markdown our lines use, and the page around them, in one file with nothing outside it."""
from __future__ import annotations

import html
import re


def inline(md: str) -> str:
    """The two bits of Markdown our lines use (**bold**, `code`), as HTML, after escaping."""
    text = html.escape(md)
    text = re.sub(r"\*\*(.+?)\*\*", r"<strong>\1</strong>", text)
    return re.sub(r"`(.+?)`", r"<code>\1</code>", text)


def table(header: list[str], rows: list[list[str]], left: int) -> str:
    def cells(tag: str, row: list[str]) -> str:
        return "".join(f'<{tag}{"" if i < left else " class=num"}>{html.escape(c)}</{tag}>' for i, c in enumerate(row))

    body = "".join(f"<tr>{cells('td', r)}</tr>" for r in rows)
    return f"<div class=wide><table><thead><tr>{cells('th', header)}</tr></thead><tbody>{body}</tbody></table></div>"


STYLE = """
body { font: 15px/1.45 system-ui, sans-serif; margin: 2rem auto; max-width: 1100px; padding: 0 1rem; color: #222; }
table { border-collapse: collapse; margin: .5rem 0; font-size: 13px; }
.wide { overflow-x: auto; }
th, td { border-bottom: 1px solid #ddd; padding: .3rem .5rem; text-align: left; white-space: nowrap; }
th { background: #f4f4f4; white-space: normal; vertical-align: bottom; } td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; }
.caption, figcaption { color: #555; font-size: 13px; max-width: 60rem; }
figure { margin: 1rem 0 2rem; } img { max-width: 100%; height: auto; }
code { background: #f4f4f4; padding: 0 .2rem; }
"""

# Marks the page once every image has decoded, so a headless browser (and a test) can tell.
CHECK_IMAGES = """
window.addEventListener("load", function () {
  var imgs = Array.prototype.slice.call(document.images);
  var ok = imgs.filter(function (i) { return i.complete && i.naturalWidth > 0; }).length;
  document.body.setAttribute("data-images-decoded", ok + "/" + imgs.length);
});
"""


def page(title: str, parts: list[str], check_images: bool = False) -> str:
    """A whole HTML page: `parts` in its body, under `title`. With check_images, the body says once every
    image has decoded (data-images-decoded), so that a headless browser can tell."""
    body_attr = ' data-images-decoded="pending"' if check_images else ""
    script = f"\n<script>{CHECK_IMAGES}</script>" if check_images else ""
    return (f'<!doctype html>\n<html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title>'
            f"<style>{STYLE}</style></head>\n<body{body_attr}>\n" + "\n".join(parts) + f"{script}\n</body></html>\n")
