"""Checks that a writer's output carries no markup, link, image or control character from its input.

Each check reads the output the way its consumer does, with a parser from outside refnorm:
Python's html.parser (HTML Living Standard tokenisation) for report.html; markdown-it-py, a
CommonMark 0.31 implementation with the GFM table and strikethrough rules, for report.md
(rendered with raw HTML allowed, as GitHub renders a pull-request comment, then tokenised
like the page); xml.etree for JUnit XML (W3C XML 1.0 well-formedness); and for terminal
output, the control characters of ECMA-48 (C0, DEL, C1) that a terminal would act on.
"""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET
from html.parser import HTMLParser

#: Every element report.html is made of (conformance/report/html.py).
HTML_TAGS = {"html", "head", "meta", "title", "style", "body", "header", "div", "main", "p", "span", "nav", "a",
             "section", "h2", "h3", "table", "thead", "tbody", "tr", "th", "td", "b", "code", "details", "summary",
             "pre", "ul", "li", "figure", "img", "figcaption", "dl", "dt", "dd", "footer"}
HTML_ATTRS = {"class", "id", "href", "src", "alt", "style", "colspan", "lang", "charset", "name", "content"}

#: Every element report.md renders to (conformance/report/markdown.py): no link, image, emphasis
#: or strikethrough, which only a value's own markup could add.
MD_TAGS = {"h2", "h3", "p", "strong", "table", "thead", "tbody", "tr", "th", "td", "code", "details", "summary",
           "ul", "li", "blockquote", "sub", "pre"}

TERMINAL_CONTROLS = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f\u202a-\u202e\u2066-\u2069]")


class Tags(HTMLParser):
    """Elements, attributes and text of a page; unbalanced end tags are recorded."""

    VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source", "track", "wbr"}

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict]] = []
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        if tag not in self.VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_endtag(self, tag):
        if tag in self.VOID:
            return
        if self.stack and self.stack[-1] == tag:
            self.stack.pop()
        else:
            self.errors.append(f"</{tag}> closes {self.stack[-1] if self.stack else 'nothing'}")

    def handle_data(self, data):
        self.text.append(data)


def parse_html(text: str) -> Tags:
    t = Tags()
    t.feed(text)
    t.close()
    return t


def check_html(page: str) -> Tags:
    """report.html: only its own elements and attributes, balanced, links within the page, images inline."""
    t = parse_html(page)
    assert not t.errors, t.errors[:3]
    assert t.stack == [], t.stack[:5]
    for tag, attrs in t.tags:
        assert tag in HTML_TAGS, f"element <{tag}> in report.html"
        for a, v in attrs.items():
            assert a in HTML_ATTRS or a.startswith("data-"), f"attribute {a} on <{tag}>"
        if tag == "a":
            assert (attrs.get("href") or "").startswith("#"), attrs
        if tag == "img":
            assert (attrs.get("src") or "").startswith("data:image/png;base64,"), str(attrs)[:80]
        if "style" in attrs:
            assert re.fullmatch(r"width:\d+%", attrs["style"] or ""), attrs["style"]
    assert "\x00" not in page
    return t


def _markdown():
    from markdown_it import MarkdownIt

    return MarkdownIt("commonmark", {"html": True}).enable("table").enable("strikethrough")


_MD = None


def render_markdown_html(text: str) -> str:
    global _MD
    if _MD is None:
        _MD = _markdown()
    return _MD.render(text)


#: The raw HTML report.md writes itself (conformance/report/markdown.py).
MD_RAW_TAGS = {"details", "summary", "code", "sub"}


def check_markdown(text: str) -> Tags:
    """report.md as a pull request shows it: only the summary's own elements, <details> balanced.

    The raw text is checked first (every "<" opens one of the summary's own tags), then the text as
    a CommonMark renderer shows it."""
    outside, fence = [], False
    for line in text.split("\n"):
        if line.strip().startswith("```"):
            fence = not fence  # inside a fenced code block nothing is markup (CommonMark §4.5)
        elif not fence:
            outside.append(line)
    raw = "\n".join(outside)
    for m in re.finditer(r"<", raw):
        tag = re.match(r"</?([A-Za-z]+)>", raw[m.start():])
        assert tag and tag.group(1) in MD_RAW_TAGS, raw[max(0, m.start() - 40):m.start() + 60]
    assert "](" not in raw.replace("\\](", ""), "a Markdown link or image"
    html = render_markdown_html(text)
    t = parse_html(html)
    assert not t.errors, (t.errors[:3], html[:2000])
    assert t.stack == [], t.stack
    for tag, attrs in t.tags:
        assert tag in MD_TAGS, f"element <{tag}> in the rendered report.md: {attrs}"
        assert not {a for a in attrs if a not in ("style", "class")}, (tag, attrs)
    opened = sum(1 for tag, _ in t.tags if tag == "details")
    assert opened == text.count("\n<details><summary>"), (opened, text.count("<details>"))
    assert "\x00" not in text
    return t


def check_junit(tree: ET.ElementTree) -> ET.Element:
    """JUnit XML that an XML 1.0 parser reads back."""
    data = ET.tostring(tree.getroot(), encoding="utf-8", xml_declaration=True)
    return ET.fromstring(data)


def check_terminal(lines: list[str] | str) -> None:
    """Plain lines: no character a terminal would act on (ECMA-48 controls, bidirectional overrides)."""
    text = lines if isinstance(lines, str) else "\n".join(lines)
    bad = TERMINAL_CONTROLS.findall(text)
    assert not bad, [hex(ord(c)) for c in bad[:5]]
    text.encode("utf-8")  # no lone surrogate
